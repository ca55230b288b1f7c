"""``fecproxy watch``: the dashboard's figures in a terminal, read from daemons' /metrics.

For an operator on a site with no Prometheus or Grafana: point it at the sender's and the
receiver's metrics URLs and it shows, refreshed every second, the link loss before recovery and
the residual loss after it, recoveries per second, repair overhead in packets and bytes, recovery
delay quantiles, drops by reason, flows, the online loss/burst estimate and the current code.
Rates are differences between two reads (the first frame shows totals since each daemon
started).  An endpoint that cannot be read is shown as DOWN with the error, and the rest go on.
Rendering is a pure function of metrics text, so it is tested without a network.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
import urllib.error
import urllib.request
from collections import deque
from dataclasses import dataclass, field

from prometheus_client.parser import text_string_to_metric_families

from fecproxy.config.addresses import metrics_url
from fecproxy.protocol.peer_view import MIN_SOURCE_SAMPLES

#: A read slower than this counts as a failing endpoint: a healthy daemon answers in
#: milliseconds, and two endpoints must fit roughly within a few refresh periods.
FETCH_TIMEOUT_S = 2.0
#: Once a second, like the dashboard's short refresh: fast enough to see a burst, slow enough
#: that the rates are not dominated by single packets.
DEFAULT_INTERVAL_S = 1.0
#: Bound on frames when a count is given (a runaway script loop should still end).
MAX_COUNT = 1_000_000
QUANTILES = (0.5, 0.9, 0.99)
#: Events shown under each endpoint on a terminal with ``--events``: the last few fit on a screen
#: beside the figures; the status page and /status.json hold the daemon's last 200.
EVENTS_SHOWN = 10
CLEAR_SCREEN = "\x1b[H\x1b[2J"

Samples = dict[tuple[str, tuple[tuple[str, str], ...]], float]


def parse_metrics(text: str) -> Samples:
    """Every sample of a Prometheus text exposition, keyed by (name, sorted labels)."""
    samples: Samples = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            samples[(sample.name, tuple(sorted(sample.labels.items())))] = float(sample.value)
    return samples


def _get(samples: Samples, name: str, **labels: str) -> float:
    return samples.get((name, tuple(sorted(labels.items()))), 0.0)


def _delta(now: Samples, before: Samples | None, name: str, **labels: str) -> float:
    """Increase of a counter since the previous read (all of it on the first read; a counter
    that went down means the daemon restarted: its new value is the increase)."""
    value = _get(now, name, **labels)
    if before is None:
        return value
    previous = _get(before, name, **labels)
    return value - previous if value >= previous else value


def _ratio(numerator: float, denominator: float) -> float | None:
    return numerator / denominator if denominator > 0 else None


def histogram_quantile(q: float, buckets: list[tuple[float, float]]) -> float | None:
    """The q-quantile of cumulative (upper bound, count) buckets, interpolated linearly within
    a bucket as Prometheus' histogram_quantile does; None without observations."""
    buckets = sorted(buckets)
    if not buckets or buckets[-1][1] <= 0:
        return None
    rank = q * buckets[-1][1]
    lower_bound, lower_count = 0.0, 0.0
    for bound, count in buckets:
        if count >= rank:
            if math.isinf(bound):
                return lower_bound  # above the highest finite bucket: its bound, as Prometheus
            if count == lower_count:
                return bound
            return lower_bound + (bound - lower_bound) * (rank - lower_count) / (count - lower_count)
        lower_bound, lower_count = bound, count
    return None


