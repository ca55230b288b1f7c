"""The added wait of in-order delivery that `fecproxy plan` reports (linkmodel/order_wait.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import binom

from fecproxy.linkmodel.loss_models import GilbertElliott, GilbertElliottChannel
from fecproxy.linkmodel.order_wait import in_order_wait, no_loss_run


def test_independent_loss_matches_the_binomial():
    # Independent loss: P[no loss among j packets] = Binomial(j, p) at 0 (scipy as the oracle).
    p = 0.05
    runs = no_loss_run(GilbertElliott.bernoulli(p), 16)
    assert runs == pytest.approx([binom.pmf(0, j, p) for j in range(17)])


def test_wait_on_a_clean_link_is_zero():
    wait = in_order_wait(GilbertElliott.no_loss(), 16, 1000.0, 0.015)
    assert wait.waiting_share == 0 and wait.mean_seconds == 0
    assert wait.worst_seconds == pytest.approx(0.014)


def test_bursty_loss_matches_a_monte_carlo_of_the_same_chain():
    # Simple Gilbert channel, 3 % loss in bursts of 2 (design notes: r = 1/B, p = P/(B(1 − P))).
    channel = GilbertElliott.from_loss_burst(0.03, 2.0)
    k, rate = 16, 100.0
    span = (k - 1) / rate
    model = in_order_wait(channel, k, rate, span)
    lost = GilbertElliottChannel(channel, seed=5).losses(k * 20000).reshape(-1, k)
    behind_gap = np.cumsum(lost, axis=1) - lost > 0  # some earlier position of the block was lost
    waits = behind_gap * (span - np.arange(k) / rate)
    assert behind_gap.mean() == pytest.approx(model.waiting_share, rel=0.05)
    assert waits.mean() == pytest.approx(model.mean_seconds, rel=0.05)
