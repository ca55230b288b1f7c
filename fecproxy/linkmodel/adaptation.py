"""Adaptive redundancy: the sender's choice of m (and interleave depth D) from the receiver's reports.

Send as much FEC as the observed loss needs, no more (RFC 8854 §8; RFC 8627 §8 recommends adapting
the amount of FEC to loss rate and burst length).  Sans-IO: reports and ``now`` in, decisions and
a deadline out; the shell applies a decision with ``encoder.update(...)`` from the next block.

The rule, per accepted report:

1. **The reported link.**  Loss *before* recovery (RFC 6363 §6), from the differences of the
   report's cumulative counters since the last accepted report, pooled back over earlier reports
   until :data:`MIN_LOSS_SAMPLES` source datagrams are covered; if even the pool is smaller, the
   receiver's own online estimate when that has enough samples; otherwise no decision.  Mean
   burst from the receiver's estimate, never below the independent-loss value 1/(1 − P).
2. **What is allowed.**  m in [min_repair, max_repair] such that the block the sender really sends
   (k', m'; k' < k when the flush timer closes blocks short, m' by the encoder's own short-block
   rule) keeps m'/k' ≤ max_overhead *and* m'·(repair packet bytes) ≤ max_overhead·k'·(mean source
   packet bytes): RFC 6363 §8.2 caps the repair rate at the source rate in packets and in bytes,
   and max_overhead ≤ 1 unless the operator allowed more.  The caps win over min_repair.
3. **What is needed.**  The least allowed (m, D) whose exact residual loss (the planner's
   computation, :func:`fecproxy.linkmodel.planner.evaluate_repair_range`) is ≤ target_residual.
4. **Hysteresis.**  Raise at once when the current choice misses the target on the reported link
   (``target_missed``; ``target_unreachable`` when even the cap misses it, and the cap is taken).
   Lower only when a smaller choice meets target × :data:`LOWER_MARGIN` on
   :data:`LOWER_AFTER_REPORTS` consecutive reports, and then only to the largest of those smaller
   choices (``margin_regained``).  Lower at once when the caps shrink below the current choice
   (``cap``: e.g. the source rate or datagram sizes changed).
5. **Stale reports.**  No report for :data:`STALE_AFTER_INTERVALS` report intervals: the choice
   is held and ``reports_stale`` is set (an event for the shell's gauge and its one log line);
   the next report clears it.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.planner import MAX_BLOCK_PACKETS, effective_k, evaluate_repair_range
from fecproxy.protocol import wire
from fecproxy.protocol.loss_report import BURST_SCALE, LossReport
from fecproxy.protocol.repair_rule import SHORT_BLOCK_RULES, repair_count

#: Five report intervals without a report before the return path is called dead.  With
#: independent report loss q, five in a row are lost with probability q^5: at q = 10 % that is a
#: false alarm once per 10^5 intervals (28 hours at 1 s) instead of once per 10^3 with three.
#: A false alarm only flags a gauge (the choice is held either way), so a short timeout costs
#: little, but an alert on it should not cry wolf.  Common practice, no source, for the count.
STALE_AFTER_INTERVALS = 5
#: A smaller m must meet target × 0.5 — a factor-of-two margin on the predicted residual — before
#: it is taken, so that estimation noise around the threshold does not flip m back and forth.
#: Common practice, no source.
LOWER_MARGIN = 0.5
#: ... and do so on three consecutive reports: lowering is never urgent (the link is better than
#: the code assumes), raising always is; three agreeing reports make a chance dip unlikely.
#: Common practice, no source.
LOWER_AFTER_REPORTS = 3
#: A loss ratio from fewer than 100 source datagrams moves by ≥ 1 % per loss: as coarse as the
#: change (1 % to 10 %) the controller must tell apart.  Fewer: pool earlier reports, or wait.
MIN_LOSS_SAMPLES = 100
#: Reports kept for pooling counter differences when traffic is sparse; bounds memory and the
#: age of the oldest figure used (16 intervals).
REPORT_HISTORY = 16
#: The model of a link that loses (almost) everything: beyond this every code fails alike, and
#: the Gilbert form needs loss < 1.
MAX_MODEL_LOSS = 0.999
#: Bursts longer than any block (n ≤ 255, RFC 5510 §8.2) all wipe whole blocks out; the report's
#: saturated or infinite burst is modelled as this long.
MAX_MODEL_BURST = float(MAX_BLOCK_PACKETS)
#: A reported burst within half a step of the report's 8.8 fixed point (1/512 packet) of the
#: independent-loss value 1/(1 − P) is independent loss: rounding must not invent burstiness.
INDEPENDENT_BURST_TOLERANCE = 0.5 / BURST_SCALE
#: Relative slack when comparing to budgets (m/k = 0.25 meets 0.25 despite binary floating point).
_SLACK = 1e-9
#: With link.rate set, source and repair together may take this share of the air rate; the rest
#: is left for control packets (reports, key checks) and for the error of the rate estimate.
#: Common practice, no source.
AIR_SHARE_FOR_DATA = 0.95
#: IP + UDP bytes per packet counted against the air rate (IPv4, RFC 791 + RFC 768), as the pacer counts.
AIR_HEADER_BYTES = 28
#: 32-bit serial-number comparison of report sequence numbers (RFC 1982 style: half the space ahead).
_SEQUENCE_MODULUS = 1 << 32

UP, DOWN = "up", "down"
DIRECTIONS = (UP, DOWN)
#: Why m changed: the metric label set for decisions.
TARGET_MISSED = "target_missed"  # the current choice misses the target on the reported link
TARGET_UNREACHABLE = "target_unreachable"  # raised to the cap, and even that misses the target
MARGIN_REGAINED = "margin_regained"  # a smaller choice met the target with margin long enough
CAP = "cap"  # the caps (overhead, source rate in packets or bytes) shrank below the choice
DECISION_REASONS = (TARGET_MISSED, TARGET_UNREACHABLE, MARGIN_REGAINED, CAP)
#: Why a report gave no decision: the labels of ``AdaptStats.reports_ignored``.
REORDERED = "reordered"  # not newer than the last accepted report of its epoch
TOO_FEW_SAMPLES = "too_few_samples"  # neither counters nor estimate cover MIN_LOSS_SAMPLES
IGNORE_REASONS = (REORDERED, TOO_FEW_SAMPLES)


class AdaptError(ValueError):
    """A policy that cannot describe an adaptation."""


@dataclass(frozen=True)
class AdaptPolicy:
    """What the operator allows (config ``fec`` and ``fec.adapt``); validated once, trusted after."""

    block_size: int  # k, fixed
    target_residual: float
    min_repair: int
    max_repair: int
    max_overhead: float
    report_interval: float  # seconds: the period expected before the first report says its own
    allow_repair_above_source: bool = False
    depths: tuple[int, ...] = (1,)  # interleave depths the sender can apply; (1,) = none
    short_block_repair: str = SHORT_BLOCK_RULES[0]
    flush_interval: float | None = None  # seconds; None = blocks always fill (no short blocks)
    air_rate_bps: float | None = None  # link.rate: repair never beyond the headroom the source leaves

    def __post_init__(self) -> None:
        k = self.block_size
        if not (isinstance(k, int) and 1 <= k < MAX_BLOCK_PACKETS):
            raise AdaptError(f"block_size must be 1..{MAX_BLOCK_PACKETS - 1}, got {k!r}")
        if not 0.0 < self.target_residual < 1.0:
            raise AdaptError(f"target_residual must be in (0, 1), got {self.target_residual!r}")
        if not 0 <= self.min_repair <= self.max_repair:
            raise AdaptError(f"need 0 ≤ min_repair ≤ max_repair, got {self.min_repair}, {self.max_repair}")
        if k + self.max_repair > MAX_BLOCK_PACKETS:
            raise AdaptError(
                f"block_size + max_repair = {k + self.max_repair} exceeds {MAX_BLOCK_PACKETS} (RFC 5510 §8.2)"
            )
        ceiling = math.inf if self.allow_repair_above_source else 1.0
        if not 0.0 < self.max_overhead <= ceiling:
            raise AdaptError(
                f"max_overhead must be in (0, 1] (RFC 6363 §8.2: repair rate at most the source rate) "
                f"unless repair above the source is allowed, got {self.max_overhead!r}"
            )
        if not (math.isfinite(self.report_interval) and self.report_interval > 0):
            raise AdaptError(f"report_interval must be > 0 seconds, got {self.report_interval!r}")
        if not self.depths or any(not (isinstance(d, int) and d >= 1) for d in self.depths):
            raise AdaptError(f"depths must be integers ≥ 1, got {self.depths!r}")
        if self.short_block_repair not in SHORT_BLOCK_RULES:
            raise AdaptError(f"short_block_repair must be one of {SHORT_BLOCK_RULES}, got {self.short_block_repair!r}")
        if self.flush_interval is not None and not (math.isfinite(self.flush_interval) and self.flush_interval > 0):
            raise AdaptError(f"flush_interval must be > 0 seconds, got {self.flush_interval!r}")
        object.__setattr__(self, "depths", tuple(sorted(set(self.depths))))


@dataclass(frozen=True)
class SourceProfile:
    """The sender's own traffic, as its encoder counts it: the inputs of the rate caps."""

    rate: float | None = None  # datagrams per second; None = unknown (blocks assumed full)
    mean_datagram_bytes: float | None = None  # None = unknown (byte cap not applied)
    longest_datagram_bytes: int | None = None  # a block's longest datagram sizes its repair symbols

    @property
    def source_packet_bytes(self) -> float | None:
        if self.mean_datagram_bytes is None:
            return None
        return wire.SOURCE_HEADER_BYTES + self.mean_datagram_bytes

    @property
    def repair_packet_bytes(self) -> int | None:
        if self.longest_datagram_bytes is None:
            return None
        return wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + self.longest_datagram_bytes


