"""Loss reports, sans-IO: each daemon reports on the direction it decodes, and adapts the
direction it encodes from its peer's reports (when ``fec.adapt`` is set).

* :class:`LossReporter` builds a :class:`~fecproxy.protocol.loss_report.LossReport` every
  ``reports.interval_ms`` from the decoder's counters (before and after recovery, RFC 6363 §6),
  its own windowed loss estimate and the decoder's highest block number.
* :class:`Adapter` feeds the peer's reports to a
  :class:`~fecproxy.linkmodel.adaptation.RedundancyController` with the encoder's own traffic
  profile (rate, mean and longest datagram) measured between two reports.

:class:`Feedback` holds the two for one daemon and the link-loss estimates fed from the decoder's
block reports.  Everything is ``(input, now)`` in and decisions out: a report packet to send
(:class:`ReportDue`), a new m (the controller's :class:`~fecproxy.linkmodel.adaptation.Decision`,
already applied to the encoder), the return path's state (ReportsStale / ReportsResumed), a
control body that failed parsing (a counted ``Dropped``).  No clock, socket or log here: the shell
fires the timer at ``next_deadline()``, sends the packets and logs the events.
"""

from __future__ import annotations

import dataclasses
import secrets
from dataclasses import dataclass, field

from fecproxy.linkmodel.adaptation import (
    AdaptPolicy,
    Decision,
    Event,
    RedundancyController,
    ReportsResumed,
    ReportsStale,
    SourceProfile,
)
from fecproxy.linkmodel.estimator import LossEstimate, LossEstimator
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import BlockReport, ControlReceived, Dropped
from fecproxy.protocol.loss_report import KEY_CHECK_BODY, LossReport, encode_report, parse_report
from fecproxy.protocol.peer_view import PeerHeard, PeerSilent, PeerView, silent_after_for
from fecproxy.protocol.sliding_encoder import SlidingEncoder
from fecproxy.protocol.wire import PacketError

#: Source positions behind the loss and burst estimate a report carries: about one report
#: interval of a 1000 datagram/s flow, so the estimate follows a fade within an interval or two;
#: ten times the adaptation's MIN_LOSS_SAMPLES, so a sparse flow's estimate still counts.  The
#: sender takes the loss itself from the counters' differences; the burst comes from here.
#: Common practice, no source.
REPORT_ESTIMATE_WINDOW = 1000
#: Why a well-formed report led to no decision: the labels of ``fecproxy_reports_ignored_total``.
#: ``other_session`` is a report whose header session is not the peer session our decoder follows
#: (sent by a run of the peer before it restarted, or forged); the others are the controller's
#: (adaptation.IGNORE_REASONS).
OTHER_SESSION = "other_session"
#: The peer's report interval assumed until its first report says its own (config default, 1 s).
DEFAULT_REPORT_INTERVAL_S = 1.0
#: Source packets the link-loss estimate (the metrics' and the status page's) looks back over:
#: long enough to see several bursts at a few percent loss, short enough to follow a changing
#: link within seconds at telemetry rates (common practice, no source).
LOSS_ESTIMATE_WINDOW = 10_000


@dataclass(frozen=True, slots=True)
class ReportDue:
    """A loss report to send to the peer now: ``packet`` is the whole control packet."""

    packet: bytes
    report: LossReport


#: What Feedback returns: a report to send, the controller's events, a control body refused.
FeedbackEvent = ReportDue | Decision | ReportsStale | ReportsResumed | Dropped | PeerSilent | PeerHeard


@dataclass
class ReportStats:
    """What the metrics export about reports and adaptation (plain ints, read at scrape time)."""

    sent: int = 0
    received: int = 0  # well-formed reports on our encoder's session
    ignored: dict[str, int] = field(default_factory=dict)  # by reason, OTHER_SESSION + the controller's
    dropped: dict[str, int] = field(default_factory=dict)  # control bodies that failed parsing, by reason


class LossReporter:
    """The reporting side of the direction this daemon decodes."""

    def __init__(self, interval_ms: int, now: float) -> None:
        self.interval_ms = interval_ms
        self._interval = interval_ms / 1000
        self.epoch = secrets.randbits(32)  # a restart of ours is a new baseline for the peer
        self.sequence = 0
        self.estimator = LossEstimator(window=REPORT_ESTIMATE_WINDOW)
        self._due = now + self._interval

    def next_deadline(self) -> float:
        return self._due

    def on_timer(self, now: float, decoder: BlockDecoder) -> LossReport | None:
        """The report due at ``now`` (None when none is due, or no sender session is known yet)."""
        if now < self._due:
            return None
        self._due += self._interval
        if self._due <= now:  # the loop was held up: no catching up with a burst of reports
            self._due = now + self._interval
        if decoder.session is None:
            return None
        self.sequence = (self.sequence + 1) & 0xFFFFFFFF
        stats = decoder.stats
        estimate = self.estimator.estimate()
        has_estimate = estimate.samples > 0
        burst = estimate.mean_burst if estimate.lost else 0.0
        return LossReport(
            epoch=self.epoch,
            sequence=self.sequence,
            interval_ms=self.interval_ms,
            source_received=stats.source_received,
            repair_received=stats.repair_received,
            source_lost=stats.lost,
            unrecovered=stats.unrecovered,
            loss_estimate=estimate.average_loss if has_estimate else None,
            mean_burst=burst if has_estimate else None,
            estimate_samples=estimate.samples,
            highest_sbn=decoder.highest_sbn,
        )


