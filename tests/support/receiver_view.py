"""What a receiver can see of a Gilbert channel through its blocks: exact limits by enumeration.

Why shared: the receiver's loss estimate is checked against these limits in
test_receiver_loss_estimate.py (which also checks the closed form ``invisible_share`` against
the enumeration), and the whole-process run in test_plan_against_pair.py widens its bounds by
the same invisible share.

What the receiver cannot see: repair positions (source positions of consecutive blocks are m + 1
link steps apart, not one), and invisible tails (a block whose last sources and all its repair
packets are lost never tells its k).
"""

from __future__ import annotations

import numpy as np

from fecproxy.linkmodel.loss_models import GilbertElliott


def block_patterns(channel: GilbertElliott, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Every loss pattern of n consecutive link packets (True = lost) with its probability.

    Simple Gilbert channel (loss_good = 0, loss_bad = 1: the state *is* the outcome), chain started
    in its stationary law (Gilbert 1960): P = π(x_0) · Π T(x_i, x_{i+1}).
    """
    assert channel.loss_good == 0.0 and channel.loss_bad == 1.0
    lost = ((np.arange(2**n)[:, None] >> np.arange(n)[None, :]) & 1).astype(bool)
    t = channel.transition_matrix()
    pi = np.array([1.0 - channel.stationary_bad, channel.stationary_bad])
    prob = pi[lost[:, 0].astype(int)]
    for i in range(n - 1):
        prob = prob * t[lost[:, i].astype(int), lost[:, i + 1].astype(int)]
    return lost, prob


def visible_limits(channel: GilbertElliott, k: int, m: int, *, decoder_view: bool) -> dict[str, float]:
    """Long-run loss ratio and mean burst that a per-block segmented estimator converges to.

    ``decoder_view=False``: all k source positions of every block.  ``decoder_view=True``: what
    a BlockReport shows — span k when the last source or any repair packet arrived (the END flag
    or a repair packet tells k), else positions up to the highest source received (none at all
    when the whole block is lost).  Ratios of per-block expectations, exact for a stationary chain.
    """
    lost, prob = block_patterns(channel, k + m)
    source = lost[:, :k]
    if decoder_view:
        knows_k = ~source[:, k - 1] | ~lost[:, k:].all(axis=1)
        received = ~source
        highest = np.where(received.any(axis=1), k - np.argmax(received[:, ::-1], axis=1), 0)
        span = np.where(knows_k, k, highest)
    else:
        span = np.full(len(prob), k)
    seen = np.arange(k)[None, :] < span[:, None]
    pair = seen[:, 1:]  # both ends of the pair (i, i + 1) inside the span
    bb = (source[:, :-1] & source[:, 1:] & pair).sum(axis=1)
    bg = (source[:, :-1] & ~source[:, 1:] & pair).sum(axis=1)

    def e(x: np.ndarray) -> float:  # expectation over the paths
        return float((prob * x).sum())

    r = e(bg) / (e(bg) + e(bb))
    return {"loss": e((source & seen).sum(axis=1)) / e(span), "burst": 1.0 / r, "invisible": 1.0 - e(span) / k}


def chained_burst_limit(channel: GilbertElliott, k: int, m: int) -> float:
    """Mean burst seen when the blocks' source positions are chained into one stream.

    Of every k pairs, k − 1 are one link step apart and one (last source → next block's first) is
    m + 1 steps apart, with P(bad → good) = 1 − T^(m+1)[bad, bad]; so r̂ → r + (q − r)/k.
    """
    q = 1.0 - channel.transition_matrix(m + 1)[1, 1]
    return 1.0 / (channel.r + (q - channel.r) / k)


def invisible_share(channel: GilbertElliott, k: int, m: int) -> float:
    """Expected share of source positions the receiver never learns of (simple Gilbert channel).

    A block's last t sources and all m repair packets lost, with source k − t − 1 received (or
    t = k, the whole block lost): the decoder never learns k, so those t are not counted.
    P = π_good·p·(1 − r)^(t+m−1) for t < k, and π_bad·(1 − r)^(k+m−1) for t = k.
    """
    p, r, bad = channel.p, channel.r, channel.stationary_bad
    tail = sum(t * (1 - bad) * p * (1 - r) ** (t + m - 1) for t in range(1, k))
    return (tail + k * bad * (1 - r) ** (k + m - 1)) / k
