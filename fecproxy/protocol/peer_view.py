"""The far end, seen from this side, sans-IO: is the peer still there, and what does it see?

Two things an operator at the sending end needs and cannot see from its own counters:

* **Silence.** Anything valid from the peer (a loss report, a reply, a key check) proves the peer
  and the return path are up.  With nothing heard for ``silent_after`` seconds the view turns
  *silent* once (a ``PeerSilent`` event: the shell logs ``peer_silent``); the next valid packet
  turns it back (``PeerHeard``: ``peer_heard``).  The peer reports once per report interval, so
  the shell sets ``silent_after`` to :data:`SILENT_AFTER_INTERVALS` report intervals: two reports
  missing in a row, which one lost packet never causes.
* **The peer's loss on the direction this side sends.** Loss reports carry cumulative counters;
  the view keeps the differences of the last few accepted reports, so the gauges show the loss
  before recovery (link) and after (residual) over at least :data:`MIN_SOURCE_SAMPLES` datagrams,
  not over a single second's handful.

A peer never heard from is neither silent nor heard: ``seconds_since_heard`` is NaN until then.
Silence is declared only once the peer has sent a loss report: a peer reports only on traffic it
decodes, so a side that sends nothing (or whose peer does not report) expects nothing and an idle
application never reads as a dead peer.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

from fecproxy.protocol.loss_report import LossReport

#: Report intervals without anything from the peer before it is called silent.  2.5: two reports
#: missed in a row (a single lost report never trips it), and the alarm comes within 3 intervals
#: of the peer's last word (the issue's bound).  Common practice, no source.
SILENT_AFTER_INTERVALS = 2.5
#: The silence threshold when the peer sends no reports (reports.interval_ms: 0): replies alone
#: prove it alive, so only a long quiet means something.  30 s, common practice, no source.
SILENT_AFTER_WITHOUT_REPORTS_S = 30.0
#: Source datagrams the loss ratios are taken over (the newest report differences summed until
#: they reach it): 1 % loss then rests on ≥ 2 losses on average.  Common practice, no source.
MIN_SOURCE_SAMPLES = 200
#: Report sequence numbers are 32 bits (fecproxy.protocol.loss_report) and wrap.
_SEQUENCE_MODULUS = 1 << 32
#: Report differences kept; at one report a second, a minute of history.
HISTORY_REPORTS = 60


@dataclass(frozen=True)
class PeerSilent:
    at: float
    last_heard_at: float


@dataclass(frozen=True)
class PeerHeard:
    at: float
    silent_for: float  # seconds since it was last heard before this packet


PeerEvent = PeerSilent | PeerHeard


class PeerView:
    """Feed :meth:`heard` with every valid packet from the peer and :meth:`on_report` with its loss
    reports; call :meth:`on_timer` at :meth:`next_deadline`."""

    def __init__(self, silent_after: float) -> None:
        if not (math.isfinite(silent_after) and silent_after > 0):
            raise ValueError(f"silent_after must be > 0 seconds, got {silent_after!r}")
        self.silent_after = silent_after
        self.silent = False
        self.last_heard_at: float | None = None
        self.reporting = False  # a loss report came: from now on silence means something
        self._last: LossReport | None = None
        self._history: deque[tuple[int, int, int]] = deque(maxlen=HISTORY_REPORTS)  # (expected, lost, unrecovered)

    # -- silence ---------------------------------------------------------------------------------

    def heard(self, now: float) -> list[PeerEvent]:
        previous = self.last_heard_at
        self.last_heard_at = now if previous is None else max(previous, now)
        if self.silent:
            self.silent = False
            return [PeerHeard(at=now, silent_for=now - (previous if previous is not None else now))]
        return []

    def next_deadline(self) -> float | None:
        if self.silent or self.last_heard_at is None or not self.reporting:
            return None
        return self.last_heard_at + self.silent_after

    def on_timer(self, now: float) -> list[PeerEvent]:
        deadline = self.next_deadline()
        if deadline is None or now < deadline or self.last_heard_at is None:
            return []
        self.silent = True
        return [PeerSilent(at=now, last_heard_at=self.last_heard_at)]

    def seconds_since_heard(self, now: float) -> float:
        """NaN until the peer was heard once."""
        return math.nan if self.last_heard_at is None else max(0.0, now - self.last_heard_at)

    # -- the peer's loss -------------------------------------------------------------------------

    def on_report(self, report: LossReport) -> None:
        """A loss report from the peer (already checked and not a replay); counters are cumulative
        within the report's epoch, so a lost report loses nothing."""
        self.reporting = True
        last = self._last
        if last is not None and last.epoch == report.epoch:
            if not 0 < (report.sequence - last.sequence) % _SEQUENCE_MODULUS < _SEQUENCE_MODULUS // 2:
                return  # a duplicate or an older report
            lost = report.source_lost - last.source_lost
            unrecovered = report.unrecovered - last.unrecovered
            expected = report.source_expected - last.source_expected
            if 0 <= lost <= expected and 0 <= unrecovered <= expected:
                self._history.append((expected, lost, unrecovered))
            else:
                self._history.clear()
        else:
            self._history.clear()  # the peer (re)started reporting: a new baseline
        self._last = report

    def peer_loss(self) -> tuple[float, float]:
        """(loss before recovery, residual loss after) the peer measures on what this side sends;
        NaN while fewer than MIN_SOURCE_SAMPLES datagrams are counted in the kept reports."""
        expected = lost = unrecovered = 0
        for delta_expected, delta_lost, delta_unrecovered in reversed(self._history):
            expected += delta_expected
            lost += delta_lost
            unrecovered += delta_unrecovered
            if expected >= MIN_SOURCE_SAMPLES:
                break
        if expected < MIN_SOURCE_SAMPLES:
            return math.nan, math.nan
        return lost / expected, unrecovered / expected


def silent_after_for(report_interval_s: float) -> float:
    """The silence threshold for a peer that reports every ``report_interval_s`` (0 = never)."""
    if report_interval_s <= 0:
        return SILENT_AFTER_WITHOUT_REPORTS_S
    return SILENT_AFTER_INTERVALS * report_interval_s


__all__ = [
    "HISTORY_REPORTS",
    "MIN_SOURCE_SAMPLES",
    "SILENT_AFTER_INTERVALS",
    "SILENT_AFTER_WITHOUT_REPORTS_S",
    "PeerEvent",
    "PeerHeard",
    "PeerSilent",
    "PeerView",
    "silent_after_for",
]