@dataclass
class Figures:
    """What one endpoint shows: the dashboard's panels for one daemon."""

    role: str = "?"
    k: str = "?"
    decoding: str = "unknown until traffic"  # the peer's code, from its repair packets
    m: str = "?"
    version: str = "?"
    seconds: float | None = None  # the span the rates cover; None = totals since start
    link_loss: float | None = None
    residual_loss: float | None = None
    lost: float = 0.0
    expected: float = 0.0
    recovered: float = 0.0
    repair_packet_overhead: float | None = None
    repair_byte_overhead: float | None = None
    delay_quantiles: dict[float, float | None] = field(default_factory=dict)
    drops: dict[str, float] = field(default_factory=dict)
    flows: float = 0.0
    estimate: tuple[float, float] | None = None
    air: str | None = None  # the link's use of its air rate (link.rate), None when not paced
    far_end: str = "—"  # what the peer reports on the direction this daemon sends, and its silence
    peer_address: str | None = None  # where it sends (from /status.json: an address is no metric label)
    # In-order delivery (delivery.order: in_order): datagrams handed on through it, the added
    # wait's quantiles, datagrams that waited behind a gap and gaps skipped.
    ordered: float = 0.0
    wait_quantiles: dict[float, float | None] = field(default_factory=dict)
    held: float = 0.0
    skipped: float = 0.0


def figures(now: Samples, before: Samples | None = None, seconds: float | None = None) -> Figures:
    """The dashboard's figures from one read (totals) or two reads ``seconds`` apart (rates)."""
    out = Figures(seconds=seconds if before is not None else None)
    for (name, labels), _ in now.items():
        if name == "fecproxy_info":
            info = dict(labels)
            out.role, out.k, out.m, out.version = (info.get(key, "?") for key in ("role", "k", "m", "version"))
    lost = _delta(now, before, "fecproxy_source_packets_lost_total")
    arrived = _delta(now, before, "fecproxy_link_packets_received_total", kind="source")
    out.lost, out.expected = lost, lost + arrived
    out.link_loss = _ratio(lost, lost + arrived)
    out.residual_loss = _ratio(_delta(now, before, "fecproxy_datagrams_unrecovered_total"), lost + arrived)
    out.recovered = _delta(now, before, "fecproxy_datagrams_recovered_total")
    out.repair_packet_overhead = _ratio(
        _delta(now, before, "fecproxy_repair_packets_sent_total"),
        _delta(now, before, "fecproxy_source_packets_sent_total"),
    )
    out.repair_byte_overhead = _ratio(
        _delta(now, before, "fecproxy_repair_bytes_sent_total"), _delta(now, before, "fecproxy_source_bytes_sent_total")
    )
    buckets = []
    for (name, labels), _ in now.items():
        if name == "fecproxy_recovery_delay_seconds_bucket":
            le = dict(labels)["le"]
            buckets.append((float(le), _delta(now, before, name, le=le)))
    out.delay_quantiles = {q: histogram_quantile(q, buckets) for q in QUANTILES}
    waits = []
    for (name, labels), _ in now.items():
        if name == "fecproxy_delivery_wait_seconds_bucket":
            le = dict(labels)["le"]
            waits.append((float(le), _delta(now, before, name, le=le)))
    out.wait_quantiles = {q: histogram_quantile(q, waits) for q in QUANTILES}
    if ("fecproxy_delivery_wait_seconds_count", ()) in now:
        out.ordered = _delta(now, before, "fecproxy_delivery_wait_seconds_count")
        out.held = _delta(now, before, "fecproxy_delivery_held_total")
    for (name, labels), _ in now.items():
        if name == "fecproxy_delivery_gaps_skipped_total":
            out.skipped += _delta(now, before, name, reason=dict(labels).get("reason", "?"))
    for (name, labels), _ in now.items():
        if name == "fecproxy_packets_dropped_total":
            reason = dict(labels).get("reason", "?")
            count = _delta(now, before, name, reason=reason)
            if count:
                out.drops[reason] = count
    out.flows = _get(now, "fecproxy_flows")
    if ("fecproxy_link_loss_ratio", ()) in now:
        loss, burst = _get(now, "fecproxy_link_loss_ratio"), _get(now, "fecproxy_link_mean_burst_packets")
        if math.isfinite(loss):  # NaN: the daemon has not received a block from its peer yet
            out.estimate = (loss, burst)
    if ("fecproxy_received_code_source_symbols", ()) in now:
        k, m = _get(now, "fecproxy_received_code_source_symbols"), _get(now, "fecproxy_received_code_repair_symbols")
        if math.isfinite(k):
            out.decoding = f"k={k:.0f} m={m:.0f}" if math.isfinite(m) else f"k={k:.0f}"
            if _get(now, "fecproxy_received_code_full_blocks") == 0:
                out.decoding = f"short blocks only so far (last {out.decoding})"
    out.air = _air_use(now, before, seconds)
    out.far_end = _far_end(now)
    return out


