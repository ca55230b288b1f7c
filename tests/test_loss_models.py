"""Loss channels and the transition-counting estimator.

Statistical checks use 4-sigma intervals (a false alarm about once in 16 000 runs per check;
all seeds are fixed, so a pass is reproducible).  Sources of the variances:

* Average loss of a simple Gilbert channel is the occupation fraction of a two-state Markov
  chain; its autocorrelation at lag j is λ^j with λ = 1 − p − r (second eigenvalue of T), so
  Var(mean of N) ≈ π(1 − π)/N · (1 + λ)/(1 − λ) — standard textbook result for the variance of a
  sample mean of a stationary AR(1)-like sequence (integrated autocorrelation time).  From memory;
  the batch-means cross-check below needs no formula.
* Burst lengths of a simple Gilbert channel are i.i.d. geometric with success probability r
  (Gilbert 1960): mean 1/r, variance (1 − r)/r², so the mean of M bursts has SE sqrt((1 − r)/M)/r.
* For the general Gilbert–Elliott channel we use batch means (40 batches): the batches are long
  compared with the chain's memory, so their means are nearly independent.
"""

from __future__ import annotations

import itertools
import math
import random

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.linkmodel.estimator import LossEstimator
from fecproxy.linkmodel.loss_models import (
    BernoulliChannel,
    ChannelConfigError,
    GilbertElliott,
    GilbertElliottChannel,
    channel_from_figures,
    make_channel,
)

SIGMAS = 4.0


def runs_of_losses(lost: np.ndarray) -> np.ndarray:
    """Lengths of maximal runs of True (independent of our estimator, for cross-checks)."""
    padded = np.concatenate(([0], lost.astype(np.int8), [0]))
    edges = np.flatnonzero(np.diff(padded))
    return edges[1::2] - edges[0::2]


def occupation_se(params: GilbertElliott, count: int) -> float:
    pi = params.stationary_bad
    lam = 1.0 - params.p - params.r
    return math.sqrt(pi * (1 - pi) / count * (1 + lam) / (1 - lam))


def burst_se(params: GilbertElliott, bursts: int) -> float:
    r = params.r
    return math.sqrt((1 - r) / bursts) / r


SIMPLE_GILBERT = [
    # (average loss, mean burst) — a spread from light independent-ish loss to long fades
    (0.05, 3.0),
    (0.2, 1.5),
    (0.01, 10.0),
    (0.1, 1.0),
]


# -- parameters ------------------------------------------------------------------------------------


@pytest.mark.parametrize("loss,burst", SIMPLE_GILBERT)
def test_conversion_reproduces_loss_and_burst(loss, burst):
    # Gilbert 1960: simple Gilbert average loss p/(p+r), mean burst 1/r; inverted as r = 1/B,
    # p = P/(B(1 − P)).
    params = GilbertElliott.from_loss_burst(loss, burst)
    assert params.r == pytest.approx(1 / burst)
    assert params.p == pytest.approx(loss / (burst * (1 - loss)))
    assert params.average_loss == pytest.approx(loss, rel=1e-12)
    assert params.mean_burst == pytest.approx(burst, rel=1e-12)


def test_general_average_loss_formula():
    # Gilbert–Elliott average loss = [(1−k)r + (1−h)p]/(p+r) with 1−k = loss_good, 1−h = loss_bad.
    params = GilbertElliott(p=0.02, r=0.2, loss_good=0.01, loss_bad=0.7)
    assert params.average_loss == pytest.approx((0.01 * 0.2 + 0.7 * 0.02) / 0.22, rel=1e-12)


def test_bernoulli_is_memoryless_with_geometric_bursts():
    # Independent losses: a loss run continues with probability P, so its mean length is 1/(1 − P)
    # (geometric distribution).
    params = GilbertElliott.bernoulli(0.1)
    assert params.is_memoryless
    assert params.average_loss == pytest.approx(0.1)
    assert params.mean_burst == pytest.approx(1 / 0.9)


