"""The adaptive-redundancy controller, driven by loss reports with a fake clock.

Every m the controller picks is checked against the planner's exact figures for the same link
(fecproxy.linkmodel.planner), and the i.i.d. case against scipy.stats.binom as outside oracle:
residual loss per source packet = p·P[Binomial(n − 1, p) ≥ m] (a lost source packet stays lost
when at least m of the other n − 1 packets of its block are lost too; MDS code, RFC 5510 §8.2).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binom

from fecproxy.linkmodel import planner
from fecproxy.linkmodel.adaptation import (
    CAP,
    DOWN,
    LOWER_AFTER_REPORTS,
    LOWER_MARGIN,
    MARGIN_REGAINED,
    MIN_LOSS_SAMPLES,
    REORDERED,
    STALE_AFTER_INTERVALS,
    TARGET_MISSED,
    TARGET_UNREACHABLE,
    TOO_FEW_SAMPLES,
    UP,
    AdaptError,
    AdaptPolicy,
    Decision,
    LinkView,
    RedundancyController,
    ReportsResumed,
    ReportsStale,
    SourceProfile,
)
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.protocol import wire
from fecproxy.protocol.loss_report import LossReport, encode_report, parse_report
from fecproxy.protocol.repair_rule import repair_count

K = 16
TARGET = 1e-3
INTERVAL = 1.0
#: Demo traffic: 500 datagrams per report interval, plenty for MIN_LOSS_SAMPLES.
PER_REPORT = 500


def policy(**changes) -> AdaptPolicy:
    settings: dict[str, Any] = dict(
        block_size=K, target_residual=TARGET, min_repair=1, max_repair=K, max_overhead=1.0, report_interval=INTERVAL
    )
    settings.update(changes)
    return AdaptPolicy(**settings)


class FakeReceiver:
    """Cumulative counters as a receiver keeps them, and its report of them (through the wire body)."""

    def __init__(self, epoch: int = 0x5EED):
        self.epoch = epoch
        self.sequence = 0
        self.received = self.repaired = self.lost = 0

    def report(self, loss: float, burst: float, expected: int = PER_REPORT, interval_ms: int = 1000) -> LossReport:
        lost = round(loss * expected)
        self.sequence = (self.sequence + 1) % (1 << 32)
        self.received += expected - lost
        self.repaired += expected // 4
        self.lost += lost
        report = LossReport(
            epoch=self.epoch,
            sequence=self.sequence,
            interval_ms=interval_ms,
            source_received=self.received,
            repair_received=self.repaired,
            source_lost=self.lost,
            unrecovered=0,
            loss_estimate=lost / expected,
            mean_burst=burst if lost else 0.0,
            estimate_samples=expected,
        )
        return parse_report(encode_report(report))  # as the sender would see it


def least_m(channel: GilbertElliott, target: float, k: int = K, max_m: int = K) -> int | None:
    """The planner's least m meeting the target on this channel (None: not within max_m)."""
    figures = planner.evaluate_repair_range(channel, k, max_m)
    return next((f.m for f in figures if f.residual_loss <= target), None)


def feed(controller, receiver, now, loss, burst, count=1, **kwargs):
    events = []
    for _ in range(count):
        now += INTERVAL
        events += controller.on_report(receiver.report(loss, burst, **kwargs), now)
    return now, events


def decisions(events):
    return [e for e in events if isinstance(e, Decision)]


# The two phases of a fading radio hop: 1 % independent loss, then 10 % in bursts of 2.
CALM = GilbertElliott.bernoulli(0.01)
FADE = GilbertElliott.from_loss_burst(0.10, 2.0)


def test_phase_codes_from_the_planner():
    # What the controller must find: the planner's least m for each phase (k = 16, target 1e-3).
    assert least_m(CALM, TARGET) == 2
    assert least_m(FADE, TARGET) == 13


def settled_in_calm():
    controller = RedundancyController(policy(), initial_repair=4, now=0.0)
    receiver = FakeReceiver()
    now, events = feed(controller, receiver, 0.0, 0.01, 1 / 0.99, count=1 + LOWER_AFTER_REPORTS)
    return controller, receiver, now, events