class Adapter:
    """The adapting side of the direction this daemon encodes: the peer's reports in, the m the
    encoder should use out (``repair``), with the controller's events for the log and metrics."""

    def __init__(
        self, policy: AdaptPolicy, initial_repair: int, now: float, encoder: BlockEncoder | SlidingEncoder
    ) -> None:
        self.controller = RedundancyController(policy, initial_repair, now)
        self._encoder = encoder
        self._mark = (now, encoder.stats.source_packets, encoder.stats.datagram_bytes)
        self._longest = 0

    @property
    def repair(self) -> int:
        return self.controller.repair

    @property
    def depth(self) -> int:
        return self.controller.depth

    @property
    def stale(self) -> bool:
        return self.controller.reports_stale

    def settings(self, base: EncoderSettings) -> EncoderSettings:
        """``base`` with the controller's m."""
        return dataclasses.replace(base, repair=self.controller.repair)

    def source_profile(self, now: float) -> SourceProfile | None:
        """The encoder's traffic since the previous call: rate, mean and longest datagram.
        None while nothing was sent (the controller keeps the profile it had)."""
        stats = self._encoder.stats
        since, packets, datagram_bytes = self._mark
        self._longest = max(self._longest, self._encoder.take_longest_datagram())
        sent = stats.source_packets - packets
        if sent <= 0 or now <= since:
            return None
        self._mark = (now, stats.source_packets, stats.datagram_bytes)
        longest, self._longest = self._longest, 0
        return SourceProfile(
            rate=sent / (now - since),
            mean_datagram_bytes=(stats.datagram_bytes - datagram_bytes) / sent,
            longest_datagram_bytes=longest or None,
        )

    def on_report(self, report: LossReport, now: float) -> list[Event]:
        return self.controller.on_report(report, now, source=self.source_profile(now))

    def next_deadline(self) -> float | None:
        return self.controller.next_deadline()

    def on_timer(self, now: float) -> list[Event]:
        return self.controller.on_timer(now)


