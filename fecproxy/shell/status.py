"""The status page's data: ``/status.json``, and the WSGI app that serves it beside the page.

Why JSON built here rather than the page parsing /metrics: the page must also show what
``fecproxy plan`` would recommend for the measured link, and the planner is Python; and reading the
samples from the daemon's own Prometheus registry (the very families /metrics renders) means the
page and the scrape cannot disagree on a name or a value.  The page computes rates from two reads
itself, as ``fecproxy watch`` does, so any number of open browsers cost the daemon one registry
read per poll each and keep no state here beyond the rate window and the cached plan.

The WSGI app answers ``/`` (the page) and ``/status.json``; every other path goes to the app it
wraps (prometheus-client's), so /metrics is unchanged.
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable
from urllib.parse import parse_qs

from prometheus_client import CollectorRegistry

from fecproxy.linkmodel.loss_models import ChannelConfigError, channel_from_estimate
from fecproxy.linkmodel.planner import (
    DEFAULT_LATENCY_BUDGET_S,
    DEFAULT_MAX_OVERHEAD,
    DEFAULT_TARGET,
    PlanError,
    PlanRequest,
    plan,
)
from fecproxy.shell import status_page
from fecproxy.shell.history import History

#: How often the page polls (seconds): once a second, like ``fecproxy watch``; the page reads it
#: from the document, so this is the one place to change it.
REFRESH_S = 1.0
#: The datagram rate handed to the planner is measured over about this long: long enough to
#: average a camera still's burst of chunks with the quiet telemetry between them, short enough to
#: follow a change of traffic within a minute (common practice, no source).
RATE_WINDOW_S = 60.0
#: Below this span between the oldest and newest read the window is too short to be a rate; the
#: average since start is used instead.
MIN_RATE_SPAN_S = 2.0
#: A plan costs 15–60 ms of CPU (holding the GIL the daemon's own thread needs), so it is
#: recomputed at most this often, and only when its rounded inputs changed.
PLAN_MIN_INTERVAL_S = 10.0
#: Planner inputs are rounded to this many significant digits: finer changes of an online
#: estimate are noise and would only defeat the cache.
PLAN_INPUT_DIGITS = 2
#: Bound on the reads kept for the rate window: an hour of one browser polling, or a few dozen
#: browsers at once for a minute; past it the window only gets shorter.
MAX_WINDOW_READS = 3600

log = logging.getLogger("fecproxy.shell.status")

LOSS_GAUGE = "fecproxy_link_loss_ratio"
BURST_GAUGE = "fecproxy_link_mean_burst_packets"
LOST_COUNTER = "fecproxy_source_packets_lost_total"
RECEIVED_COUNTER = "fecproxy_link_packets_received_total"


def sample_key(name: str, labels: dict[str, str]) -> str:
    """A sample's key as the text exposition writes it: ``name{label="value",...}``."""
    if not labels:
        return name
    inner = ",".join(f'{key}="{value}"' for key, value in sorted(labels.items()))
    return f"{name}{{{inner}}}"


def read_samples(registry: CollectorRegistry) -> tuple[dict[str, float], dict[str, str]]:
    """Every sample the registry exposes (keyed as on /metrics), and the fecproxy_info labels."""
    samples: dict[str, float] = {}
    info: dict[str, str] = {}
    for family in registry.collect():
        for sample in family.samples:
            if sample.name == "fecproxy_info":
                info = dict(sample.labels)
                continue
            samples[sample_key(sample.name, sample.labels)] = float(sample.value)
    return samples, info


def round_significant(value: float, digits: int = PLAN_INPUT_DIGITS) -> float:
    if value == 0 or not math.isfinite(value):
        return value
    return round(value, digits - 1 - math.floor(math.log10(abs(value))))


def expected_source(samples: dict[str, float]) -> float:
    """Source datagrams the peer sent on the link so far: received plus lost."""
    return samples.get(LOST_COUNTER, 0.0) + samples.get(sample_key(RECEIVED_COUNTER, {"kind": "source"}), 0.0)


def plan_command(loss: float, burst: float, rate: float) -> str:
    """The ``fecproxy plan`` command line that gives the same recommendation."""
    link = f"--loss {loss:g}" + (f" --burst {burst:g}" if loss > 0 else "")
    return f"fecproxy plan {link} --rate {rate:g}"


