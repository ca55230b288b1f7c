"""Statistics of sampled Gilbert–Elliott loss, for tests that check a channel or an estimator
against the channel's parameters.

Checks use 4-sigma intervals (a false alarm about once in 16 000 runs per check; all seeds are
fixed, so a pass is reproducible).  Sources of the variances:

* Average loss of a simple Gilbert channel is the occupation fraction of a two-state Markov
  chain; its autocorrelation at lag j is λ^j with λ = 1 − p − r (second eigenvalue of T), so
  Var(mean of N) ≈ π(1 − π)/N · (1 + λ)/(1 − λ) — standard textbook result for the variance of a
  sample mean of a stationary AR(1)-like sequence (integrated autocorrelation time).  From memory;
  the batch-means cross-check in tests/test_loss_models.py needs no formula.
* Burst lengths of a simple Gilbert channel are i.i.d. geometric with success probability r
  (Gilbert 1960): mean 1/r, variance (1 − r)/r², so the mean of M bursts has SE sqrt((1 − r)/M)/r.
"""

from __future__ import annotations

import math

import numpy as np

from fecproxy.linkmodel.loss_models import GilbertElliott

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
