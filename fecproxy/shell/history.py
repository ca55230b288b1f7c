"""The daemon's recent past, for an operator who arrives after the fact.

A laptop plugged in at the mast after an outage must still see the outage: the daemon keeps a
ring of one sample a second for 15 minutes (the counters and gauges the status page charts) and
the last 200 events, and ``/status.json?history=1`` hands them out (the status page draws them
as soon as it opens; ``fecproxy watch --events`` prints the events).

Events are recorded through the one function every event already goes through:
:func:`fecproxy.shell.logs.log_event`.  Anything logged at INFO or above from a daemon's tasks
lands in that daemon's history (except the periodic ``stats`` line), whatever the configured log
level; to record a new kind of event, log it.  The daemon installs its history as the current
event sink (a context variable, inherited by the tasks it starts, so two daemons in one process
keep their own).  The history also notes when the peer falls silent and when it is heard again
(``peer_silent``, ``peer_heard``), from the received-packet counter it samples anyway.

Everything here runs in the daemon's trio thread (the sampler is a task beside the metrics
server), so nothing is shared across threads.  Memory is bounded: :data:`MAX_SAMPLES` rows of
at most :data:`MAX_SERIES` doubles, :data:`MAX_EVENTS` events of at most :data:`MAX_EVENT_FIELDS`
fields of at most :data:`MAX_FIELD_CHARS` characters (README's bounds table).
"""

from __future__ import annotations

import logging
import math
import time
from array import array
from collections import deque
from collections.abc import Callable, Iterable, Mapping

import trio

from fecproxy.shell.logs import log_event

#: One sample a second, the status page's refresh: fine enough to see a burst of loss.
HISTORY_INTERVAL_S = 1.0
#: 15 minutes: long enough for someone called to the site after an incident to still see it,
#: short enough to stay small (see the module docstring) (common practice, no source).
HISTORY_SPAN_S = 15 * 60.0
#: The last 200 events: several of every kind an incident produces (auth failures, reloads,
#: peer and session changes, adaptations, silences) are logged rate-limited, so 200 cover hours.
MAX_EVENTS = 200
#: Per event, fields beyond these are cut (our events have at most a dozen) and long values
#: (an error text) shortened: a forged packet cannot make an event large.
MAX_EVENT_FIELDS = 16
MAX_FIELD_CHARS = 240
#: Periodic lines are not events: the samples hold their figures.
NOT_EVENTS = frozenset({"stats"})
#: The families sampled: those the status page charts, and the received packets that tell a
#: silent peer.  A fixed set of series (every label value of these families is a small fixed set).
HISTORY_FAMILIES = frozenset(
    {
        "fecproxy_source_packets_sent_total",
        "fecproxy_repair_packets_sent_total",
        "fecproxy_source_bytes_sent_total",
        "fecproxy_repair_bytes_sent_total",
        "fecproxy_link_packets_received_total",
        "fecproxy_source_packets_lost_total",
        "fecproxy_datagrams_recovered_total",
        "fecproxy_datagrams_unrecovered_total",
        "fecproxy_datagrams_delivered_total",
        "fecproxy_packets_dropped_total",
        "fecproxy_recovery_delay_seconds_bucket",
        "fecproxy_flows",
        "fecproxy_code_source_symbols",
        "fecproxy_code_repair_symbols",
        "fecproxy_link_loss_ratio",
    }
)
#: A bound on the series, should a family grow labels: 64 doubles a row.
MAX_SERIES = 64
#: The peer counts as silent after this long without a packet from it, and at least this many of
#: its usual gaps between packets (a telemetry link that sends every 10 s is not silent after 5):
#: common practice, no source.
PEER_SILENT_MIN_S = 5.0
PEER_SILENT_GAPS = 10.0
#: Samples in which the peer's packets rose before its silence is judged: its rhythm is unknown before.
MIN_RISES = 3
#: What proves the peer alive: its data packets, and its loss reports, which keep coming while
#: the applications are idle (an idle application must not read as a dead peer).
RECEIVED = frozenset({"fecproxy_link_packets_received_total", "fecproxy_reports_received_total"})
PEER_EVENTS = frozenset({"peer_silent", "peer_heard"})

log = logging.getLogger("fecproxy.shell.daemon")


def max_samples(span_s: float = HISTORY_SPAN_S, interval_s: float = HISTORY_INTERVAL_S) -> int:
    return int(math.ceil(span_s / interval_s)) + 1


MAX_SAMPLES = max_samples()


def _field(value: object) -> object:
    if isinstance(value, bool) or value is None:
        return value
    if isinstance(value, (int, float)):
        return value if math.isfinite(value) else None
    text = str(value)
    return text if len(text) <= MAX_FIELD_CHARS else text[: MAX_FIELD_CHARS - 1] + "…"


def _family(key: str) -> str:
    return key.split("{", 1)[0]


