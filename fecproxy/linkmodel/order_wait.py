"""The wait in-order delivery adds, for a code, a rate and a link: what ``fecproxy plan`` reports.

With ``delivery.order: in_order`` a datagram that follows a lost one waits until the lost one is
rebuilt, i.e. until its block's repair packets arrive, at the end of the block span.  Model, for
one flow sending evenly at ``rate`` with D lanes of interleaving (our own, no source): within a
block of k' datagrams spanning S seconds, the datagram at position j arrives j·D/rate after the
block's first and, when any of positions 0..j−1 was lost, waits S − j·D/rate.  The chance that
none of the first j positions was lost comes from the link's Gilbert–Elliott chain started in
its stationary state (the forward recursion of the planner, without the repair count).  Gaps that
cannot be rebuilt wait for ``delivery.max_wait_ms`` instead; at the planned residual loss they
are rare and left out of the mean.  With D > 1 the positions of a block are D apart on the link
while the chain is stepped per position: an approximation (losses D apart are less correlated).
"""

from __future__ import annotations

from dataclasses import dataclass

from fecproxy.linkmodel.loss_models import GilbertElliott


@dataclass(frozen=True)
class OrderWait:
    """Added wait of in-order delivery: the share of datagrams that wait, the mean over all
    datagrams and the longest (a datagram right after a lost first one)."""

    waiting_share: float
    mean_seconds: float
    worst_seconds: float

    def as_dict(self) -> dict[str, float]:
        return {
            "waiting_share": self.waiting_share,
            "mean_ms": self.mean_seconds * 1000.0,
            "worst_ms": self.worst_seconds * 1000.0,
        }


def no_loss_run(channel: GilbertElliott, length: int) -> list[float]:
    """P[none of the first j of ``length`` consecutive packets is lost], for j = 0..length."""
    bad = channel.stationary_bad
    good_state, bad_state = 1.0 - bad, bad
    out = [1.0]
    for _ in range(length):
        good_state *= 1.0 - channel.loss_good
        bad_state *= 1.0 - channel.loss_bad
        out.append(good_state + bad_state)
        good_state, bad_state = (
            good_state * (1.0 - channel.p) + bad_state * channel.r,
            good_state * channel.p + bad_state * (1.0 - channel.r),
        )
    return out


def in_order_wait(channel: GilbertElliott, k_effective: int, rate: float, span: float, depth: int = 1) -> OrderWait:
    """The added wait for blocks of ``k_effective`` datagrams spanning ``span`` seconds."""
    if k_effective < 1 or rate <= 0 or span < 0 or depth < 1:
        raise ValueError("k_effective, rate and depth must be positive and span ≥ 0")
    clean = no_loss_run(channel, k_effective)
    share = total = 0.0
    for j in range(k_effective):
        behind_a_gap = 1.0 - clean[j]
        share += behind_a_gap
        total += behind_a_gap * max(0.0, span - j * depth / rate)
    worst = max(0.0, span - depth / rate) if k_effective > 1 else 0.0
    return OrderWait(share / k_effective, total / k_effective, worst)