class Feedback:
    """Everything about loss reports one daemon does: the reporter of the direction it decodes,
    the adapter of the one it encodes, the link-loss estimates, their counts and deadlines.
    Encoder settings changes go through ``encoder.update`` (from the next block on)."""

    def __init__(self, encoder: BlockEncoder | SlidingEncoder, decoder: BlockDecoder) -> None:
        self.encoder, self.decoder = encoder, decoder
        self.stats = ReportStats()
        self.reporter: LossReporter | None = None
        self.adapter: Adapter | None = None  # from the first datagram we send on (see _adapter)
        #: The link as the decoder's blocks show it, over LOSS_ESTIMATE_WINDOW source packets.
        self.estimator = LossEstimator(window=LOSS_ESTIMATE_WINDOW)
        self._policy: AdaptPolicy | None = None
        self._initial_repair = encoder.settings.repair
        self._base: EncoderSettings = encoder.settings
        self._past_decisions: dict[tuple[str, str], int] = {}  # of controllers a reload replaced
        self._past_ignored: dict[str, int] = {}
        #: The far end: silence (anything valid heard, fed by the shell) and the loss it reports.
        self.peer = PeerView(silent_after_for(DEFAULT_REPORT_INTERVAL_S))

    # -- configuration ---------------------------------------------------------------------------

    def configure(
        self, policy: AdaptPolicy | None, report_interval_ms: int | None, base: EncoderSettings, now: float
    ) -> None:
        """Apply a config (at start and on a reload): reports every ``report_interval_ms`` (None:
        off), adaptation by ``policy`` (None: m fixed).  A changed interval starts a new reporter,
        a changed policy a new controller from the m in use; then the encoder gets ``base`` with
        the adapted m."""
        if report_interval_ms is None:
            self.reporter = None
        elif self.reporter is None or self.reporter.interval_ms != report_interval_ms:
            self.reporter = LossReporter(report_interval_ms, now)
        old = self.adapter
        if old is not None and policy != old.controller.policy:
            for key, count in old.controller.stats.decisions.items():
                self._past_decisions[key] = self._past_decisions.get(key, 0) + count
            for reason, count in old.controller.stats.reports_ignored.items():
                self._past_ignored[reason] = self._past_ignored.get(reason, 0) + count
            self.adapter = None
        if self.adapter is None:
            previous = old.repair if old is not None else base.repair
            # The controller's own clamp (adaptation.RedundancyController), applied already now.
            self._initial_repair = (
                previous if policy is None else min(max(previous, policy.min_repair), policy.max_repair)
            )
        self._policy = policy
        self._base = base
        self.encoder.update(self._settings())

    def _settings(self) -> EncoderSettings:
        if self.adapter is not None:
            return self.adapter.settings(self._base)
        if self._policy is not None:
            return dataclasses.replace(self._base, repair=self._initial_repair)
        return self._base

    def _adapter(self, now: float) -> Adapter | None:
        """The controller, started once this daemon has sent a datagram: a side that sends
        nothing expects no report, so its return path is not called stale."""
        if self.adapter is None and self._policy is not None and self.encoder.stats.source_packets:
            self.adapter = Adapter(self._policy, self._initial_repair, now, self.encoder)
        return self.adapter

    # -- timers ----------------------------------------------------------------------------------

    def next_deadline(self) -> float | None:
        deadlines = []
        if self.reporter is not None:
            deadlines.append(self.reporter.next_deadline())
        if self.adapter is not None:
            deadline = self.adapter.next_deadline()
            if deadline is not None:
                deadlines.append(deadline)
        silence = self.peer.next_deadline()
        if silence is not None:
            deadlines.append(silence)
        return min(deadlines) if deadlines else None

    def on_timer(self, now: float) -> list[FeedbackEvent]:
        """The adapter's stale check, then a report if one is due (ReportDue: send its packet)."""
        events: list[FeedbackEvent] = list(self.peer.on_timer(now))
        adapter = self._adapter(now)
        if adapter is not None:
            events += self._applied(adapter.on_timer(now))
        if self.reporter is not None:
            report = self.reporter.on_timer(now, self.decoder)
            if report is not None:
                self.stats.sent += 1
                events.append(ReportDue(self.encoder.control(encode_report(report)), report))
        return events

    # -- what the decoder tells ------------------------------------------------------------------

    def on_block(self, report: BlockReport) -> None:
        """A finished block of the direction we decode: one segment of the loss estimates (one
        per block: repair positions sit between blocks on the link, so chaining blocks would bias
        the burst estimate, see linkmodel.estimator.LossEstimator)."""
        self.estimator.observe_block(report.arrived_mask, report.span)
        if self.reporter is not None:
            self.reporter.estimator.observe_block(report.arrived_mask, report.span)

    def on_control(self, event: ControlReceived, now: float) -> list[FeedbackEvent]:
        """A control packet from the peer: a loss report for the adaptation, or a key check."""
        if event.body == KEY_CHECK_BODY:
            return []  # the peer's key check verified: our keys agree (see loss_report)
        try:
            report = parse_report(event.body)
        except PacketError as error:
            self.stats.dropped[error.reason] = self.stats.dropped.get(error.reason, 0) + 1
            return [Dropped(error.reason, str(error))]
        followed = self.decoder.session
        if followed is not None and event.session != followed:
            # From a run of the peer we no longer decode (sent before it restarted), or forged.
            # A report about an earlier run of *ours* needs no check: our restart starts a new
            # controller, which takes counter differences from the first report it accepts, and
            # the link the report describes is the same link.
            self.stats.ignored[OTHER_SESSION] = self.stats.ignored.get(OTHER_SESSION, 0) + 1
            return []
        self.stats.received += 1
        self.peer.on_report(report)
        self.peer.silent_after = silent_after_for(report.interval_ms / 1000)  # the peer's own rhythm
        adapter = self._adapter(now)
        if adapter is None:
            return []
        return self._applied(adapter.on_report(report, now))

    def _applied(self, events: list[Event]) -> list[FeedbackEvent]:
        """The controller's events, a new m already applied to the encoder."""
        if any(isinstance(event, Decision) for event in events):
            self.encoder.update(self._settings())
        return list(events)

    # -- what the metrics read -------------------------------------------------------------------

    @property
    def adapting(self) -> bool:
        """fec.adapt is set (and reports are on)."""
        return self._policy is not None

    @property
    def repair(self) -> int:
        """m of the blocks being sent now."""
        return self.encoder.settings.repair

    @property
    def depth(self) -> int:
        return self.adapter.depth if self.adapter is not None else self.encoder.settings.interleave

    @property
    def stale(self) -> bool:
        return self.adapter is not None and self.adapter.stale

    def loss_estimate(self) -> LossEstimate:
        return self.estimator.estimate()

    def decisions(self) -> dict[tuple[str, str], int]:
        """Decisions by (direction, reason), this run's controllers summed."""
        totals = dict(self._past_decisions)
        if self.adapter is not None:
            for key, count in self.adapter.controller.stats.decisions.items():
                totals[key] = totals.get(key, 0) + count
        return totals

    def ignored(self) -> dict[str, int]:
        """Reports ignored by reason: OTHER_SESSION and the controllers' IGNORE_REASONS."""
        totals = dict(self.stats.ignored)
        sources = [self._past_ignored]
        if self.adapter is not None:
            sources.append(self.adapter.controller.stats.reports_ignored)
        for source in sources:
            for reason, count in source.items():
                totals[reason] = totals.get(reason, 0) + count
        return totals
