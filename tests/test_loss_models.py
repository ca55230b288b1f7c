"""Loss channels: Gilbert–Elliott and Bernoulli parameters, and the seeded loss processes.

Statistical checks use 4-sigma intervals, with the variances of a simple Gilbert channel's average
loss and mean burst given (and sourced) in tests/support/channel_statistics.py.  In addition:

* For the general Gilbert–Elliott channel we use batch means (40 batches): the batches are long
  compared with the chain's memory, so their means are nearly independent.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from support.channel_statistics import SIGMAS, burst_se, occupation_se, runs_of_losses

from fecproxy.linkmodel.loss_models import (
    BernoulliChannel,
    ChannelConfigError,
    GilbertElliott,
    GilbertElliottChannel,
    channel_from_figures,
    make_channel,
)

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