def _air_use(now: Samples, before: Samples | None, seconds: float | None) -> str | None:
    """Share of link.rate used by source, repair and control, and the pacer's queue."""
    rate = _get(now, "fecproxy_link_rate_bytes_per_second")
    if not math.isfinite(rate) or rate <= 0:
        return None
    queue = (
        f"queue {_get(now, 'fecproxy_link_queue_packets'):.0f} pkts, "
        f"wait {1000 * _get(now, 'fecproxy_link_queue_delay_seconds'):.0f} ms"
    )
    dropped = sum(
        _delta(now, before, name, **dict(labels))
        for (name, labels), _ in now.items()
        if name == "fecproxy_link_queue_dropped_total"
    )
    if not seconds or before is None:
        return f"link.rate {8 * rate / 1000:g} kbit/s, {queue}, {dropped:.0f} dropped since start"
    use = {
        kind: _delta(now, before, "fecproxy_link_air_bytes_sent_total", kind=kind) / seconds / rate
        for kind in ("source", "repair", "control")
    }
    parts = " + ".join(f"{kind} {100 * share:.1f} %" for kind, share in use.items())
    return f"{100 * sum(use.values()):.1f} % of {8 * rate / 1000:g} kbit/s ({parts}), {queue}, {dropped:.0f} dropped"


def _far_end(now: Samples) -> str:
    """The peer's reported loss on what this daemon sends, and whether it is heard."""
    silent = _get(now, "fecproxy_peer_silent")
    heard = _get(now, "fecproxy_peer_last_heard_seconds")
    before, after = _get(now, "fecproxy_peer_link_loss_ratio"), _get(now, "fecproxy_peer_residual_loss_ratio")
    if silent == 1:
        state = f"PEER SILENT for {heard:.0f} s (nothing valid from it)"
    elif math.isfinite(heard):
        state = f"heard {heard:.1f} s ago"
    else:
        state = "not heard yet"
    if math.isfinite(before):
        return f"peer reports loss {_percent(before)} before, {_percent(after)} after recovery; {state}"
    if _get(now, "fecproxy_reports_received_total") > 0:
        # Reports arrive, but the ratios wait for enough datagrams to mean something.
        return f"loss reports arriving, under {MIN_SOURCE_SAMPLES} datagrams reported so far; {state}"
    return f"no loss report yet; {state}"


def _percent(value: float | None) -> str:
    return "—" if value is None else f"{100 * value:.3f} %"


def _per(count: float, seconds: float | None) -> str:
    return f"{count / seconds:.1f}/s" if seconds else f"{count:.0f} total"


def _ms(value: float | None) -> str:
    return "—" if value is None else f"{1000 * value:.1f} ms"


@dataclass
class NotADaemon:
    """An endpoint that answers but is no fecproxy daemon's: what it seems to be instead."""

    text: str


def not_a_daemon(samples: Samples) -> NotADaemon | None:
    """Why ``samples`` cannot be shown as a daemon's (no ``fecproxy_info``), or None if they can."""
    names = {name for name, _ in samples}
    if "fecproxy_info" in names:
        return None
    if any(name.startswith("fecproxy_impair_") for name in names):
        return NotADaemon(
            "this is fecproxy impair's endpoint (the emulated link's figures), not a daemon's: "
            "point watch at the sender's and the receiver's metrics.listen"
        )
    return NotADaemon("no fecproxy daemon metrics here (no fecproxy_info): is this a daemon's metrics.listen?")