def test_settles_on_the_least_m_with_margin_in_the_calm_phase():
    controller, _, _, events = settled_in_calm()
    (decision,) = decisions(events)
    # The first report is a baseline (no counter difference yet); the next three agree.
    assert (decision.direction, decision.reason) == (DOWN, MARGIN_REGAINED)
    assert decision.previous.repair == 4 and controller.repair == 2
    assert decision.choice.residual_loss <= TARGET * LOWER_MARGIN
    assert decision.link.basis == "counters" and decision.link.loss == pytest.approx(0.01)


def test_raises_at_once_when_loss_jumps_to_bursts():
    controller, receiver, now, _ = settled_in_calm()
    now, events = feed(controller, receiver, now, 0.10, 2.0)
    (decision,) = decisions(events)
    assert (decision.direction, decision.reason) == (UP, TARGET_MISSED)
    assert controller.repair == least_m(FADE, TARGET) == 13
    assert decision.choice.residual_loss == planner.evaluate(FADE, K, 13).residual_loss <= TARGET
    assert decision.previous.residual_loss == planner.evaluate(FADE, K, 2).residual_loss > TARGET


def test_lowers_only_after_the_hysteresis_and_then_holds():
    controller, receiver, now, _ = settled_in_calm()
    now, _ = feed(controller, receiver, now, 0.10, 2.0, count=5)
    assert controller.repair == 13
    for _ in range(LOWER_AFTER_REPORTS - 1):
        now, events = feed(controller, receiver, now, 0.01, 1 / 0.99)
        assert not decisions(events) and controller.repair == 13
    now, events = feed(controller, receiver, now, 0.01, 1 / 0.99)
    (decision,) = decisions(events)
    assert (decision.direction, decision.reason, controller.repair) == (DOWN, MARGIN_REGAINED, 2)
    # and stays there: no flapping on a steady link
    now, events = feed(controller, receiver, now, 0.01, 1 / 0.99, count=10)
    assert not decisions(events) and controller.repair == 2
    assert controller.stats.decisions == {(DOWN, MARGIN_REGAINED): 2, (UP, TARGET_MISSED): 1}


def test_alternating_reports_never_lower():
    # A dip every other report resets the count: lowering needs agreeing reports in a row.
    controller, receiver, now, _ = settled_in_calm()
    now, _ = feed(controller, receiver, now, 0.10, 2.0)
    for _ in range(6):
        now, events = feed(controller, receiver, now, 0.01, 1 / 0.99)
        now, events2 = feed(controller, receiver, now, 0.10, 2.0)
        assert not decisions(events + events2)
    assert controller.repair == 13


def test_a_smaller_m_without_margin_is_not_taken():
    # Find an i.i.d. loss where m = 2 meets the target but not target × LOWER_MARGIN.
    loss = next(
        p / 10000
        for p in range(100, 400)
        if TARGET * LOWER_MARGIN < planner.iid_residual_loss(K, 2, p / 10000) <= TARGET
    )
    controller = RedundancyController(policy(), initial_repair=3, now=0.0)
    receiver = FakeReceiver()
    now, events = feed(controller, receiver, 0.0, loss, 1 / (1 - loss), count=10, expected=10_000)
    assert not decisions(events) and controller.repair == 3


def test_iid_choice_matches_scipy_binomial():
    controller = RedundancyController(policy(min_repair=0), initial_repair=0, now=0.0)
    receiver = FakeReceiver()
    feed(controller, receiver, 0.0, 0.03, 1 / 0.97, count=2)
    m = controller.repair
    n = K + m

    def residual(m_):
        # p·P[Binomial(n−1, p) ≥ m]: scipy.stats.binom.sf(m − 1, n − 1, p) = P[X ≥ m]
        return 0.03 * binom.sf(m_ - 1, K + m_ - 1, 0.03)

    assert controller.choice.residual_loss == pytest.approx(residual(m), rel=1e-9)
    assert residual(m) <= TARGET < residual(m - 1)
    assert n == K + 3


def test_overhead_cap_is_never_exceeded_and_says_unreachable():
    controller = RedundancyController(policy(max_overhead=0.25, max_repair=K), initial_repair=1, now=0.0)
    receiver = FakeReceiver()
    now, events = feed(controller, receiver, 0.0, 0.20, 3.0, count=2)
    (decision,) = decisions(events)
    assert (decision.direction, decision.reason) == (UP, TARGET_UNREACHABLE)
    assert controller.repair == 4  # m/k = 0.25
    # The first report already decides, from the receiver's own estimate (its counters are a baseline).
    assert decision.link.basis == "estimate" and decision.link.loss == pytest.approx(0.20, abs=1 / 65536)
    channel = decision.link.channel()
    assert channel.mean_burst == pytest.approx(3.0)
    assert decision.choice.residual_loss == planner.evaluate(channel, K, 4).residual_loss > TARGET
    now, events = feed(controller, receiver, now, 0.20, 3.0, count=3)
    assert not decisions(events) and controller.repair == 4  # held at the cap, no repeated events


