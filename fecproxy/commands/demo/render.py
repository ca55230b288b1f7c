"""What the demo prints: the header, the live view and the side-by-side summary, and their figures.

Why apart from the wiring: every line a user reads is built here from plain values (no sockets,
no clock), so the text and its arithmetic are tested without running the demo.
"""

from __future__ import annotations

import math
import textwrap
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field

from fecproxy.commands.demo.options import DemoOptions
from fecproxy.commands.demo.traffic import CAMERA_CHUNK_BYTES, CAMERA_IMAGE_BYTES, CAMERA_INTERVAL_S, TELEMETRY_BYTES
from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.planner import evaluate

#: Header text is wrapped at this width: it fits a 100-column terminal.
HEADER_WIDTH = 96
#: Without a terminal the live view prints a plain line this often, so a captured log stays short.
PLAIN_INTERVAL_S = 5.0


def percentile(values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile (q in 0..100); NaN for no values.  Nearest rank keeps the value a
    real observation, which is what a reader of "max" and "p99" of a few dozen delays expects."""
    if not len(values):
        return math.nan
    ordered = sorted(values)
    rank = max(1, math.ceil(q / 100 * len(ordered)))
    return ordered[min(rank, len(ordered)) - 1]


def predicted_residual(channel: GilbertElliott, blocks: Counter) -> float:
    """Expected residual loss per source datagram for the blocks actually sent.

    ``blocks`` counts (k', m') pairs; each block's residual comes from the planner's exact
    recursion (which starts every block in the chain's stationary state), weighted by its k'.
    """
    total = sum(k * count for (k, _), count in blocks.items())
    if total == 0:
        return math.nan
    lost = sum(k * count * evaluate(channel, k, m).residual_loss for (k, m), count in blocks.items())
    return lost / total


def describe_link(channel: GilbertElliott) -> str:
    """The relay's loss in words, for the header and the summary.  A mean burst of 1 is no burst
    at all (losses never touch), so it is said so rather than as "bursts of 1"."""
    if channel.average_loss == 0:
        return "loses no packets"
    if channel.is_memoryless:
        return f"loses {fmt_percent(channel.average_loss)} of packets independently"
    if channel.mean_burst <= 1 + 1e-9:
        return (
            f"loses {fmt_percent(channel.average_loss)} of packets, never two in a row (Gilbert–Elliott, mean burst 1)"
        )
    return (
        f"loses {fmt_percent(channel.average_loss)} of packets in bursts "
        f"(Gilbert–Elliott, mean burst {channel.mean_burst:.3g} packets)"
    )


def ratio(part: float, whole: float) -> float:
    return part / whole if whole else math.nan


def fmt_percent(value: float) -> str:
    """Two decimals from 0.1 % up; below that two significant digits, so a small but real figure
    (an exact prediction of 2e-6) never reads as "0.000 %"."""
    if math.isnan(value):
        return "–"
    if value == 0:
        return "0 %"
    return f"{value * 100:.2f} %" if value >= 0.001 else f"{value * 100:.2g} %"


def fmt_ms(seconds: float) -> str:
    if math.isnan(seconds):
        return "–"
    ms = seconds * 1000
    return f"{ms:.0f} ms" if ms >= 100 else f"{ms:.1f} ms" if ms >= 1 else f"{ms:.2f} ms"


def fmt_bytes(count: float) -> str:
    for unit, size in (("MB", 1e6), ("kB", 1e3)):
        if count >= size:
            return f"{count / size:.1f} {unit}"
    return f"{count:.0f} B"


def pending(sent: int, delivered: int, unrecovered: int) -> int:
    """Datagrams sent that neither reached the sink nor were given up by the receiver yet: in
    flight, or lost on the link and waiting for their block's repair packets."""
    return max(0, sent - delivered - unrecovered)


@dataclass(frozen=True)
class LiveSnapshot:
    """What the live view shows, gathered once a second."""

    elapsed: float
    rate: float  # datagrams/s reaching the sink over the last interval
    link_packets: int  # packets that faced the loss model so far (source and repair)
    link_lost: int
    source_sent: int
    source_lost: int  # source packets lost on the link
    recovered: int  # datagrams the sink got although the link lost their source packet
    unrecovered: int  # receiver's count of datagrams given up for good
    pending: int  # sent, not yet at the sink and not yet given up: in flight or awaiting repair
    delay_p50: float  # one-way delay of datagrams that arrived in the last interval
    rebuilt_p50: float  # send → delivery of rebuilt datagrams so far
    acks: int


def format_live(s: LiveSnapshot) -> list[str]:
    return [
        f"t = {s.elapsed:5.1f} s   {s.rate:5.0f} datagrams/s at the sink   acks back {s.acks}",
        f"link lost {fmt_percent(ratio(s.link_lost, s.link_packets))} of packets, "
        f"{s.source_lost} of {s.source_sent} datagrams   recovered {s.recovered}   "
        f"residual loss {fmt_percent(ratio(s.unrecovered, s.source_sent))} ({s.unrecovered})   "
        f"pending {s.pending} (sent, not yet delivered nor given up)",
        f"one-way delay p50 {fmt_ms(s.delay_p50)}   rebuilt datagrams p50 {fmt_ms(s.rebuilt_p50)}",
    ]


@dataclass(frozen=True)
class DemoResult:
    """Everything the summary shows, measured by the demo's own station, tap and sink."""

    seconds: float
    seed: int
    k: int
    m: int
    flush_ms: int
    channel: GilbertElliott
    sent: int  # application datagrams from the station
    app_bytes: int
    delivered: int  # distinct datagrams that reached the sink intact
    corrupted: int  # datagrams that reached the sink (or the station, for acks) failing the checksum
    duplicates: int
    link_source_lost: int  # source packets the link lost: the application's loss without FEC
    source_packets: int
    repair_packets: int
    source_wire_bytes: int
    repair_wire_bytes: int
    link_packets: int
    link_lost: int
    rebuilt_delays: Sequence[float]
    intact_delays: Sequence[float]
    images_sent: int
    images_complete: int
    images_complete_without_fec: int
    acks_sent: int
    acks_received: int
    receiver_lost: int  # the receiver daemon's own counters, for comparison
    receiver_recovered: int
    receiver_unrecovered: int
    blocks: Counter = field(default_factory=Counter)
    #: Per size class of the sender (name → (source bytes, repair bytes, source packets, repair
    #: packets) on the link): small telemetry is not padded to image-sized repair symbols.
    classes: dict = field(default_factory=dict)
    interrupted: bool = False
    code: str = "block"  # the sender's fec.code
    window: int = 0  # with code sliding: fec.window and fec.repair_interval
    repair_interval: int = 0

    @property
    def lost_with_fec(self) -> int:
        return self.sent - self.delivered

    @property
    def predicted_with_fec(self) -> float:
        return predicted_residual(self.channel, self.blocks)


def format_summary(r: DemoResult) -> str:
    """The side-by-side table: the application's view without FEC and with it."""
    left, right = 30, 24
    if r.code == "sliding":
        code = f"with FEC (sliding window {r.window}, 1 repair per {r.repair_interval})"
    else:
        code = f"with FEC (k={r.k}, m={r.m}, flush {r.flush_ms} ms)"

    def row(label: str, without: str, with_fec: str) -> str:
        return f"  {label:<{left}} {without:<{right}} {with_fec}"

    on_air = r.source_wire_bytes + r.repair_wire_bytes
    rebuilt = r.rebuilt_delays
    if rebuilt:
        delay = (
            f"p50 {fmt_ms(percentile(rebuilt, 50))}, p99 {fmt_ms(percentile(rebuilt, 99))}, "
            f"max {fmt_ms(max(rebuilt))} ({len(rebuilt)} rebuilt)"
        )
    else:
        delay = "– (nothing needed rebuilding)"
    blocks = sum(r.blocks.values())
    lossy = r.channel.average_loss > 0
    lines = [
        f"Summary after {r.seconds:.1f} s{' (ended early)' if r.interrupted else ''}: seed {r.seed}; "
        f"the link and the traffic are invented demo figures.",
        row("", "without FEC", code),
        row(
            "datagrams lost",
            f"{r.link_source_lost} of {r.sent} ({fmt_percent(ratio(r.link_source_lost, r.sent))})",
            f"{r.lost_with_fec} of {r.sent} ({fmt_percent(ratio(r.lost_with_fec, r.sent))})",
        ),
        row(
            "camera stills complete",
            f"{r.images_complete_without_fec} of {r.images_sent}",
            f"{r.images_complete} of {r.images_sent}",
        ),
        row("corrupted datagrams", "–", f"{r.corrupted}"),
        row(
            "packets on the link",
            f"{r.sent}",
            f"{r.source_packets + r.repair_packets} (+{r.repair_packets} repair, "
            f"{fmt_percent(ratio(r.repair_packets, r.source_packets))} overhead)",
        ),
        row(
            "bytes on the link",
            fmt_bytes(r.app_bytes),
            f"{fmt_bytes(on_air)} (+{fmt_percent(ratio(on_air - r.app_bytes, r.app_bytes))}: "
            f"repair {fmt_bytes(r.repair_wire_bytes)}, headers {fmt_bytes(r.source_wire_bytes - r.app_bytes)})",
        ),
        *[
            row(
                f"  size class {name}",  # a sub-row of "bytes on the link"
                "",
                f"repair {fmt_bytes(repair_bytes)} for source {fmt_bytes(source_bytes)} "
                f"(+{fmt_percent(ratio(repair_bytes, source_bytes))} bytes, "
                f"+{fmt_percent(ratio(repair_packets, source_packets))} packets)",
            )
            for name, (source_bytes, repair_bytes, source_packets, repair_packets) in r.classes.items()
            if source_packets
        ],
        row("delay of rebuilt datagrams", "–", delay),
        row(
            "planner's prediction",
            f"{fmt_percent(r.channel.average_loss)} lost",
            f"{fmt_percent(r.predicted_with_fec)} lost (exact, for the {blocks} blocks sent)"
            if r.code != "sliding"
            else "no exact figure for the sliding code: fecproxy plan --sliding-window estimates it",
        ),
        "",
        f"  link: lost {r.link_lost} of {r.link_packets} packets on the air "
        f"({fmt_percent(ratio(r.link_lost, r.link_packets))}); "
        f"configured: {describe_link(r.channel)}",
        f"  intact datagrams' one-way delay: p50 {fmt_ms(percentile(r.intact_delays, 50))}, "
        f"p99 {fmt_ms(percentile(r.intact_delays, 99))}",
        f"  acknowledgements back through the pair (over the same {'lossy ' if lossy else ''}radio): "
        f"{r.acks_received} of {r.acks_sent}",
        # Its metrics endpoint closed with the run: the figures are given here, not a URL.
        f"  the receiver daemon's own counters at the end: lost {r.receiver_lost}, recovered {r.receiver_recovered}, "
        f"unrecovered {r.receiver_unrecovered}; duplicates at the sink {r.duplicates}",
    ]
    if lossy:
        events = "bursts" if r.channel.mean_burst > 1 + 1e-9 else "losses"
        lines.append(f"  A short run sees few {events}, so measured losses scatter around the prediction.")
    return "\n".join(lines)


class LiveView:
    """Redraws the panel in place on a terminal; otherwise prints a plain line every few seconds."""

    def __init__(self, out, enabled: bool) -> None:
        self.out = out
        self.enabled = enabled
        self.tty = bool(getattr(out, "isatty", lambda: False)())
        self._drawn = 0
        self._last_plain = -math.inf

    def show(self, snapshot: LiveSnapshot) -> None:
        if not self.enabled:
            return
        lines = format_live(snapshot)
        if self.tty:
            up = f"\x1b[{self._drawn}F" if self._drawn else ""
            self.out.write(up + "".join(f"\x1b[2K  {line}\n" for line in lines))
            self._drawn = len(lines)
        elif snapshot.elapsed - self._last_plain >= PLAIN_INTERVAL_S - 1e-6:
            self._last_plain = snapshot.elapsed
            self.out.write("  " + " | ".join(lines) + "\n")
        self.out.flush()


def format_header(
    options: DemoOptions, channel: GilbertElliott, *, sender, relay, receiver, sink, metrics_text: str
) -> str:
    """The story, the path through the pair (socket addresses) and the settings, before the run."""
    story = (
        "An invented scenario with invented figures: a remote weather station sends sensor telemetry "
        f"({options.rate:g} datagrams/s of {TELEMETRY_BYTES[0]}–{TELEMETRY_BYTES[1]} bytes) and a "
        f"{CAMERA_IMAGE_BYTES // 1000} kB camera still every {CAMERA_INTERVAL_S:g} s (in {CAMERA_CHUNK_BYTES}-byte "
        f"datagrams) through a hill-top radio relay that {describe_link(channel)}, seed {options.seed}."
    )
    rows = [
        "fecproxy demo",
        *textwrap.wrap(story, HEADER_WIDTH, initial_indent="  ", subsequent_indent="  "),
        f"  station → sender {format_sockaddr(sender)} → {'lossy ' if channel.average_loss else ''}relay "
        f"{format_sockaddr(relay)} "
        f"→ receiver {format_sockaddr(receiver)} → sink {format_sockaddr(sink)}",
        "  (the sink's acknowledgements travel back the same way)",
        f"  FEC: k={options.k} source + m={options.m} repair packets per block; blocks close after "
        f"{options.flush_ms} ms"
        if options.code != "sliding"
        else f"  FEC: sliding-window code (RFC 8681), window {options.window} datagrams, one repair packet "
        f"every {options.repair_interval} (the overhead of k={options.k}, m={options.m})",
        f"  receiver metrics: {metrics_text}",
        f"  running for {options.seconds:g} s (Ctrl-C ends early with the summary)",
        "",
    ]
    return "\n".join(rows) + "\n"