def render_endpoint(url: str, view: Figures | NotADaemon | str, events: list[str] | None = None) -> list[str]:
    """Lines for one endpoint; ``view`` is its figures, what it is instead of a daemon, or the
    error text when it is down; ``events`` the event lines to show under it (``--events``)."""
    if isinstance(view, str):
        return [f"{url}", f"  DOWN: {view}"]
    if isinstance(view, NotADaemon):
        return [f"{url}", f"  NOT A DAEMON: {view.text}"]
    f = view
    span = f"last {f.seconds:.1f} s" if f.seconds else "since start"
    lines = [
        f"{url}  role={f.role}  code k={f.k} m={f.m}  decoding {f.decoding}  version {f.version}  ({span})",
        f"  link loss (before recovery)  {_percent(f.link_loss):>12}   {f.lost:.0f} of {f.expected:.0f} source packets",
        f"  residual loss (after)        {_percent(f.residual_loss):>12}",
        f"  recovered                    {_per(f.recovered, f.seconds):>12}",
        f"  repair overhead              {_percent(f.repair_packet_overhead):>12} packets   "
        f"{_percent(f.repair_byte_overhead)} bytes",
        "  recovery delay               "
        + "   ".join(f"p{round(100 * q)} {_ms(value)}" for q, value in f.delay_quantiles.items()),
        "  drops                        "
        + (", ".join(f"{reason} {_per(count, f.seconds)}" for reason, count in sorted(f.drops.items())) or "none"),
        "  in-order wait                "
        + (
            "— (delivering as available, or nothing delivered yet)"
            if not f.ordered
            else "   ".join(f"p{round(100 * q)} {_ms(value)}" for q, value in f.wait_quantiles.items())
            + f"   held {_per(f.held, f.seconds)}, gaps skipped {_per(f.skipped, f.seconds)}"
        ),
        f"  flows                        {f.flows:.0f}",
        f"  far end (what we send)       {f.far_end}",
        f"  peer address                 {f.peer_address or '— (not learned yet, or an older daemon)'}",
        "  online estimate              "
        + (
            "— (no block received from the peer yet)"
            if f.estimate is None
            else f"loss {_percent(f.estimate[0])}, mean burst {f.estimate[1]:.2f} packets"
        ),
    ]
    if f.air is not None:
        lines.append(f"  air rate used                {f.air}")
    if events is not None:
        lines.append("  events                       " + ("" if events else "none"))
        lines.extend(f"    {line}" for line in events)
    return lines


def render(
    views: list[tuple[str, Figures | NotADaemon | str]], clock: str = "", events: dict[str, list[str]] | None = None
) -> str:
    """One whole frame for every endpoint, in the order given (with their ``events`` if given)."""
    lines = [f"fecproxy watch  {clock}".rstrip()]
    for url, view in views:
        lines.append("")
        lines.extend(render_endpoint(url, view, None if events is None else events.get(url, [])))
    return "\n".join(lines) + "\n"


def event_line(event: dict) -> str:
    """One event of a daemon's history as a line: time, level, name, fields."""
    fields = " ".join(f"{key}={value}" for key, value in (event.get("fields") or {}).items())
    clock = str(event.get("ts", ""))[11:19]
    return f"{clock} {event.get('level', '?'):<7} {event.get('event', '?')} {fields}".rstrip()


def status_url(url: str, since: int) -> str:
    """The daemon's /status.json asking for the events after the ``since``-th."""
    scheme, _, rest = url.partition("://")
    host = rest.split("/", 1)[0]
    return f"{scheme}://{host}/status.json?events_since={since}"


def fetch_events(url: str, since: int, timeout: float = FETCH_TIMEOUT_S) -> tuple[list[dict], int]:
    """The daemon's events after the ``since``-th, and the number of the last one."""
    with urllib.request.urlopen(status_url(url, since), timeout=timeout) as response:
        history = json.load(response).get("history") or {}
    return list(history.get("events") or []), int(history.get("events_recorded", since))


def peer_address(url: str, timeout: float = FETCH_TIMEOUT_S) -> str | None:
    """Where the daemon sends its link packets and how it knows, from its /status.json; None when
    it has no peer yet or does not say (an older daemon)."""
    scheme, _, rest = url.partition("://")
    with urllib.request.urlopen(f"{scheme}://{rest.split('/', 1)[0]}/status.json", timeout=timeout) as response:
        facts = json.load(response).get("daemon") or {}
    if not facts.get("peer"):
        return None
    return f"{facts['peer']} ({'learned' if facts.get('peer_from') == 'learned' else 'link.peer'})"


def fetch(url: str, timeout: float = FETCH_TIMEOUT_S) -> Samples:
    with urllib.request.urlopen(url, timeout=timeout) as response:
        return parse_metrics(response.read().decode("utf-8"))