def recommend(loss: float, burst: float, rate: float) -> dict:
    """What ``fecproxy plan`` recommends (its default budgets) for this link and datagram rate."""
    command = plan_command(loss, burst, rate)
    inputs = {
        "loss": loss,
        "burst": burst,
        "rate": rate,
        "command": command,
        "latency_budget_ms": DEFAULT_LATENCY_BUDGET_S * 1000,
        "max_overhead": DEFAULT_MAX_OVERHEAD,
        "target": DEFAULT_TARGET,
    }
    try:
        result = plan(
            PlanRequest(
                channel=channel_from_estimate(loss, burst),
                rate=rate,
                latency_budget=DEFAULT_LATENCY_BUDGET_S,
                max_overhead=DEFAULT_MAX_OVERHEAD,
                target=DEFAULT_TARGET,
            )
        )
    except (PlanError, ChannelConfigError) as error:
        return {**inputs, "recommended": None, "note": str(error)}
    if result.recommended is None:
        lowest = min(result.candidates, key=lambda c: c.residual_loss)
        note = (
            f"no code meets residual loss {DEFAULT_TARGET:g} within {DEFAULT_LATENCY_BUDGET_S * 1000:g} ms and "
            f"overhead {DEFAULT_MAX_OVERHEAD:g}; the lowest is {lowest.residual_loss:.3g} at k={lowest.k} m={lowest.m}"
        )
        return {**inputs, "recommended": None, "note": note}
    return {**inputs, "recommended": result.recommended.as_dict(), "note": None}


class StatusSource:
    """Builds ``/status.json`` from a daemon's registry.

    With ``background`` the plan (15–80 ms of CPU) is computed in a short-lived worker thread
    while the previous one is shown: the daemon's event loop, which answers this request, is not
    held up for it.  The worker reads only its three numbers and hands back a new dict under the
    lock; it touches no daemon state.  Without (tests), the plan is computed in the call."""

    def __init__(
        self,
        registry: CollectorRegistry,
        clock: Callable[[], float] = time.monotonic,
        planner: Callable[[float, float, float], dict] = recommend,
        *,
        background: bool = False,
    ):
        self.registry = registry
        self.clock = clock
        self.planner = planner
        self.background = background
        self._planning = False  # a worker is computing a plan
        self.started = clock()
        self._lock = threading.Lock()
        self._window: deque[tuple[float, float]] = deque(maxlen=MAX_WINDOW_READS)  # (time, expected source datagrams)
        self._plan: dict | None = None
        self._plan_key: tuple | None = None
        self._plan_at = -math.inf

    def _rate(self, now: float, expected: float) -> float | None:
        """Datagrams per second the peer's sender sees: over the window, else since start."""
        window = self._window
        window.append((now, expected))
        while len(window) > 2 and now - window[1][0] >= RATE_WINDOW_S:
            window.popleft()
        first_time, first_expected = window[0]
        if now - first_time >= MIN_RATE_SPAN_S:
            return (expected - first_expected) / (now - first_time)
        uptime = now - self.started
        return expected / uptime if uptime >= MIN_RATE_SPAN_S else None

    def _recommendation(self, now: float, samples: dict[str, float], rate: float | None) -> dict:
        loss, burst = samples.get(LOSS_GAUGE), samples.get(BURST_GAUGE)
        if loss is None or not math.isfinite(loss):
            return {"recommended": None, "note": "no link estimate yet: no block has arrived from the peer"}
        if not rate:
            return {"recommended": None, "note": "no datagram rate yet: wait a few seconds of traffic"}
        if burst is None or not math.isfinite(burst):
            burst = 1.0  # loss measured but no burst yet: only with nothing lost, where any burst fits
        key = (round_significant(loss), round_significant(burst), round_significant(rate))
        due = self._plan_key is None or (key != self._plan_key and now - self._plan_at >= PLAN_MIN_INTERVAL_S)
        if due and not self._planning:
            self._plan_key, self._plan_at = key, now
            if self.background:
                self._planning = True
                threading.Thread(target=self._plan_in_worker, args=(key,), name="fecproxy-plan", daemon=True).start()
            else:
                self._plan = self._computed_plan(key)
        if self._plan is None:
            return {"recommended": None, "note": "computing what fecproxy plan recommends…"}
        return {**self._plan, "computed_s_ago": now - self._plan_at}

    def _computed_plan(self, key: tuple[float, float, float]) -> dict:
        try:
            return self.planner(*key)
        except Exception as error:  # a planner bug costs the recommendation, never the page
            log.error("status_plan_failed", exc_info=True)
            return {"recommended": None, "note": f"the planner failed: {type(error).__name__}: {error}"}

    def _plan_in_worker(self, key: tuple[float, float, float]) -> None:
        plan = self._computed_plan(key)
        with self._lock:
            self._plan, self._planning = plan, False

    def document(self) -> dict:
        samples, info = read_samples(self.registry)
        with self._lock:
            now = self.clock()
            rate = self._rate(now, expected_source(samples))
            recommendation = self._recommendation(now, samples, rate)
        return {
            "uptime_s": now - self.started,
            "refresh_s": REFRESH_S,
            "info": info,
            "samples": samples,
            "source_rate": rate,
            "plan": recommendation,
        }