def test_repair_bytes_stay_under_source_bytes():
    # RFC 6363 §8.2 counts bytes too: small datagrams with one long one in the block make each
    # repair packet as long as the longest (12 + 5 + 1400 bytes) against 14 + 100 per source packet.
    source = SourceProfile(rate=None, mean_datagram_bytes=100, longest_datagram_bytes=1400)
    controller = RedundancyController(policy(), initial_repair=4, now=0.0, source=source)
    receiver = FakeReceiver()
    now, events = feed(controller, receiver, 0.0, 0.10, 2.0, count=2)
    repair_bytes = wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + 1400
    source_bytes = wire.SOURCE_HEADER_BYTES + 100
    assert controller.repair == K * source_bytes // repair_bytes == 1
    assert controller.repair * repair_bytes <= K * source_bytes
    (decision,) = decisions(events)
    assert (decision.direction, decision.reason) == (DOWN, CAP)


def test_caps_shrinking_lower_at_once():
    controller, receiver, now, _ = settled_in_calm()
    now, _ = feed(controller, receiver, now, 0.10, 2.0)
    assert controller.repair == 13
    small = SourceProfile(rate=None, mean_datagram_bytes=600, longest_datagram_bytes=1400)
    events = controller.on_report(receiver.report(0.10, 2.0), now + INTERVAL, source=small)
    (decision,) = decisions(events)
    cap = K * (wire.SOURCE_HEADER_BYTES + 600) // (wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + 1400)
    assert (decision.direction, decision.reason, controller.repair) == (DOWN, CAP, cap)


def test_short_blocks_use_the_senders_effective_code():
    # 100 datagrams/s and a 20 ms flush: blocks close with k' = 2, and m' follows the encoder's rule.
    source = SourceProfile(rate=100.0)
    target = 1e-2  # a short block of 2 with at most 2 repair packets (m'/k' ≤ 1) cannot reach 1e-3 here
    controller = RedundancyController(
        policy(flush_interval=0.020, min_repair=0, target_residual=target), initial_repair=0, now=0.0, source=source
    )
    receiver = FakeReceiver()
    feed(controller, receiver, 0.0, 0.05, 1.5, count=2)
    choice = controller.choice
    k_eff = planner.effective_k(K, 100.0, 0.020)
    assert choice.k_effective == k_eff == 2
    assert choice.m_effective == repair_count(K, choice.repair, k_eff, "proportional")
    channel = GilbertElliott.from_loss_burst(0.05, 1.5)
    assert choice.residual_loss == planner.evaluate(channel, k_eff, choice.m_effective).residual_loss <= target
    # The least such m: one fewer configured repair packet gives fewer repair packets sent, and misses.
    smaller = repair_count(K, choice.repair - 1, k_eff, "proportional")
    assert smaller < choice.m_effective
    assert planner.evaluate(channel, k_eff, smaller).residual_loss > target
    # Overhead on the link stays within the cap: m'/k' ≤ 1.
    assert choice.m_effective <= k_eff


def test_interleaving_is_chosen_only_when_allowed():
    burst = GilbertElliott.from_loss_burst(0.10, 4.0)
    one = RedundancyController(policy(target_residual=1e-2), initial_repair=1, now=0.0)
    two = RedundancyController(policy(target_residual=1e-2, depths=(1, 2, 4)), initial_repair=1, now=0.0)
    for controller in (one, two):
        feed(controller, FakeReceiver(), 0.0, 0.10, 4.0, count=2)
    assert one.depth == 1
    # Among all allowed (m, D), the least m (then the least D) meeting the target, by the planner.
    best = min(
        (m, d)
        for d in (1, 2, 4)
        for f in planner.evaluate_repair_range(burst, K, K, d)
        if f.residual_loss <= 1e-2
        for m in [f.m]
    )
    assert (two.repair, two.depth) == best
    assert two.repair < one.repair