class History:
    """Samples and events of one daemon; ``clock`` is monotonic seconds, ``wall`` Unix time."""

    def __init__(
        self,
        *,
        interval_s: float = HISTORY_INTERVAL_S,
        span_s: float = HISTORY_SPAN_S,
        max_events: int = MAX_EVENTS,
        clock: Callable[[], float] = time.monotonic,
        wall: Callable[[], float] = time.time,
    ):
        self.interval_s, self.span_s = interval_s, span_s
        self.clock, self.wall = clock, wall
        self.started = clock()
        self.started_wall = wall()
        self.series: tuple[str, ...] | None = None
        self._rows: deque[tuple[float, array]] = deque(maxlen=max_samples(span_s, interval_s))
        self._events: deque[dict] = deque(maxlen=max_events)
        self.recorded = 0  # events recorded so far: the sequence number of the last one
        self._received: float | None = None
        self._heard_at: float | None = None  # uptime of the last sample whose received count rose
        self._gaps: deque[tuple[float, float]] = deque(maxlen=60)  # (uptime, received) of recent samples
        self._silent_since: float | None = None
        #: False once the daemon itself logs peer_silent/peer_heard (protocol.peer_view, where the
        #: shell wires it): then its own judgement is the one kept, not a second one from here.
        self.watch_peer = True
        self._noting = False  # True while this history logs its own peer event

    def uptime(self) -> float:
        return self.clock() - self.started

    # ------------------------------------------------------------------ events
    def record(self, level: int, event: str, fields: Mapping[str, object]) -> None:
        """Keep one event (the event sink :func:`fecproxy.shell.logs.log_event` calls)."""
        if level < logging.INFO or event in NOT_EVENTS:
            return
        if event in PEER_EVENTS and not self._noting:
            self.watch_peer = False
        self.recorded += 1
        now = self.wall()
        kept = dict(list(fields.items())[:MAX_EVENT_FIELDS])
        self._events.append(
            {
                "seq": self.recorded,
                "t": round(self.uptime(), 3),
                "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(now)) + f".{int(now % 1 * 1000):03d}Z",
                "level": logging.getLevelName(level).lower(),
                "event": event,
                "fields": {str(key): _field(value) for key, value in kept.items()},
            }
        )

    def events(self, since: int = 0) -> list[dict]:
        """The kept events with a sequence number above ``since``, oldest first."""
        return [event for event in self._events if event["seq"] > since]

    # ------------------------------------------------------------------ samples
    def sample(self, values: Mapping[str, float]) -> None:
        """Keep one row of the sampled series (keys as on /metrics, the families above)."""
        now = self.uptime()
        if self.series is None:
            self.series = tuple(sorted(key for key in values if _family(key) in HISTORY_FAMILIES))[:MAX_SERIES]
        row = array("d", (values.get(key, math.nan) for key in self.series))
        self._rows.append((now, row))
        self._watch_peer(now, sum(value for key, value in values.items() if _family(key) in RECEIVED))

    def rows(self) -> list[list[float | None]]:
        """Every kept row as [uptime, value, ...] in the order of :attr:`series` (NaN as None)."""
        return [[round(t, 3), *(value if math.isfinite(value) else None for value in row)] for t, row in self._rows]

    def _note(self, level: int, event: str, **fields: object) -> None:
        self._noting = True
        try:
            log_event(log, level, event, **fields)
        finally:
            self._noting = False

    def _watch_peer(self, now: float, received: float) -> None:
        if not self.watch_peer:
            return
        previous, self._received = self._received, received
        if previous is None or received < previous:
            return  # the first sample, or a restarted count
        if received > previous:
            if self._silent_since is not None:
                self._note(logging.INFO, "peer_heard", silent_s=round(now - self._silent_since, 1))
                self._silent_since = None
            self._heard_at = now
            self._gaps.append((now, received))
            return
        if self._heard_at is None or self._silent_since is not None:
            return
        quiet, threshold = now - self._heard_at, self._silence_threshold()
        if threshold is not None and quiet >= threshold:
            self._silent_since = self._heard_at
            self._note(logging.WARNING, "peer_silent", quiet_s=round(quiet, 1), detail="no packet from the peer")

    def _silence_threshold(self) -> float | None:
        """PEER_SILENT_MIN_S, or PEER_SILENT_GAPS of the peer's usual gaps when it sends slowly;
        None until :data:`MIN_RISES` samples with traffic have shown its rhythm."""
        if len(self._gaps) < MIN_RISES:
            return None
        (first_t, first_n), (last_t, last_n) = self._gaps[0], self._gaps[-1]
        return max(PEER_SILENT_MIN_S, PEER_SILENT_GAPS * (last_t - first_t) / (last_n - first_n))

    # ------------------------------------------------------------------ the document
    def document(self, *, samples: bool, events_since: int | None) -> dict:
        """The ``history`` member of /status.json: always the shape and the event count; the rows
        when ``samples``; the events above ``events_since`` when it is given."""
        doc: dict = {
            "interval_s": self.interval_s,
            "span_s": self.span_s,
            "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(self.started_wall)),
            "events_recorded": self.recorded,
        }
        if samples:
            doc["series"] = list(self.series or ())
            doc["samples"] = self.rows()
        if events_since is not None:
            doc["events"] = self.events(events_since)
        return doc


async def keep_history(history: History, read: Callable[[], Iterable[tuple[str, float]]]) -> None:
    """Sample ``read()`` (key, value pairs as on /metrics) every interval, forever."""
    deadline = trio.current_time()
    while True:
        history.sample(dict(read()))
        deadline = max(deadline + history.interval_s, trio.current_time())
        await trio.sleep_until(deadline)
