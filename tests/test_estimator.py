"""The transition-counting loss estimator (fecproxy.linkmodel.estimator): hand-worked counts, its
sliding window against a brute-force recount, and the channel parameters it recovers from samples
(4-sigma intervals, tests/support/channel_statistics.py)."""

from __future__ import annotations

import itertools
import math
import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from support.channel_statistics import SIGMAS, burst_se, occupation_se, runs_of_losses

from fecproxy.linkmodel.estimator import LossEstimator
from fecproxy.linkmodel.loss_models import ChannelConfigError, GilbertElliott, GilbertElliottChannel


def test_estimator_counts_a_hand_worked_sequence():
    # received R, lost L:  R R L L R L R R
    # transitions: RR, RL, LL, LR, RL, LR, RR → 4 out of a good packet (RL twice): p̂ = 2/4;
    # 3 out of a bad one (LR twice): r̂ = 2/3; loss 3/8; mean burst 1/r̂ = 1.5 (runs 2 and 1).
    estimator = LossEstimator()
    estimator.observe_many([False, False, True, True, False, True, False, False])
    est = estimator.estimate()
    assert (est.samples, est.lost) == (8, 3)
    assert est.p == pytest.approx(2 / 4)
    assert est.r == pytest.approx(2 / 3)
    assert est.average_loss == pytest.approx(3 / 8)
    assert est.mean_burst == pytest.approx(1.5)
    assert est.as_channel() == GilbertElliott(p=2 / 4, r=2 / 3)


def test_estimator_undefined_states():
    est = LossEstimator().estimate()
    assert math.isnan(est.average_loss) and math.isnan(est.mean_burst) and est.as_channel() is None
    clean = LossEstimator()
    clean.observe_many([False] * 10)
    assert clean.estimate().mean_burst == 0.0
    assert clean.estimate().as_channel() == GilbertElliott.no_loss()
    ongoing = LossEstimator()
    ongoing.observe_many([False, True, True])
    assert math.isinf(ongoing.estimate().mean_burst)
    with pytest.raises(ChannelConfigError):
        LossEstimator(window=1)


def brute_force(flags: list[bool]):
    """Recount everything from the list: the slow obvious way, to check the O(1) bookkeeping."""
    pairs = list(itertools.pairwise(flags))
    gb = sum(1 for a, b in pairs if not a and b)
    gg = sum(1 for a, b in pairs if not a and not b)
    bg = sum(1 for a, b in pairs if a and not b)
    bb = sum(1 for a, b in pairs if a and b)
    return len(flags), sum(flags), (gb / (gg + gb) if gg + gb else math.nan), (bg / (bb + bg) if bb + bg else math.nan)


@settings(max_examples=60, deadline=None)
@given(flags=st.lists(st.booleans(), max_size=200), window=st.integers(min_value=2, max_value=30))
def test_sliding_window_equals_recount_of_last_window(flags, window):
    estimator = LossEstimator(window=window)
    for i, flag in enumerate(flags):
        estimator.observe(flag)
        if i % 7 == 0 or i == len(flags) - 1:
            tail = flags[max(0, i + 1 - window) : i + 1]
            samples, lost, p, r = brute_force(tail)
            est = estimator.estimate()
            assert (est.samples, est.lost) == (samples, lost)
            assert (math.isnan(est.p) and math.isnan(p)) or est.p == pytest.approx(p)
            assert (math.isnan(est.r) and math.isnan(r)) or est.r == pytest.approx(r)


@settings(max_examples=40, deadline=None)
@given(
    runs=st.lists(st.tuples(st.booleans(), st.integers(min_value=1, max_value=40)), max_size=20),
    window=st.one_of(st.none(), st.integers(min_value=2, max_value=25)),
)
def test_observe_run_equals_repeated_observe(runs, window):
    fast, slow = LossEstimator(window=window), LossEstimator(window=window)
    for lost, count in runs:
        fast.observe_run(lost, count)
        for _ in range(count):
            slow.observe(lost)
    a, b = fast.estimate(), slow.estimate()
    assert (a.samples, a.lost) == (b.samples, b.lost)
    for x, y in ((a.p, b.p), (a.r, b.r), (a.average_loss, b.average_loss)):
        assert (math.isnan(x) and math.isnan(y)) or x == pytest.approx(y)


@pytest.mark.parametrize("loss,burst", [(0.05, 3.0), (0.2, 1.5)])
def test_estimator_recovers_channel_parameters(loss, burst):
    params = GilbertElliott.from_loss_burst(loss, burst)
    lost = GilbertElliottChannel(params, seed=11).losses(200_000)
    estimator = LossEstimator()
    estimator.observe_many(lost.tolist())
    est = estimator.estimate()
    runs = runs_of_losses(lost)
    # The estimate is the same statistic as the direct count, up to an unfinished last burst.
    assert est.average_loss == pytest.approx(lost.mean())
    assert abs(est.mean_burst - burst) < SIGMAS * burst_se(params, runs.size)
    assert abs(est.average_loss - loss) < SIGMAS * occupation_se(params, lost.size)


def test_windowed_estimator_tracks_a_change_of_channel():
    # A window forgets: after the link turns bad, the estimate moves to the new figures.
    estimator = LossEstimator(window=20_000)
    rng = random.Random(5)
    for _ in range(30_000):
        estimator.observe(rng.random() < 0.01)
    bad = GilbertElliottChannel(GilbertElliott.from_loss_burst(0.2, 4), seed=6)
    estimator.observe_many(bad.losses(40_000).tolist())
    est = estimator.estimate()
    assert est.samples == 20_000
    assert 0.15 < est.average_loss < 0.25  # wide: a 20 000-packet window of a bursty channel
    assert 3.0 < est.mean_burst < 5.0


@settings(max_examples=60, deadline=None)
@given(
    runs=st.lists(st.tuples(st.booleans(), st.integers(1, 40), st.booleans()), max_size=30),
    window=st.integers(min_value=2, max_value=25),
)
def test_windowed_run_equals_repeated_observe_across_segments(runs, window):
    """The window holds runs and forgets them run by part of a run: its counters are, after
    every run, a plain recount of the last ``window`` samples and the pairs among them that were
    link neighbours (segment boundaries break pairs)."""
    estimator = LossEstimator(window=window)
    samples = []  # (lost, paired with the sample before it)
    last = None
    for lost, count, new_segment in runs:
        if new_segment:
            estimator.end_segment()
            last = None
        estimator.observe_run(lost, count)
        for _ in range(count):
            samples.append((lost, last is not None))
            last = lost
        tail = samples[-window:]
        pairs = dict.fromkeys(itertools.product((False, True), repeat=2), 0)
        for before, (after, paired) in zip(tail, tail[1:], strict=False):  # neighbours
            if paired:
                pairs[before[0], after] += 1
        counted = {(False, False): estimator._gg, (False, True): estimator._gb}
        counted |= {(True, False): estimator._bg, (True, True): estimator._bb}
        assert counted == pairs
        assert (estimator._samples, estimator._lost) == (len(tail), sum(flag for flag, _ in tail))