@pytest.mark.parametrize("steps", [1, 2, 3, 7, 50])
def test_multi_step_matrix_matches_matrix_power(steps):
    # numpy.linalg.matrix_power as oracle for the closed form of T^D.
    params = GilbertElliott(p=0.03, r=0.25, loss_good=0.0, loss_bad=0.9)
    one = params.transition_matrix(1)
    np.testing.assert_allclose(
        params.transition_matrix(steps), np.linalg.matrix_power(one, steps), rtol=1e-12, atol=1e-15
    )


@pytest.mark.parametrize(
    "kwargs,message",
    [
        (dict(p=1.5, r=0.1), "p must be a probability"),
        (dict(p=0.1, r=float("nan")), "r must be a probability"),
        (dict(p=0.0, r=0.0), "p \\+ r must be > 0"),
        (dict(p=0.1, r=0.5, loss_bad=-0.1), "loss_bad"),
        (dict(p="x", r=0.5), "p must be a number"),
    ],
)
def test_bad_parameters_are_typed_errors(kwargs, message):
    with pytest.raises(ChannelConfigError, match=message):
        GilbertElliott(**kwargs)


def test_conversion_limits():
    with pytest.raises(ChannelConfigError, match="mean burst must be at least"):
        GilbertElliott.from_loss_burst(0.9, 1.0)
    with pytest.raises(ChannelConfigError, match="≥ 1"):
        GilbertElliott.from_loss_burst(0.1, 0.5)
    with pytest.raises(ChannelConfigError, match="dead link"):
        GilbertElliott.from_loss_burst(1.0, 3.0)
    assert GilbertElliott.from_loss_burst(0.0, 5.0).average_loss == 0.0


def test_channel_from_figures_forms():
    assert channel_from_figures() == GilbertElliott.no_loss()
    assert channel_from_figures(loss=0.1) == GilbertElliott.bernoulli(0.1)
    assert channel_from_figures(loss=0.1, burst=4) == GilbertElliott.from_loss_burst(0.1, 4)
    assert channel_from_figures(p=0.1, r=0.3) == GilbertElliott(0.1, 0.3, 0.0, 1.0)
    with pytest.raises(ChannelConfigError, match="not both"):
        channel_from_figures(loss=0.1, p=0.1, r=0.2)
    with pytest.raises(ChannelConfigError, match="both p and r"):
        channel_from_figures(p=0.1)
    with pytest.raises(ChannelConfigError, match="needs an average loss"):
        channel_from_figures(burst=3)


# -- sampled statistics -------------------------------------------------------------------------------


@pytest.mark.parametrize("loss,burst", SIMPLE_GILBERT)
def test_per_packet_channel_matches_configuration(loss, burst):
    params = GilbertElliott.from_loss_burst(loss, burst)
    channel = GilbertElliottChannel(params, seed=f"per-packet {loss} {burst}")
    count = 200_000
    lost = np.fromiter((channel.lose() for _ in range(count)), dtype=bool, count=count)
    assert abs(lost.mean() - loss) < SIGMAS * occupation_se(params, count)
    runs = runs_of_losses(lost)
    assert abs(runs.mean() - burst) < SIGMAS * burst_se(params, runs.size) + 1e-12


