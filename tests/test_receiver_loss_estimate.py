"""The receiver's online loss estimate, fed the way the daemon feeds it, against the link it measures.

A real ``BlockEncoder`` → our seeded Gilbert–Elliott channel → a real ``BlockDecoder`` (sans-IO,
fake clock); the decoder's ``BlockReport`` masks go to a :class:`LossEstimator`.  What the receiver
cannot see, and what that does to the estimate:

* repair positions: the source positions of consecutive blocks are m + 1 link steps apart, not
  one.  Chaining the blocks' masks (as an earlier receiver did) counts
  that pair as a one-step transition and biases the mean burst *down*; the limit is computed below
  and checked.  ``LossEstimator.observe_block`` makes each block its own segment and has no such
  bias;
* invisible tails: when a block's last source packet *and* all its repair packets are lost, the
  block itself never tells k.  Every source packet carries the previous block's k, so the next
  block tells it (and a block lost whole is opened empty and counted); only when the next block's
  sources are all lost too do the trailing positions stay unseen.  The run checks, exactly, that
  the positions no report covers are the ones these rules leave unseen, and that they are far
  fewer than without the previous-k field (whose exact share, ``invisible_share`` and
  ``visible_limits(decoder_view=True)`` in support/receiver_view.py, is computed by enumerating
  every loss pattern of a block).

Confidence bounds (4 standard errors):
* loss ratio: the lag-t autocorrelation of a two-state Markov chain's state is λ^t with
  λ = 1 − p − r (textbook Markov-chain result), so the variance of the mean of N samples is about
  π(1 − π)(1 + λ)/((1 − λ)N); source positions are a subsequence, so this is conservative;
* r̂ = bad→good / transitions out of bad is the maximum-likelihood estimate of a Markov transition
  probability, with asymptotic variance r(1 − r)/N_bad (Anderson & Goodman, Ann. Math. Statist.
  28, 1957 — from memory); the mean burst 1/r̂ gets SE(r̂)/r² by the delta method.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from support.receiver_view import chained_burst_limit, invisible_share, visible_limits

from fecproxy.linkmodel.estimator import LossEstimator
from fecproxy.linkmodel.loss_models import GilbertElliott, GilbertElliottChannel
from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import BlockReport
from fecproxy.protocol.wire import ControlPacket, parse

Z = 4.0  # standard errors allowed


# -- exact limits by enumerating one block (support/receiver_view.py) ---------------------------------


@pytest.mark.parametrize("k,m,loss,burst", [(8, 2, 0.05, 2.0), (6, 3, 0.08, 4.0), (4, 1, 0.1, 3.0), (12, 4, 0.02, 1.5)])
def test_invisible_share_closed_form_equals_enumeration(k, m, loss, burst):
    channel = GilbertElliott.from_loss_burst(loss, burst)
    assert invisible_share(channel, k, m) == pytest.approx(
        visible_limits(channel, k, m, decoder_view=True)["invisible"], rel=1e-9
    )


def loss_se(channel: GilbertElliott, samples: int) -> float:
    lam = 1.0 - channel.p - channel.r
    pi = channel.stationary_bad
    return math.sqrt(pi * (1 - pi) * (1 + lam) / (1 - lam) / samples)


def burst_se(channel: GilbertElliott, from_bad: int) -> float:
    r = channel.r
    return math.sqrt(r * (1 - r) / from_bad) / r**2


# -- the link, as the receiver sees it -------------------------------------------------------------


def run_pair(channel: GilbertElliott, k: int, m: int, datagrams: int, seed: str) -> dict:
    """Encoder → channel → decoder with a fake clock (1 ms per datagram); every BlockReport and
    the true loss flag of every source position."""
    link = GilbertElliottChannel(channel, seed=seed)
    encoder = BlockEncoder(
        EncoderSettings(block_size=k, repair=m, flush_interval=10.0, max_datagram=32), session=0x5EED
    )
    decoder = BlockDecoder(DecoderSettings(hold_time=0.5, max_datagram=32))
    reports: list[BlockReport] = []
    truth: list[bool] = []

    def take(events):
        reports.extend(e for e in events if isinstance(e, BlockReport))

    on_link: dict[int, dict[int, bool]] = {}  # sbn -> esi -> lost, every packet sent

    now = 0.0
    for i in range(datagrams):
        now += 0.001
        for position, pkt in enumerate(encoder.send(b"%08d" % i, 1, now)):
            lost = link.lose()
            parsed = parse(pkt, max_datagram=32)
            assert not isinstance(parsed, ControlPacket)
            on_link.setdefault(parsed.sbn, {})[parsed.esi] = lost
            if position == 0:
                truth.append(lost)
            if not lost:
                take(decoder.receive(pkt, None, now))
        take(decoder.on_timer(now))
    take(decoder.close())
    return {"reports": reports, "truth": np.array(truth), "decoder": decoder.stats, "link": on_link}


def unseen_positions(on_link: dict[int, dict[int, bool]], k: int, full_blocks: int) -> int:
    """Source positions of the first ``full_blocks`` blocks that no BlockReport can cover, by the
    decoder's documented rules: a block's k is known when its last source (END flag) or any repair
    packet arrives, or when a source packet of the next block tells it (previous k) — for a block
    with no packet at all, only if an earlier block was seen.  Otherwise a report covers positions
    up to the highest source received."""
    unseen = 0
    seen_before = False
    for sbn in range(full_blocks):
        flags = on_link[sbn]
        received = [esi for esi in range(k) if not flags[esi]]
        any_packet = bool(received) or not all(flags[esi] for esi in flags if esi >= k)
        following = on_link.get(sbn + 1, {})
        told_by_next = any(not lost for esi, lost in following.items() if esi < k)
        if not flags[k - 1] or any(not flags[esi] for esi in flags if esi >= k):
            span = k
        elif told_by_next and (any_packet or seen_before):
            span = k
        else:
            span = max(received) + 1 if received else 0
        unseen += k - span
        seen_before = seen_before or any_packet
    return unseen


SCENARIOS = [
    # (k, m, average loss, mean burst, datagrams)
    (8, 2, 0.05, 2.0, 40_000),
    (6, 3, 0.08, 4.0, 30_000),
]


@pytest.mark.parametrize("k,m,loss,burst,datagrams", SCENARIOS)
def test_estimator_fed_block_reports_recovers_the_link(k, m, loss, burst, datagrams):
    channel = GilbertElliott.from_loss_burst(loss, burst)
    run = run_pair(channel, k, m, datagrams, seed=f"online {k} {m} {loss} {burst}")

    segmented = LossEstimator()
    for report in run["reports"]:
        segmented.observe_block(report.arrived_mask, report.span)
    estimate = segmented.estimate()

    # The limits with all source positions are the configured figures (the enumeration is right).
    full = visible_limits(channel, k, m, decoder_view=False)
    assert full["loss"] == pytest.approx(loss, rel=1e-9) and full["burst"] == pytest.approx(burst, rel=1e-9)

    # Positions no report covers are exactly those the decoder's rules leave unseen (a block's
    # tail and all its repair lost, and no source of the next block to tell its k), all of them
    # lost; the previous-k field makes them far fewer than without it.
    truth = run["truth"][: len(run["truth"]) // k * k]
    missing = truth.size - estimate.samples
    assert int(truth.sum()) - estimate.lost == missing
    assert missing == unseen_positions(run["link"], k, truth.size // k)
    without_previous_k = visible_limits(channel, k, m, decoder_view=True)["invisible"] * truth.size
    assert missing < without_previous_k / 2

    # The estimate agrees with the configured link within Z standard errors, widened only by the
    # share of lost positions left unseen.
    unseen_share = missing / truth.size
    assert abs(estimate.average_loss - loss) < Z * loss_se(channel, estimate.samples) + unseen_share
    assert abs(estimate.mean_burst - burst) < Z * burst_se(
        channel, estimate.lost * (k - 1) // k
    ) + burst * missing / max(1, estimate.lost)


@pytest.mark.parametrize("k,m,loss,burst", [(8, 2, 0.05, 2.0), (16, 4, 0.05, 2.0), (4, 1, 0.1, 3.0)])
def test_chaining_blocks_across_hidden_repair_biases_the_burst_down(k, m, loss, burst):
    # All source positions known (no decoder): isolates the effect of the hidden repair positions.
    channel = GilbertElliott.from_loss_burst(loss, burst)
    blocks = 150_000 // k
    lost = GilbertElliottChannel(channel, seed=f"chain {k} {m}").losses(blocks * (k + m)).reshape(blocks, k + m)[:, :k]
    chained, segmented = LossEstimator(), LossEstimator()
    weights = 1 << np.arange(k, dtype=np.int64)
    for row in lost:
        segmented.observe_block(int((~row) @ weights), k)
        chained.observe_many(row.tolist())
    from_bad = chained.estimate().lost * (k - 1) // k
    se = burst_se(channel, from_bad)
    # Segmented: unbiased.
    assert abs(segmented.estimate().mean_burst - burst) < Z * se
    # Chained: converges to the computed limit, below the truth.
    limit = chained_burst_limit(channel, k, m)
    assert limit < burst
    assert abs(chained.estimate().mean_burst - limit) < Z * se
    # Both see every position: identical loss ratio.
    assert chained.estimate().average_loss == segmented.estimate().average_loss


def test_bias_sizes_for_the_docs():
    # The figures quoted in LossEstimator's docstring and the link-engineering notes (the tail
    # bias is what a decoder would see without the previous-k field of source packets).
    channel = GilbertElliott.from_loss_burst(0.05, 2.0)
    assert chained_burst_limit(channel, 8, 2) / 2.0 - 1 == pytest.approx(-0.080, abs=0.005)
    seen = visible_limits(channel, 8, 2, decoder_view=True)
    assert seen["loss"] / 0.05 - 1 == pytest.approx(-0.05, abs=0.02)
    assert seen["burst"] / 2.0 - 1 == pytest.approx(-0.03, abs=0.02)


def test_segments_in_a_sliding_window():
    # Window bookkeeping with segment breaks: the counts equal a fresh estimator over the same
    # last `window` samples with the same breaks.
    rng = np.random.default_rng(5)
    window = 50
    est = LossEstimator(window=window)
    history: list[tuple[bool, bool]] = []  # (lost, linked to previous)
    for _ in range(400):
        k = int(rng.integers(1, 9))
        flags = rng.random(k) < 0.3
        mask = sum(int(not f) << i for i, f in enumerate(flags))
        est.observe_block(mask, k)
        history += [(bool(f), i > 0) for i, f in enumerate(flags)]
        recent = history[-window:]
        fresh = LossEstimator()
        for i, (lost, linked) in enumerate(recent):
            if i == 0 or not linked:
                fresh.end_segment()
            fresh.observe(lost)
        assert est.estimate() == fresh.estimate()