def test_stale_reports_hold_the_choice_and_resume():
    controller, receiver, now, _ = settled_in_calm()
    assert controller.next_deadline() == now + STALE_AFTER_INTERVALS * INTERVAL
    assert controller.on_timer(now + STALE_AFTER_INTERVALS * INTERVAL - 0.001) == []
    events = controller.on_timer(now + STALE_AFTER_INTERVALS * INTERVAL)
    assert events == [ReportsStale(at=now + STALE_AFTER_INTERVALS * INTERVAL, last_report_at=now)]
    assert controller.reports_stale and controller.repair == 2
    assert controller.next_deadline() is None and controller.on_timer(now + 100) == []  # flagged once
    later = now + 60
    events = controller.on_report(receiver.report(0.10, 2.0, interval_ms=500), later)
    assert events[0] == ReportsResumed(at=later) and not controller.reports_stale
    assert controller.repair == 13  # the report is used at once
    assert controller.next_deadline() == later + STALE_AFTER_INTERVALS * 0.5  # the report's own interval


def test_a_dead_return_path_from_the_start_is_flagged():
    controller = RedundancyController(policy(report_interval=2.0), initial_repair=4, now=100.0)
    assert controller.next_deadline() == 100.0 + STALE_AFTER_INTERVALS * 2.0
    assert controller.on_timer(200.0) == [ReportsStale(at=200.0, last_report_at=None)]
    assert controller.repair == 4


def test_lost_reports_lose_nothing():
    # Reports 2 and 3 never arrive; report 4's totals still give the loss over the whole gap.
    controller = RedundancyController(policy(), initial_repair=4, now=0.0)
    receiver = FakeReceiver()
    controller.on_report(receiver.report(0.01, 1.0), 1.0)
    receiver.report(0.10, 2.0)
    receiver.report(0.10, 2.0)
    controller.on_report(receiver.report(0.01, 1.0), 4.0)
    assert controller.link.loss == pytest.approx((50 + 50 + 5) / 1500)
    assert controller.link.samples == 1500


def test_reordered_and_duplicate_reports_are_ignored():
    controller = RedundancyController(policy(), initial_repair=4, now=0.0)
    receiver = FakeReceiver()
    first = receiver.report(0.01, 1.0)
    second = receiver.report(0.10, 2.0)
    controller.on_report(first, 1.0)
    controller.on_report(second, 2.0)
    assert controller.repair == 13
    assert controller.on_report(first, 3.0) == [] and controller.on_report(second, 3.1) == []
    assert controller.stats.reports_ignored == {REORDERED: 2}
    assert controller.stats.reports_received == 4


def test_sequence_numbers_wrap():
    controller = RedundancyController(policy(), initial_repair=4, now=0.0)
    receiver = FakeReceiver()
    receiver.sequence = (1 << 32) - 2
    feed(controller, receiver, 0.0, 0.10, 2.0, count=4)  # sequences 2^32−1, 0, 1, 2
    assert controller.stats.reports_ignored == {} and controller.repair == 13


def test_a_receiver_restart_is_a_new_baseline():
    controller = RedundancyController(policy(), initial_repair=4, now=0.0)
    old = FakeReceiver(epoch=1)
    feed(controller, old, 0.0, 0.10, 2.0, count=3)
    new = FakeReceiver(epoch=2)  # counters back at zero, sequence back at 1
    events = controller.on_report(new.report(0.01, 1.0, expected=50), 10.0)
    # Neither a negative difference nor an "old" sequence: a baseline whose estimate is too thin.
    assert not decisions(events) and controller.stats.reports_ignored == {TOO_FEW_SAMPLES: 1}
    events = controller.on_report(new.report(0.01, 1.0, expected=PER_REPORT), 11.0)
    assert controller.link.basis == "counters" and controller.link.samples == PER_REPORT


def test_sparse_traffic_pools_reports():
    controller = RedundancyController(policy(), initial_repair=4, now=0.0)
    receiver = FakeReceiver()
    per_report = MIN_LOSS_SAMPLES // 4
    now, _ = feed(controller, receiver, 0.0, 0.04, 1.0, count=1, expected=per_report)
    for _ in range(3):
        now, _ = feed(controller, receiver, now, 0.04, 1.0, expected=per_report)
    # A baseline and three differences of 25: the receiver's own estimate is thin too.
    assert controller.stats.reports_ignored == {TOO_FEW_SAMPLES: 4}
    now, _ = feed(controller, receiver, now, 0.04, 1.0, expected=per_report)
    assert controller.link.samples == MIN_LOSS_SAMPLES and controller.link.basis == "counters"