@dataclass(frozen=True)
class LinkView:
    """The link as the last usable report showed it (loss before recovery)."""

    loss: float
    mean_burst: float
    samples: int
    basis: str  # "counters" (differences of cumulative counters) or "estimate" (the receiver's)

    def channel(self) -> GilbertElliott:
        loss = min(self.loss, MAX_MODEL_LOSS)
        if loss == 0.0:
            return GilbertElliott.no_loss()
        independent_burst = 1.0 / (1.0 - loss)
        burst = min(max(self.mean_burst, independent_burst), MAX_MODEL_BURST)
        if burst <= independent_burst + INDEPENDENT_BURST_TOLERANCE:
            return GilbertElliott.bernoulli(loss)
        return GilbertElliott.from_loss_burst(loss, burst)


@dataclass(frozen=True, order=True)
class Choice:
    """A code for the next blocks: m per full block of k, at depth D; figures on the reported link."""

    repair: int
    depth: int = 1
    k_effective: int = field(default=0, compare=False)
    m_effective: int = field(default=0, compare=False)
    residual_loss: float = field(default=math.nan, compare=False)  # the planner's exact prediction


@dataclass(frozen=True)
class Decision:
    """m (or D) changed; the shell applies ``choice`` and counts (direction, reason)."""

    at: float
    direction: str
    reason: str
    previous: Choice
    choice: Choice
    link: LinkView


