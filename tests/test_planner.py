"""The residual-loss planner: exact values against scipy and a seeded Monte Carlo.

The ``fecproxy plan`` command is tested in test_plan_command.py.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy.stats import binom

from fecproxy.linkmodel.loss_models import GilbertElliott, GilbertElliottChannel
from fecproxy.linkmodel.planner import (
    MAX_BLOCK_PACKETS,
    PlanError,
    PlanRequest,
    block_loss_distribution,
    block_span,
    effective_code,
    effective_k,
    evaluate,
    evaluate_repair_range,
    iid_block_failure,
    iid_residual_loss,
    parse_int_list,
    plan,
)
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.wire import RepairPacket, SourcePacket, parse

CODES = [(1, 1), (4, 1), (8, 2), (16, 4), (10, 5), (32, 8), (64, 16), (200, 55)]
LOSSES = [0.001, 0.01, 0.05, 0.2, 0.5]


# -- independent losses against scipy ---------------------------------------------------------------


@pytest.mark.parametrize("k,m", CODES)
@pytest.mark.parametrize("p", LOSSES)
def test_iid_closed_forms_match_scipy(k, m, p):
    # scipy.stats.binom as oracle: block failure = P[Bin(n, p) > n − k] = binom.sf(n − k, n, p);
    # residual = p·P[Bin(n − 1, p) ≥ n − k] = p·binom.sf(n − k − 1, n − 1, p).
    n = k + m
    assert iid_block_failure(k, m, p) == pytest.approx(binom.sf(n - k, n, p), rel=1e-10, abs=1e-300)
    assert iid_residual_loss(k, m, p) == pytest.approx(p * binom.sf(n - k - 1, n - 1, p), rel=1e-10, abs=1e-300)


@pytest.mark.parametrize("k,m", CODES)
@pytest.mark.parametrize("p", LOSSES)
@pytest.mark.parametrize("depth", [1, 3])
def test_memoryless_recursion_equals_binomial(k, m, p, depth):
    # With r = 1 − p the chain is memoryless (every row of T is the stationary law), so the
    # Gilbert–Elliott recursion must reproduce the binomial result exactly (to rounding), at any
    # interleave depth.  scipy.stats.binom as oracle.
    n = k + m
    figures = evaluate(GilbertElliott.bernoulli(p), k, m, depth)
    assert figures.block_failure == pytest.approx(binom.sf(n - k, n, p), abs=1e-12, rel=1e-9)
    assert figures.residual_loss == pytest.approx(p * binom.sf(n - k - 1, n - 1, p), abs=1e-12, rel=1e-9)


def test_memoryless_with_partial_emissions_is_binomial_in_average_loss():
    # p + r = 1 with loss_good, loss_bad in (0, 1): packets are i.i.d. with the average loss.
    channel = GilbertElliott(p=0.3, r=0.7, loss_good=0.02, loss_bad=0.4)
    q = channel.average_loss
    for k, m in [(8, 2), (16, 4)]:
        n = k + m
        figures = evaluate(channel, k, m)
        assert figures.block_failure == pytest.approx(binom.sf(m, n, q), abs=1e-12)
        assert figures.residual_loss == pytest.approx(q * binom.sf(m - 1, n - 1, q), abs=1e-12)


def test_deep_interleaving_tends_to_independent_losses():
    # T^D → stationary rows as D → ∞ (|1 − p − r| < 1), so a deeply interleaved block sees
    # independent losses at the average rate: the binomial result (scipy.stats.binom).
    channel = GilbertElliott.from_loss_burst(0.05, 5)
    k, m = 16, 4
    deep = evaluate(channel, k, m, depth=10_000)
    assert deep.residual_loss == pytest.approx(0.05 * binom.sf(m - 1, k + m - 1, 0.05), rel=1e-9)
    shallow = evaluate(channel, k, m, depth=1)
    assert shallow.residual_loss > 10 * deep.residual_loss  # bursts dominate without interleaving


def test_repair_range_is_consistent_and_monotone():
    channel = GilbertElliott(p=0.02, r=0.25, loss_good=0.005, loss_bad=0.8)
    rows = evaluate_repair_range(channel, 12, 12, depth=2)
    assert [f.m for f in rows] == list(range(13))
    for f in rows:
        single = evaluate(channel, 12, f.m, depth=2)
        assert single.residual_loss == pytest.approx(f.residual_loss, rel=1e-12, abs=1e-300)
    residuals = [f.residual_loss for f in rows]
    assert all(a >= b for a, b in itertools.pairwise(residuals))
    # m = 0: nothing is recovered, residual = the average loss; block failure = P(any loss).
    assert rows[0].residual_loss == pytest.approx(channel.average_loss, rel=1e-12)


def test_small_case_by_enumeration():
    # Brute force over all 2^n loss patterns with the chain's path probabilities (exhaustive sum,
    # independent of the recursion): k = 3, m = 2, general Gilbert–Elliott, depth 2.
    import itertools

    channel = GilbertElliott(p=0.1, r=0.3, loss_good=0.05, loss_bad=0.9)
    k, m, depth = 3, 2, 2
    t = np.linalg.matrix_power(channel.transition_matrix(1), depth)
    pi = [1 - channel.stationary_bad, channel.stationary_bad]
    e = [channel.loss_good, channel.loss_bad]
    failure = residual = 0.0
    n = k + m
    for states in itertools.product([0, 1], repeat=n):
        path = pi[states[0]] * np.prod([t[a, b] for a, b in itertools.pairwise(states)])
        for lost in itertools.product([0, 1], repeat=n):
            prob = path * np.prod([e[s] if x else 1 - e[s] for s, x in zip(states, lost, strict=True)])
            if sum(lost) > m:
                failure += prob
                residual += prob * sum(lost[:k]) / k
    figures = evaluate(channel, k, m, depth)
    assert figures.block_failure == pytest.approx(failure, rel=1e-12)
    assert figures.residual_loss == pytest.approx(residual, rel=1e-12)


# -- Monte Carlo ---------------------------------------------------------------------------------------

MONTE_CARLO = [
    # (k, m, depth, channel)
    (8, 2, 1, GilbertElliott.from_loss_burst(0.1, 3)),
    (16, 4, 1, GilbertElliott.from_loss_burst(0.05, 1)),
    (4, 1, 2, GilbertElliott.bernoulli(0.2)),
    (10, 4, 4, GilbertElliott.from_loss_burst(0.1, 5)),
    (6, 3, 3, GilbertElliott(p=0.02, r=0.2, loss_good=0.01, loss_bad=0.7)),
    (20, 6, 8, GilbertElliott.from_loss_burst(0.15, 8)),
]


def simulate(channel: GilbertElliott, k: int, m: int, depth: int, groups: int, seed) -> tuple[np.ndarray, np.ndarray]:
    """Per-block (failed, unrecovered source packets) from one long seeded run of the link.

    Interleaving as the planner models it: D blocks at a time, packet i of block b at link
    position i·D + b of the group.
    """
    n = k + m
    lost = GilbertElliottChannel(channel, seed=seed).losses(groups * n * depth)
    blocks = lost.reshape(groups, n, depth).transpose(0, 2, 1).reshape(groups * depth, n)
    total = blocks.sum(axis=1)
    failed = total > m
    unrecovered = np.where(failed, blocks[:, :k].sum(axis=1), 0)
    return failed, unrecovered


@pytest.mark.parametrize("k,m,depth,channel", MONTE_CARLO)
def test_recursion_agrees_with_monte_carlo(k, m, depth, channel):
    # Seeded Monte Carlo with our channel (itself checked against its configuration in
    # test_channel.py).  Neighbouring blocks are correlated on a bursty link, so the standard
    # error comes from batch means over 50 long batches, not from the naive binomial formula.
    groups = max(1, 200_000 // depth)
    failed, unrecovered = simulate(channel, k, m, depth, groups, seed=f"mc {k} {m} {depth}")
    batches = 50
    size = failed.size // batches
    fail_batches = failed[: size * batches].reshape(batches, size).mean(axis=1)
    resid_batches = unrecovered[: size * batches].reshape(batches, size).mean(axis=1) / k
    figures = evaluate(channel, k, m, depth)
    for estimates, exact in ((fail_batches, figures.block_failure), (resid_batches, figures.residual_loss)):
        se = estimates.std(ddof=1) / math.sqrt(batches)
        assert se > 0, "the Monte Carlo saw no failures: pick a harsher channel"
        assert abs(estimates.mean() - exact) < 4 * se, (estimates.mean(), exact, se)


# -- planning -------------------------------------------------------------------------------------------


def test_effective_k_at_low_rates():
    assert effective_k(32, rate=10, flush=0.5) == 5  # 10/s for 0.5 s: 5 datagrams
    assert effective_k(32, rate=10, flush=0.5, depth=5) == 1
    assert effective_k(8, rate=1000, flush=0.5) == 8
    assert effective_k(8, rate=None, flush=None) == 8
    assert effective_k(32, rate=30, flush=0.25) == 8  # datagrams at 0..7/30 s, all before 0.25 s
    assert block_span(32, 8, rate=30, flush=0.25) == 0.25  # closed by the timer
    assert block_span(8, 8, rate=100, flush=0.25) == pytest.approx(0.07)  # closed by its 8th datagram


@pytest.mark.parametrize("rule", ["proportional", "full"])
def test_effective_code_is_the_encoders_rule(rule):
    # The planner must price the block the sender really sends: compare with the encoder's own
    # EncoderSettings.repair_for over a grid of codes and short-block sizes.
    for k in (1, 2, 3, 5, 8, 13, 16, 32, 100):
        for m in sorted({0, 1, 2, k // 4, k // 2, k}):
            settings = EncoderSettings(block_size=k, repair=m, short_block_repair=rule)
            for fits in range(1, k + 2):
                k_eff, m_eff = effective_code(k, m, rate=fits, flush=1.0, rule=rule)
                assert k_eff == min(k, fits)
                assert m_eff == settings.repair_for(k_eff), (k, m, fits)


def test_effective_code_matches_blocks_a_real_encoder_sends():
    # Sans-IO, fake clock: 30 datagrams/s into a k=16, m=4 sender with a 250 ms flush.  The block
    # takes the datagrams at 0, 1/30, …, 7/30 s (< 0.25 s): ceil(30·0.25) = 8, and ceil(4·8/16) = 2
    # repair packets.
    encoder = BlockEncoder(EncoderSettings(block_size=16, repair=4, flush_interval=0.25), session=1)
    sources: dict[int, int] = {}
    repairs: dict[int, int] = {}
    now = 0.0
    for i in range(300):
        now = i / 30 + 1e-6  # just after each tick, so a datagram due with the deadline is not in it
        packets = encoder.on_timer(now) + encoder.send(b"reading %d" % i, 1, now)
        for data in packets:
            pkt = parse(data, max_datagram=1400)
            counts = sources if isinstance(pkt, SourcePacket) else repairs
            assert isinstance(pkt, (SourcePacket, RepairPacket))
            counts[pkt.sbn] = counts.get(pkt.sbn, 0) + 1
    closed = sorted(repairs)[1:-1]  # whole blocks only
    assert closed
    k_eff, m_eff = effective_code(16, 4, rate=30, flush=0.25)
    assert (k_eff, m_eff) == (8, 2)
    assert {sources[sbn] for sbn in closed} == {k_eff} and {repairs[sbn] for sbn in closed} == {m_eff}


def test_plan_prices_short_blocks_by_the_rule():
    # 14 datagrams/s with a 500 ms flush: blocks hold at most 7.  Every row's figures are those
    # of its effective code, and its overhead is what the link carries, m'/k'.
    for rule in ("proportional", "full"):
        request = PlanRequest(
            channel=GilbertElliott.from_loss_burst(0.03, 2),
            rate=14,
            latency_budget=0.8,
            flush=0.5,
            max_overhead=0.6,
            target=1e-2,
            k_values=(4, 8, 16, 32),
            short_block_repair=rule,
        )
        result = plan(request)
        for c in result.candidates:
            assert (c.k_effective, c.m_effective) == effective_code(c.k, c.m, 14, 0.5, rule=rule)
            exact = evaluate(request.channel, c.k_effective, c.m_effective)
            assert c.residual_loss == exact.residual_loss
            assert c.overhead == c.m_effective / c.k_effective <= 0.6 + 1e-9
        assert any(c.short for c in result.candidates)


def test_block_loss_distribution():
    # Memoryless case: source and repair losses are independent binomials (scipy.stats.binom).
    p, k, m = 0.1, 8, 3
    dist = block_loss_distribution(GilbertElliott.bernoulli(p), k, m)
    expected = np.outer(binom.pmf(np.arange(k + 1), k, p), binom.pmf(np.arange(m + 1), m, p))
    assert dist == pytest.approx(expected, abs=1e-14)
    bursty = GilbertElliott.from_loss_burst(0.08, 2)
    dist = block_loss_distribution(bursty, k, m)
    assert dist.sum() == pytest.approx(1.0, abs=1e-12)
    fails = np.add.outer(np.arange(k + 1), np.arange(m + 1)) > m
    residual = (dist * np.arange(k + 1)[:, None])[fails].sum() / k
    assert residual == pytest.approx(evaluate(bursty, k, m).residual_loss, rel=1e-12)


def test_plan_recommends_the_cheapest_acceptable():
    request = PlanRequest(
        channel=GilbertElliott.from_loss_burst(0.05, 2),
        rate=100,
        latency_budget=0.4,
        max_overhead=0.5,
        target=1e-3,
        depths=(1, 2, 4),
    )
    result = plan(request)
    acceptable = [c for c in result.candidates if c.acceptable]
    assert acceptable and result.recommended in acceptable
    best = result.recommended
    assert all(best.overhead <= c.overhead + 1e-12 for c in acceptable)
    assert all(c.span <= 0.4 + 1e-9 and c.m_effective <= c.k_effective * 0.5 + 1e-9 for c in result.candidates)
    # The recommended row's figures are the exact ones for its effective code.
    exact = evaluate(request.channel, best.k_effective, best.m, best.depth)
    assert best.residual_loss == exact.residual_loss


def test_plan_without_a_solution():
    request = PlanRequest(
        channel=GilbertElliott.from_loss_burst(0.3, 10), rate=50, latency_budget=0.1, max_overhead=0.2, target=1e-6
    )
    result = plan(request)
    assert result.recommended is None and result.candidates


def test_plan_needs_no_fec_on_a_clean_link():
    request = PlanRequest(
        channel=GilbertElliott.bernoulli(1e-5), rate=50, latency_budget=0.2, max_overhead=0.5, target=1e-3
    )
    assert plan(request).recommended.m == 0


@pytest.mark.parametrize(
    "kwargs,message",
    [
        (dict(rate=0), "rate"),
        (dict(latency_budget=-1), "latency"),
        (dict(max_overhead=1.5), "RFC 6363"),
        (dict(target=0), "target"),
        (dict(k_values=(0,)), "k must be"),
        (dict(depths=(0,)), "depth"),
        (dict(k_values=(300,)), "255"),
    ],
)
def test_plan_request_validation(kwargs, message):
    base = dict(channel=GilbertElliott.bernoulli(0.1), rate=10.0, latency_budget=0.5, max_overhead=0.5, target=1e-3)
    base.update(kwargs)
    with pytest.raises(PlanError, match=message):
        PlanRequest(**base)


def test_code_limits():
    with pytest.raises(PlanError, match="RFC 5510"):
        evaluate(GilbertElliott.bernoulli(0.1), MAX_BLOCK_PACKETS, 1)
    assert parse_int_list("1,2,8-10") == (1, 2, 8, 9, 10)
    with pytest.raises(PlanError):
        parse_int_list("a,b")