def _error_text(error: Exception) -> str:
    if isinstance(error, urllib.error.URLError) and not isinstance(error, urllib.error.HTTPError):
        error = error.reason if isinstance(error.reason, Exception) else error
    return f"{type(error).__name__}: {error}"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "urls",
        nargs="+",
        metavar="URL",
        help="metrics endpoint of a daemon (host:port or http://host:port/metrics); give the sender's and the "
        "receiver's",
    )
    parser.add_argument("--interval", type=float, default=DEFAULT_INTERVAL_S, help="seconds between frames")
    parser.add_argument("--count", type=int, default=None, help="stop after this many frames (default: until Ctrl-C)")
    parser.add_argument("--once", action="store_true", help="print one frame of totals since start and exit")
    parser.add_argument(
        "--events",
        action="store_true",
        help="also show each daemon's events from its history (auth failures, reloads, peer and session changes, "
        "adaptations, silences): the last few on a terminal, each new one once otherwise",
    )


def _new_events(url: str, seen: dict[str, int], kept: deque[str], *, every_frame: bool) -> list[str]:
    """The event lines to show for ``url`` this frame: on a terminal (redrawn each frame) the last
    few, otherwise each event once, when it is new.  A failed read shows as one line."""
    since = seen.get(url, 0)
    try:
        events, last = fetch_events(url, since)
    except Exception as error:  # the figures are shown anyway; an old daemon has no history
        return [f"(events unavailable: {_error_text(error)})"]
    if last < since:  # the daemon restarted: its numbering starts afresh
        events, last = fetch_events(url, 0)
    seen[url] = last
    lines = [event_line(event) for event in events]
    kept.extend(lines)
    return list(kept) if every_frame else lines


def main(args: argparse.Namespace) -> int:
    if len(args.urls) > 2:
        print("fecproxy watch: give one or two metrics URLs (sender's and receiver's)", file=sys.stderr)
        return 2
    if not (math.isfinite(args.interval) and 0.05 <= args.interval <= 3600):
        print("fecproxy watch: --interval must be between 0.05 and 3600 s", file=sys.stderr)
        return 2
    count = 1 if args.once else args.count
    if count is not None and not 1 <= count <= MAX_COUNT:
        print(f"fecproxy watch: --count must be between 1 and {MAX_COUNT}", file=sys.stderr)
        return 2
    urls = [metrics_url(url) for url in args.urls]
    previous: dict[str, tuple[Samples, float]] = {}
    seen_events: dict[str, int] = {}  # per endpoint: the number of the last event read
    kept_events: dict[str, deque[str]] = {url: deque(maxlen=EVENTS_SHOWN) for url in urls}
    clear = sys.stdout.isatty()
    frame = 0
    any_up = False
    try:
        while count is None or frame < count:
            if frame:
                time.sleep(args.interval)
            views: list[tuple[str, Figures | NotADaemon | str]] = []
            shown_events: dict[str, list[str]] | None = {} if args.events else None
            any_up = False
            for url in urls:
                try:
                    samples, at = fetch(url), time.monotonic()
                except Exception as error:  # any failure to read or parse is shown, not raised
                    views.append((url, _error_text(error)))
                    continue
                other = not_a_daemon(samples)
                if other is not None:
                    views.append((url, other))
                    continue
                any_up = True
                before = previous.get(url)
                shown = figures(samples, *((before[0], at - before[1]) if before else (None, None)))
                try:
                    shown.peer_address = peer_address(url)
                except Exception:  # the figures are shown anyway; the address line says it is unknown
                    shown.peer_address = None
                views.append((url, shown))
                previous[url] = (samples, at)
                if shown_events is not None:
                    shown_events[url] = _new_events(url, seen_events, kept_events[url], every_frame=clear)
            text = render(views, time.strftime("%Y-%m-%d %H:%M:%S"), shown_events)
            sys.stdout.write((CLEAR_SCREEN if clear else ("\n" if frame else "")) + text)
            sys.stdout.flush()
            frame += 1
    except KeyboardInterrupt:
        return 0
    return 0 if any_up else 1