def test_link_view_models_independent_loss_exactly():
    # A burst at or below 1/(1 − P) is no burstier than independent loss: the memoryless chain.
    assert LinkView(0.05, 1.0, 100, "counters").channel() == GilbertElliott.bernoulli(0.05)
    assert LinkView(0.0, 0.0, 100, "counters").channel() == GilbertElliott.no_loss()
    assert LinkView(0.05, math.inf, 100, "estimate").channel().mean_burst == pytest.approx(255.0)
    assert LinkView(1.0, 5.0, 100, "counters").channel().average_loss == pytest.approx(0.999)


@pytest.mark.parametrize(
    "changes, fragment",
    [
        (dict(block_size=0), "block_size"),
        (dict(target_residual=0.0), "target_residual"),
        (dict(min_repair=5, max_repair=4), "min_repair ≤ max_repair"),
        (dict(block_size=250, max_repair=6), "exceeds 255"),
        (dict(max_overhead=1.5), "RFC 6363 §8.2"),
        (dict(report_interval=0.0), "report_interval"),
        (dict(depths=(0,)), "depths"),
        (dict(short_block_repair="half"), "short_block_repair"),
        (dict(flush_interval=-1.0), "flush_interval"),
    ],
)
def test_policy_validation(changes, fragment):
    with pytest.raises(AdaptError, match=fragment):
        policy(**changes)
    assert policy(max_overhead=1.5, allow_repair_above_source=True).max_overhead == 1.5


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.sampled_from([0.0, 0.01, 0.05, 0.1, 0.3]), st.sampled_from([1.0, 2.0, 5.0])),
        min_size=1,
        max_size=12,
    ),
    st.sampled_from([0.25, 0.5, 1.0]),
    st.integers(0, 3),
    st.sampled_from([None, 50.0, 400.0]),
)
def test_never_above_the_caps(phases, overhead, min_repair, rate):
    k = 8
    ceiling = int(k * overhead)
    controller = RedundancyController(
        policy(
            block_size=k, max_repair=6, max_overhead=overhead, min_repair=min(min_repair, ceiling), flush_interval=0.02
        ),
        initial_repair=2,
        now=0.0,
        source=SourceProfile(rate=rate, mean_datagram_bytes=300, longest_datagram_bytes=1000),
    )
    receiver = FakeReceiver()
    now = 0.0
    for loss, burst in phases:
        now, events = feed(controller, receiver, now, loss, max(burst, 1 / (1 - loss)))
        choice = controller.choice
        if controller.link is None:
            continue
        assert choice.repair <= 6
        assert choice.m_effective <= overhead * choice.k_effective + 1e-9
        assert choice.m_effective * (wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + 1000) <= (
            overhead * choice.k_effective * (wire.SOURCE_HEADER_BYTES + 300) + 1e-6
        )
        for event in decisions(events):
            assert event.direction == (UP if event.choice > event.previous else DOWN)


# ---------------------------------------------------------------- closed loop over a simulated link


def _run_closed_loop(phases, rate=2000, seed="fading hill-top relay"):
    """Sender blocks (k = 16, m from the controller) through a Gilbert–Elliott link whose
    parameters change per phase; a receiver counting loss before and after recovery, with a
    windowed estimator, reports once per interval.  Returns per interval (phase, m, blocks, lost
    source packets unrecovered)."""
    from fecproxy.linkmodel.estimator import LossEstimator
    from fecproxy.linkmodel.loss_models import make_channel

    controller = RedundancyController(policy(), initial_repair=4, now=0.0)
    blocks_per_interval = rate // K
    estimator = LossEstimator(window=blocks_per_interval * K)  # about one interval of source datagrams
    epoch, sequence, received, repaired, lost_total = 0xC0FFEE, 0, 0, 0, 0
    rows = []
    now = 0.0
    for phase, (channel, intervals) in enumerate(phases):
        link = make_channel(channel, seed=f"{seed} {phase}")
        for _ in range(intervals):
            m = controller.repair
            n = K + m
            lost = link.losses(blocks_per_interval * n).reshape(blocks_per_interval, n)
            source_lost = lost[:, :K]
            failed = lost.sum(axis=1) > m
            unrecovered = int(source_lost[failed].sum())
            for row in source_lost:
                estimator.observe_block(int(np.packbits(~row, bitorder="little").view("<u2")[0]), K)
            lost_now = int(source_lost.sum())
            received += blocks_per_interval * K - lost_now
            repaired += int((~lost[:, K:]).sum())
            lost_total += lost_now
            sequence += 1
            estimate = estimator.estimate()
            report = LossReport(
                epoch=epoch,
                sequence=sequence,
                interval_ms=1000,
                source_received=received,
                repair_received=repaired,
                source_lost=lost_total,
                unrecovered=0,  # not used for decisions (RFC 6363 §6)
                loss_estimate=estimate.average_loss,
                mean_burst=estimate.mean_burst,
                estimate_samples=estimate.samples,
            )
            now += INTERVAL
            controller.on_report(parse_report(encode_report(report)), now)
            rows.append((phase, m, blocks_per_interval, unrecovered))
    return controller, rows


