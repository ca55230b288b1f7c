"""Loss reports in the shell: each daemon reports on the direction it decodes, and adapts the
direction it encodes from its peer's reports (when ``fec.adapt`` is set).

* :class:`LossReporter` builds a :class:`~fecproxy.protocol.loss_report.LossReport` every
  ``reports.interval_ms`` from the decoder's counters (before and after recovery, RFC 6363 §6),
  its own windowed loss estimate and the decoder's highest block number.
* :class:`Adapter` feeds the peer's reports to a
  :class:`~fecproxy.linkmodel.adaptation.RedundancyController` with the encoder's own traffic
  profile (rate, mean and longest datagram) measured between two reports.

Both are sans-IO like the cores (``now`` in, reports, events and deadlines out).  :class:`Feedback`
holds the two for one daemon, applies decisions to its encoder and logs them; the daemon only
moves the bytes and fires the timer.  It exports its counts through the daemon to the metrics.
"""

from __future__ import annotations

import dataclasses
import logging
import secrets
from dataclasses import dataclass, field

from fecproxy.config import Config
from fecproxy.linkmodel.adaptation import (
    AdaptPolicy,
    Decision,
    Event,
    RedundancyController,
    ReportsResumed,
    ReportsStale,
    SourceProfile,
)
from fecproxy.linkmodel.estimator import LossEstimator
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import ControlReceived, Dropped
from fecproxy.protocol.loss_report import KEY_CHECK_BODY, LossReport, encode_report, parse_report
from fecproxy.protocol.wire import PacketError
from fecproxy.shell.logs import log_event

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


@dataclass
class ReportStats:
    """What the metrics export about reports and adaptation (plain ints, read at scrape time)."""

    sent: int = 0
    received: int = 0  # well-formed reports on our encoder's session
    ignored: dict[str, int] = field(default_factory=dict)  # by reason, OTHER_SESSION + the controller's


class LossReporter:
    """The reporting side of the direction this daemon decodes."""

    def __init__(self, interval_ms: int, now: float):
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


def adapt_policy(config: Config) -> AdaptPolicy | None:
    """The controller's policy from ``fec`` and ``fec.adapt``; None when m is fixed."""
    fec, adapt = config.fec, config.fec.adapt
    if adapt is None or not config.reports.enabled:
        return None
    return AdaptPolicy(
        block_size=fec.block_size,
        target_residual=adapt.target_residual,
        min_repair=min(adapt.min_repair, adapt.repair_ceiling(fec.block_size)),
        max_repair=adapt.repair_ceiling(fec.block_size),
        max_overhead=adapt.max_overhead,
        report_interval=config.reports.interval_ms / 1000,
        allow_repair_above_source=fec.allow_repair_above_source,
        short_block_repair=str(fec.short_block_repair),
        flush_interval=fec.flush_seconds,
        depths=(fec.interleave,),  # the sender's configured D: m is chosen for the layout it sends
    )