@pytest.mark.parametrize("loss,burst", SIMPLE_GILBERT)
def test_bulk_channel_matches_configuration(loss, burst):
    params = GilbertElliott.from_loss_burst(loss, burst)
    channel = GilbertElliottChannel(params, seed=f"bulk {loss} {burst}")
    count = 1_000_000
    lost = np.concatenate([channel.losses(count // 4) for _ in range(4)])  # continuation across calls
    assert abs(lost.mean() - loss) < SIGMAS * occupation_se(params, count)
    runs = runs_of_losses(lost)
    assert abs(runs.mean() - burst) < SIGMAS * burst_se(params, runs.size) + 1e-12


def test_bulk_chain_transition_frequencies():
    # Empirical one-step transition frequencies of the sampled state path against p and r:
    # each is a binomial proportion over the visits to the source state.
    params = GilbertElliott(p=0.03, r=0.4, loss_good=0.02, loss_bad=0.6)
    path = GilbertElliottChannel(params, seed=7).states(1_000_000)
    before, after = path[:-1], path[1:]
    good = ~before
    p_hat = (after & good).sum() / good.sum()
    r_hat = (~after & before).sum() / before.sum()
    assert abs(p_hat - params.p) < SIGMAS * math.sqrt(params.p * (1 - params.p) / good.sum())
    assert abs(r_hat - params.r) < SIGMAS * math.sqrt(params.r * (1 - params.r) / before.sum())


@pytest.mark.parametrize("bulk", [False, True])
def test_general_gilbert_elliott_by_batch_means(bulk):
    params = GilbertElliott(p=0.02, r=0.2, loss_good=0.01, loss_bad=0.7)
    channel = GilbertElliottChannel(params, seed=f"general {bulk}")
    batches, size = 40, 5_000 if not bulk else 50_000
    losses, bursts = [], []
    for _ in range(batches):
        if bulk:
            lost = channel.losses(size)
        else:
            lost = np.fromiter((channel.lose() for _ in range(size)), dtype=bool, count=size)
        losses.append(lost.mean())
        bursts.append(runs_of_losses(lost).mean())
    for values, expected in ((losses, params.average_loss), (bursts, params.mean_burst)):
        values = np.asarray(values)
        se = values.std(ddof=1) / math.sqrt(batches)
        assert abs(values.mean() - expected) < SIGMAS * se


def test_bernoulli_channel_statistics():
    # Binomial proportion: SE = sqrt(P(1−P)/N); runs geometric with mean 1/(1−P).
    channel = BernoulliChannel(0.1, seed=3)
    lost = channel.losses(500_000)
    assert abs(lost.mean() - 0.1) < SIGMAS * math.sqrt(0.1 * 0.9 / lost.size)
    runs = runs_of_losses(lost)
    q = 0.1  # continuation probability of a loss run
    assert abs(runs.mean() - 1 / (1 - q)) < SIGMAS * math.sqrt(q / runs.size) / (1 - q)
    per_packet = [channel.lose() for _ in range(100_000)]
    assert abs(np.mean(per_packet) - 0.1) < SIGMAS * math.sqrt(0.1 * 0.9 / 100_000)


def test_seeded_channels_are_reproducible():
    params = GilbertElliott.from_loss_burst(0.1, 3)
    a = GilbertElliottChannel(params, seed=42)
    b = GilbertElliottChannel(params, seed=42)
    c = GilbertElliottChannel(params, seed=43)
    seq_a = [a.lose() for _ in range(2000)] + a.losses(5000).tolist()
    seq_b = [b.lose() for _ in range(2000)] + b.losses(5000).tolist()
    seq_c = [c.lose() for _ in range(2000)] + c.losses(5000).tolist()
    assert seq_a == seq_b
    assert seq_a != seq_c


def test_make_channel_picks_bernoulli_for_memoryless():
    assert isinstance(make_channel(GilbertElliott.bernoulli(0.2), 1), BernoulliChannel)
    assert isinstance(make_channel(GilbertElliott.from_loss_burst(0.2, 3), 1), GilbertElliottChannel)


def test_extreme_channels():
    never = GilbertElliottChannel(GilbertElliott.no_loss(), seed=1)
    assert not never.losses(10_000).any()
    always = GilbertElliottChannel(GilbertElliott(p=1.0, r=0.0), seed=1)
    assert always.losses(10_000).all()
    assert GilbertElliottChannel(GilbertElliott.no_loss(), seed=1).losses(0).size == 0


# -- estimator ------------------------------------------------------------------------------------------


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
    """The windowed observe_run takes a run in and the window's excess out at once: the same
    counters, pair by pair, as one sample at a time, segment boundaries included."""
    fast, slow = LossEstimator(window=window), LossEstimator(window=window)
    for lost, count, new_segment in runs:
        if new_segment:
            fast.end_segment()
            slow.end_segment()
        fast.observe_run(lost, count)
        for _ in range(count):
            slow.observe(lost)
        assert (fast._gg, fast._gb, fast._bg, fast._bb) == (slow._gg, slow._gb, slow._bg, slow._bb)
        assert (fast._samples, fast._lost, list(fast._flags)) == (slow._samples, slow._lost, list(slow._flags))