def test_closed_loop_follows_a_fading_link():
    # Demo scenario: a weather station's radio hop, 1 % independent loss, then a fade of 10 % loss
    # in bursts of 2, then calm again.
    phases = [(CALM, 8), (FADE, 8), (CALM, 8)]
    controller, rows = _run_closed_loop(phases)
    ms = [m for _, m, _, _ in rows]
    # m in use during each interval (set by the report at the end of the interval before).
    calm_m, fade_m = least_m(CALM, TARGET), least_m(FADE, TARGET)
    assert ms[8] == calm_m  # the first fade interval still runs the calm code ...
    assert ms[9] in (fade_m - 1, fade_m, fade_m + 1)  # ... and the very next one the fade code
    assert all(m >= fade_m - 1 for m in ms[9:16])
    # Back to calm: lowered only after LOWER_AFTER_REPORTS agreeing reports, then to the calm code.
    assert all(m > calm_m for m in ms[16 : 16 + LOWER_AFTER_REPORTS])
    assert ms[-1] == calm_m
    assert set(controller.stats.decisions) <= {(UP, TARGET_MISSED), (DOWN, MARGIN_REGAINED), (UP, TARGET_UNREACHABLE)}

    # In each phase's steady part the residual loss stays under the target, within what the planner
    # predicts for the codes in use on the true link (4 standard deviations of the exact per-block
    # distribution; blocks on a burst-2 link are nearly independent: the chain forgets its state
    # within a few packets, (1 − p − r)^j).
    for phase, (channel, _) in enumerate(phases):
        steady = [row for i, row in enumerate(rows) if row[0] == phase and i not in (8, 16)]
        expected = variance = 0.0
        blocks = unrecovered = 0
        for _, m, count, lost in steady:
            distribution = planner.block_loss_distribution(channel, K, m)
            i = np.arange(K + 1)[:, None]
            failing = (i + np.arange(m + 1)[None, :]) > m
            per_block = np.where(failing, i, 0)
            mean = float((distribution * per_block).sum())
            expected += count * mean
            variance += count * (float((distribution * per_block**2).sum()) - mean**2)
            blocks += count
            unrecovered += lost
        assert unrecovered <= expected + 4 * math.sqrt(variance), (phase, unrecovered, expected, variance)
        assert expected / (blocks * K) <= TARGET


def test_the_air_rate_headroom_bounds_the_repair():
    # link.rate 256 kbit/s; 10 datagrams/s of 1200 bytes take 10 × (14 + 1200 + 28) × 8 = 99 kbit/s
    # of air, so repair may take at most 0.95 × 256 000 − 99 360 bit/s: m'/k' × 10 × (12 + 5 + 1200
    # + 28) × 8 ≤ that, i.e. m ≤ 16 × 143 840 / 99 600 = 23.1 → the packet cap m ≤ 16 binds first;
    # at 20 datagrams/s the source takes 198 720 bit/s, leaving 44 480: m ≤ 16 × 44 480 / 199 200 = 3.57.
    source = SourceProfile(rate=20.0, mean_datagram_bytes=1200, longest_datagram_bytes=1200)
    controller = RedundancyController(policy(air_rate_bps=256_000.0), initial_repair=4, now=0.0, source=source)
    receiver = FakeReceiver()
    feed(controller, receiver, 0.0, 0.20, 2.0, count=3)  # a link that would need far more
    assert controller.repair == 3
    source_bits = 20 * (wire.SOURCE_HEADER_BYTES + 1200 + 28) * 8
    repair_bits = 20 * controller.repair / K * (wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + 1200 + 28) * 8
    assert source_bits + repair_bits <= 0.95 * 256_000