@dataclass(frozen=True)
class ReportsStale:
    """No report for STALE_AFTER_INTERVALS intervals: the choice is held from now on."""

    at: float
    last_report_at: float | None


@dataclass(frozen=True)
class ReportsResumed:
    at: float


Event = Decision | ReportsStale | ReportsResumed


@dataclass
class AdaptStats:
    reports_received: int = 0
    reports_ignored: dict[str, int] = field(default_factory=dict)
    decisions: dict[tuple[str, str], int] = field(default_factory=dict)  # (direction, reason)


def _sequence_newer(a: int, b: int) -> bool:
    return 0 < (a - b) % _SEQUENCE_MODULUS < _SEQUENCE_MODULUS // 2


class RedundancyController:
    """One direction's adaptive choice of m (and D).  Feed ``on_report``; call ``on_timer`` at
    ``next_deadline``.  Not thread-safe."""

    def __init__(self, policy: AdaptPolicy, initial_repair: int, now: float, source: SourceProfile | None = None):
        self.policy = policy
        self.stats = AdaptStats()
        self.source = source or SourceProfile()
        repair = min(max(initial_repair, policy.min_repair), policy.max_repair)
        self._choice = Choice(repair, policy.depths[0])
        self.link: LinkView | None = None
        self.reports_stale = False
        self._started = now
        self._last_report_at: float | None = None
        self._interval = policy.report_interval
        self._last: LossReport | None = None  # last accepted report
        self._history: deque[tuple[int, int]] = deque(maxlen=REPORT_HISTORY)  # (expected, lost) deltas
        self._lower_streak = 0
        self._lower_to: Choice | None = None

    # -- state -----------------------------------------------------------------------------------

    @property
    def choice(self) -> Choice:
        return self._choice

    @property
    def repair(self) -> int:
        return self._choice.repair

    @property
    def depth(self) -> int:
        return self._choice.depth

    # -- timers ----------------------------------------------------------------------------------

    def next_deadline(self) -> float | None:
        if self.reports_stale:
            return None
        since = self._started if self._last_report_at is None else self._last_report_at
        return since + STALE_AFTER_INTERVALS * self._interval

    def on_timer(self, now: float) -> list[Event]:
        deadline = self.next_deadline()
        if deadline is None or now < deadline:
            return []
        self.reports_stale = True
        return [ReportsStale(at=now, last_report_at=self._last_report_at)]

    # -- reports ---------------------------------------------------------------------------------

    def on_report(self, report: LossReport, now: float, source: SourceProfile | None = None) -> list[Event]:
        """A parsed report from the receiver (its session already checked by the caller)."""
        events: list[Event] = []
        self.stats.reports_received += 1
        self._last_report_at = now
        self._interval = report.interval_ms / 1000
        if self.reports_stale:
            self.reports_stale = False
            events.append(ReportsResumed(at=now))
        if source is not None:
            self.source = source
        if not self._accept(report):
            self._ignore(REORDERED)
            return events
        link = self._link_view(report)
        if link is None:
            self._ignore(TOO_FEW_SAMPLES)
            return events
        self.link = link
        decision = self._decide(link, now)
        if decision is not None:
            key = (decision.direction, decision.reason)
            self.stats.decisions[key] = self.stats.decisions.get(key, 0) + 1
            events.append(decision)
        return events

    def _ignore(self, reason: str) -> None:
        self.stats.reports_ignored[reason] = self.stats.reports_ignored.get(reason, 0) + 1

    def _accept(self, report: LossReport) -> bool:
        """Take a newer report's counter differences into the history; False for an old one."""
        last = self._last
        if last is not None and last.epoch == report.epoch:
            if not _sequence_newer(report.sequence, last.sequence):
                return False
            expected = report.source_expected - last.source_expected
            lost = report.source_lost - last.source_lost
            if expected >= 0 and 0 <= lost <= expected:
                self._history.append((expected, lost))
            else:  # totals went backwards within an epoch: start again from this report
                self._history.clear()
        else:  # the receiver (re)started reporting: its totals are a new baseline, no difference yet
            self._history.clear()
        self._last = report
        return True

    def _link_view(self, report: LossReport) -> LinkView | None:
        expected = lost = 0
        for delta_expected, delta_lost in reversed(self._history):
            expected += delta_expected
            lost += delta_lost
            if expected >= MIN_LOSS_SAMPLES:
                break
        burst = report.mean_burst if report.mean_burst is not None else 0.0
        if expected >= MIN_LOSS_SAMPLES:
            return LinkView(lost / expected, burst, expected, "counters")
        if report.loss_estimate is not None and report.estimate_samples >= MIN_LOSS_SAMPLES:
            return LinkView(report.loss_estimate, burst, report.estimate_samples, "estimate")
        return None

    # -- the rule --------------------------------------------------------------------------------

    def options(self, link: LinkView) -> list[Choice]:
        """Every allowed (m, D) with its exact figures on ``link``, weakest first."""
        policy = self.policy
        channel = link.channel()
        found: list[Choice] = []
        for depth in policy.depths:
            k_eff = effective_k(policy.block_size, self.source.rate, policy.flush_interval, depth)
            repairs = {m: self._repair_sent(m, k_eff) for m in range(policy.max_repair + 1)}
            within = [m for m in repairs if self._within_caps(repairs[m], k_eff)]
            if not within:
                continue
            cap = within[-1]  # m' grows with m, so the caps allow a prefix 0..cap
            floor = min(policy.min_repair, cap)
            figures = evaluate_repair_range(channel, k_eff, repairs[cap], depth)
            for m in range(floor, cap + 1):
                f = figures[repairs[m]]
                found.append(Choice(m, depth, k_eff, repairs[m], f.residual_loss))
        return sorted(found)

    def _repair_sent(self, m: int, k_eff: int) -> int:
        return repair_count(self.policy.block_size, m, k_eff, self.policy.short_block_repair)

    def _within_caps(self, m_eff: int, k_eff: int) -> bool:
        """RFC 6363 §8.2 in packets and bytes, scaled by the operator's max_overhead."""
        budget = self.policy.max_overhead
        if m_eff > budget * k_eff * (1 + _SLACK):
            return False
        source_bytes, repair_bytes = self.source.source_packet_bytes, self.source.repair_packet_bytes
        if source_bytes is None or repair_bytes is None:
            return True
        if m_eff * repair_bytes > budget * k_eff * source_bytes * (1 + _SLACK):
            return False
        return self._within_air(m_eff, k_eff, source_bytes, repair_bytes)

    def _within_air(self, m_eff: int, k_eff: int, source_bytes: float, repair_bytes: int) -> bool:
        """link.rate: the source's air time plus m'/k' repair packets per datagram fit the air rate
        (AIR_SHARE_FOR_DATA of it).  m = 0 always fits: the source is not this rule's to cut."""
        air, rate = self.policy.air_rate_bps, self.source.rate
        if air is None or rate is None or m_eff == 0:
            return True
        source = rate * (source_bytes + AIR_HEADER_BYTES) * 8
        repair = rate * m_eff / k_eff * (repair_bytes + AIR_HEADER_BYTES) * 8
        return source + repair <= AIR_SHARE_FOR_DATA * air * (1 + _SLACK)

    def _decide(self, link: LinkView, now: float) -> Decision | None:
        options = self.options(link)
        if not options:
            return None  # not even m = 0 fits (cannot happen: 0 repair is always within the caps)
        target = self.policy.target_residual
        current = next((o for o in options if o == self._choice), None)
        if current is not None:
            self._choice = current  # its figures on this link, for the record and the events
        strongest = self._strongest(options)
        needed = next((o for o in options if o.residual_loss <= target), None)

        if current is None:  # the caps shrank below the choice (or its depth is no longer allowed)
            return self._move(now, needed or strongest, CAP, link)
        if current.residual_loss > target:
            self._reset_lowering()
            if needed is not None:
                return self._move(now, needed, TARGET_MISSED, link)
            if strongest > current:
                return self._move(now, strongest, TARGET_UNREACHABLE, link)
            return None  # held at the cap
        lower = next((o for o in options if o.residual_loss <= target * LOWER_MARGIN), None)
        if lower is None or not lower < current:
            self._reset_lowering()
            return None
        self._lower_streak += 1
        self._lower_to = lower if self._lower_to is None else max(self._lower_to, lower)
        if self._lower_streak < LOWER_AFTER_REPORTS:
            return None
        chosen = next((o for o in options if o == self._lower_to), lower)  # lower: if the caps moved since
        return self._move(now, chosen, MARGIN_REGAINED, link)

    @staticmethod
    def _strongest(options: list[Choice]) -> Choice:
        """The lowest predicted residual; among equals, the least repair."""
        return min(options, key=lambda o: (o.residual_loss, o))

    def _reset_lowering(self) -> None:
        self._lower_streak = 0
        self._lower_to = None

    def _move(self, now: float, choice: Choice, reason: str, link: LinkView) -> Decision | None:
        previous = self._choice
        self._reset_lowering()
        self._choice = choice
        if choice == previous:
            return None
        direction = UP if choice > previous else DOWN
        return Decision(at=now, direction=direction, reason=reason, previous=previous, choice=choice, link=link)