class Adapter:
    """The adapting side of the direction this daemon encodes: the peer's reports in, the m the
    encoder should use out (``repair``), with the controller's events for the log and metrics."""

    def __init__(self, policy: AdaptPolicy, initial_repair: int, now: float, encoder: BlockEncoder):
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
    """Everything about loss reports one daemon does, for the shell to wire in a few lines:
    the reporter of the direction it decodes, the adapter of the one it encodes, their counts,
    deadlines and log lines.  Encoder settings changes go through ``encoder.update`` (from the
    next block on)."""

    def __init__(self, encoder: BlockEncoder, decoder: BlockDecoder, log: logging.Logger):
        self.encoder, self.decoder, self.log = encoder, decoder, log
        self.stats = ReportStats()
        self.reporter: LossReporter | None = None
        self.adapter: Adapter | None = None  # from the first datagram we send on (see _adapter)
        self._policy: AdaptPolicy | None = None
        self._initial_repair = encoder.settings.repair
        self._base: EncoderSettings = encoder.settings
        self._past_decisions: dict[tuple[str, str], int] = {}  # of controllers a reload replaced
        self._past_ignored: dict[str, int] = {}

    # -- configuration ---------------------------------------------------------------------------

    def configure(self, config: Config, base: EncoderSettings, now: float) -> None:
        """Apply ``config`` (at start and on a reload): a changed interval starts a new reporter,
        a changed policy a new controller from the m in use; then the encoder gets ``base`` with
        the adapted m."""
        if not config.reports.enabled:
            self.reporter = None
        elif self.reporter is None or self.reporter.interval_ms != config.reports.interval_ms:
            self.reporter = LossReporter(config.reports.interval_ms, now)
        policy = adapt_policy(config)
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

    def deadlines(self) -> list[float]:
        out = []
        if self.reporter is not None:
            out.append(self.reporter.next_deadline())
        if self.adapter is not None:
            deadline = self.adapter.next_deadline()
            if deadline is not None:
                out.append(deadline)
        return out

    def on_timer(self, now: float) -> list[bytes]:
        """Packets to send to the peer now (a due report); the adapter's stale check."""
        adapter = self._adapter(now)
        if adapter is not None:
            self._apply(adapter.on_timer(now))
        if self.reporter is None:
            return []
        report = self.reporter.on_timer(now, self.decoder)
        if report is None:
            return []
        self.stats.sent += 1
        return [self.encoder.control(encode_report(report))]

    # -- reports from the peer -------------------------------------------------------------------

    def observe_block(self, arrived_mask: int, span: int) -> None:
        if self.reporter is not None:
            self.reporter.estimator.observe_block(arrived_mask, span)

    def on_control(self, event: ControlReceived, now: float) -> Dropped | None:
        """A control packet from the peer; a body that fails parsing is returned as a drop."""
        if event.body == KEY_CHECK_BODY:
            return None  # the peer's key check verified: our keys agree (see loss_report)
        try:
            report = parse_report(event.body)
        except PacketError as error:
            return Dropped(error.reason, str(error))
        followed = self.decoder.session
        if followed is not None and event.session != followed:
            # From a run of the peer we no longer decode (sent before it restarted), or forged.
            # A report about an earlier run of *ours* needs no check: our restart starts a new
            # controller, which takes counter differences from the first report it accepts, and
            # the link the report describes is the same link.
            self.stats.ignored[OTHER_SESSION] = self.stats.ignored.get(OTHER_SESSION, 0) + 1
            return None
        self.stats.received += 1
        adapter = self._adapter(now)
        if adapter is not None:
            self._apply(adapter.on_report(report, now))
        return None

    def _apply(self, events: list[Event]) -> None:
        log = self.log
        for event in events:
            if isinstance(event, Decision):
                self.encoder.update(self._settings())
                link, choice = event.link, event.choice
                log_event(
                    log,
                    logging.INFO,
                    "adapted",
                    direction=event.direction,
                    reason=event.reason,
                    m_from=event.previous.repair,
                    m=choice.repair,
                    depth=choice.depth,
                    k_effective=choice.k_effective,
                    loss=f"{link.loss:.4f}",
                    burst=f"{link.mean_burst:.2f}",
                    basis=link.basis,
                    samples=link.samples,
                    predicted_residual=f"{choice.residual_loss:.2e}",
                )
            elif isinstance(event, ReportsStale):
                log_event(
                    log,
                    logging.WARNING,
                    "loss_reports_stale",
                    holding_m=self.adapter.repair,
                    detail="no loss report from the peer for 5 intervals (return path down?): m is held",
                )
            elif isinstance(event, ReportsResumed):
                log_event(log, logging.INFO, "loss_reports_resumed", m=self.adapter.repair)

    # -- what the metrics read -------------------------------------------------------------------

    @property
    def adapting(self) -> bool:
        """fec.adapt is set (and reports are on)."""
        return self._policy is not None

    @property
    def depth(self) -> int:
        return self.adapter.depth if self.adapter is not None else self.encoder.settings.interleave

    @property
    def stale(self) -> bool:
        return self.adapter is not None and self.adapter.stale

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