def _json_safe(value):
    """JSON has no NaN or infinity (a histogram's +Inf bucket bound is in a key, not a value)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {key: _json_safe(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_json_safe(item) for item in value]
    return value


def history_query(query: str) -> tuple[bool, int | None]:
    """``/status.json``'s query: ``history`` (any value) asks for the sampled rows and every kept
    event; ``events_since=N`` for the events after the N-th only (what a poller has not seen)."""
    params = parse_qs(query, keep_blank_values=True)
    rows = "history" in params
    since: int | None = 0 if rows else None
    for text in params.get("events_since", []):
        try:
            since = max(0, int(text))
        except ValueError:
            since = 0
    return rows, since


def status_app(
    registry: CollectorRegistry,
    other: Callable,
    history: History | None = None,
    facts: Callable[[], dict] | None = None,
) -> Callable:
    """WSGI app: ``/`` the page, ``/status.json`` its data (with ``history``: the daemon's recent
    samples and events on request, see :func:`history_query`), anything else ``other`` (/metrics).

    ``facts``: what the daemon knows that is no metric (a peer address must never be a label),
    e.g. the peer address it sends to and whether it was learned; under ``"daemon"`` in the JSON.
    It is called in the event loop that serves the request, so it reads the daemon's state safely."""
    source = StatusSource(registry, background=True)

    def app(environ: dict, start_response: Callable) -> Iterable[bytes]:
        path = environ.get("PATH_INFO", "/")
        if path not in ("/", "/index.html", "/status.json"):
            return other(environ, start_response)
        if environ.get("REQUEST_METHOD", "GET") not in ("GET", "HEAD"):
            start_response("405 Method Not Allowed", [("Allow", "GET, HEAD"), ("Content-Type", "text/plain")])
            return [b"GET or HEAD only\n"]
        if path == "/status.json":
            document = source.document()
            if facts is not None:
                document["daemon"] = facts()
            if history is not None:
                rows, since = history_query(environ.get("QUERY_STRING", ""))
                document["history"] = history.document(samples=rows, events_since=since)
                document["uptime_s"] = history.uptime()  # one time base for the live read and the rows
            body = json.dumps(_json_safe(document), allow_nan=False).encode()
            headers = [("Content-Type", "application/json"), ("Cache-Control", "no-store")]
        else:
            try:
                page = status_page.load()  # read once, at the first request: /metrics never depends on it
            except (OSError, RuntimeError) as error:
                start_response("500 Internal Server Error", [("Content-Type", "text/plain; charset=utf-8")])
                return [f"status page files missing or damaged in this installation: {error}\n".encode()]
            body = page.html.encode()
            headers = [
                ("Content-Type", "text/html; charset=utf-8"),
                ("Cache-Control", "no-store"),
                ("Content-Security-Policy", page.content_security_policy),
                ("X-Content-Type-Options", "nosniff"),
                ("Referrer-Policy", "no-referrer"),
            ]
        start_response("200 OK", headers + [("Content-Length", str(len(body)))])
        return [] if environ.get("REQUEST_METHOD") == "HEAD" else [body]

    return app
