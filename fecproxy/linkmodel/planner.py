"""Residual loss of a systematic (k + m, k) MDS block code on a lossy link, exactly; and code choice.

Pure math, no simulation: the answer must be reproducible and cheap enough to scan hundreds of
candidate codes in a fraction of a second.

* Independent losses with probability p (binomial): a block of n = k + m fails when more than m
  of its n packets are lost, P = Σ_{j>m} C(n,j) p^j (1−p)^(n−j); a source packet is unrecoverable
  when it is lost and at least m of the other n − 1 are too, so residual = p·P[Bin(n−1, p) ≥ m].
* Gilbert–Elliott: the forward recursion over (channel state, losses so far) along the n positions
  of a block (Cidon, Khamisy & Sidi, IEEE Trans. Inf. Theory 39(1), 1993; applied to packet FEC by
  Frossard, IEEE Commun. Lett. 5(3), 2001).  The k source packets come first, then the m repair
  packets — the order our sender transmits — so the recursion tracks lost *source* packets and lost
  repair packets separately.  The chain starts in its stationary distribution.
* Interleaving depth D: a block's packets sit D positions apart on the link, so the recursion steps
  with the D-step transition matrix T^D.
  The sender lays blocks out that way (fec.interleave: D lanes per size class, a round's repair
  packets interleaved too), and supports D up to :data:`SENDER_MAX_INTERLEAVE`; a plan offers no
  deeper interleaving than that.
* Bytes: repair packets are as long as the block's longest datagram, so with datagram sizes given
  (mean, max) the byte overhead m'·(repair header + prefix + max) / k'·(source header + mean) is
  reported and budgeted, and m' is cut as the sender's RFC 6363 §8.2 byte rule cuts it.
* Short blocks: when the datagram rate cannot fill k datagrams before the sender's flush timer, a
  block closes with k' < k datagrams and gets m' repair packets by the sender's own short-block
  rule (:func:`fecproxy.protocol.repair_rule.repair_count`, the function the encoder calls), so the code
  evaluated is (k', m'), not (k, m).

Residual loss = E[source packets lost and not recovered] / k, where a lost source packet is
unrecoverable exactly when its block has more than m losses in total (MDS: any k packets rebuild it).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from fecproxy.linkmodel.airtime import LinkBudget
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.protocol import wire
from fecproxy.protocol.encoder import MAX_INTERLEAVE, repair_byte_cap
from fecproxy.protocol.repair_rule import DEFAULT_SHORT_BLOCK_REPAIR, SHORT_BLOCK_RULES, repair_count

#: RFC 5510 §8.2: with GF(2^8) a block has at most 255 encoding symbols (source + repair).
MAX_BLOCK_PACKETS = 255
#: RFC 6363 §8.2: the repair rate should never exceed the source rate, so m ≤ k (overhead ≤ 1).
MAX_OVERHEAD = 1.0
#: Source block sizes scanned when the user names none: dense where codes are cheap to run and
#: delays short, sparser above 16 where each step mostly trades delay for overhead.
DEFAULT_K_VALUES = (1, 2, 3, 4, 5, 6, 8, 10, 12, 16, 20, 24, 32, 40, 48, 64, 96, 128)
#: The sender's default short-block rule (config ``fec.short_block_repair``), so a plan made without
#: saying otherwise describes a sender run with its defaults.
DEFAULT_SHORT_BLOCK_RULE = DEFAULT_SHORT_BLOCK_REPAIR.value
#: Budgets assumed when the operator states none (``fecproxy plan`` and the daemon's status page
#: share them, so both recommend the same code for the same link): half a second of recovery wait
#: suits telemetry and interactive control, half again as much airtime is what a licensed data
#: radio can usually spare, and 1 in 1000 lost is the residual loss our alerts treat as a problem
#: (common practice, no source).
DEFAULT_LATENCY_BUDGET_S = 0.5
DEFAULT_MAX_OVERHEAD = 0.5
DEFAULT_TARGET = 1e-3
#: The deepest interleaving the sender can apply (fec.interleave); the planner offers no more.
SENDER_MAX_INTERLEAVE = MAX_INTERLEAVE
#: Relative slack when comparing overheads and spans to budgets, so that m/k = 0.25 exactly
#: meets a budget of 0.25 despite binary floating point.
_BUDGET_SLACK = 1e-9


class PlanError(ValueError):
    """Planner inputs that cannot describe a code or a link."""


@dataclass(frozen=True)
class CodeFigures:
    """Exact loss figures of one code (k source + m repair, interleave depth D) on one channel."""

    k: int
    m: int
    depth: int
    block_failure: float
    residual_loss: float

    @property
    def overhead(self) -> float:
        return self.m / self.k


def _check_code(k: int, m: int, depth: int = 1) -> None:
    if not (isinstance(k, int) and k >= 1):
        raise PlanError(f"k must be an integer ≥ 1, got {k!r}")
    if not (isinstance(m, int) and m >= 0):
        raise PlanError(f"m must be an integer ≥ 0, got {m!r}")
    if k + m > MAX_BLOCK_PACKETS:
        raise PlanError(f"k + m = {k + m} exceeds {MAX_BLOCK_PACKETS} packets per block (RFC 5510 §8.2, GF(2^8))")
    if not (isinstance(depth, int) and depth >= 1):
        raise PlanError(f"interleave depth must be an integer ≥ 1, got {depth!r}")


def _binomial_upper_tail(n: int, p: float, at_least: int) -> float:
    """P[Bin(n, p) ≥ at_least], summed term by term from the tail (no 1 − x cancellation)."""
    if at_least <= 0:
        return 1.0
    if at_least > n:
        return 0.0
    return math.fsum(math.comb(n, j) * p**j * (1.0 - p) ** (n - j) for j in range(at_least, n + 1))


def iid_block_failure(k: int, m: int, loss: float) -> float:
    """P[more than m of the n = k + m packets lost] under independent loss."""
    _check_code(k, m)
    return _binomial_upper_tail(k + m, loss, m + 1)


def iid_residual_loss(k: int, m: int, loss: float) -> float:
    """p·P[Bin(n − 1, p) ≥ m]: a source packet is lost and so are at least m of the others."""
    _check_code(k, m)
    return loss * _binomial_upper_tail(k + m - 1, loss, m)


def _block_loss_counts(channel: GilbertElliott, k: int, max_m: int, depth: int = 1) -> Iterator[tuple[int, np.ndarray]]:
    """Yield (m, P[i, l]) for m = 0..max_m: the probability that a block of k source and m repair
    packets loses i source and l repair packets — the forward recursion along the block.

    A block with m repair packets is the first k + m positions of one with max_m, so one pass
    gives every m.  Internally prob[s, i, l] = P(chain in state s at the current position, i source
    and l repair packets lost so far).
    """
    _check_code(k, max_m, depth)
    step = channel.transition_matrix(depth)
    pi = np.array([1.0 - channel.stationary_bad, channel.stationary_bad])
    emit = np.array([channel.loss_good, channel.loss_bad])

    # Phase 1: the k source positions; prob[s, i].
    prob = np.zeros((2, k + 1))
    prob[:, 0] = pi * (1.0 - emit)
    prob[:, 1] = pi * emit
    for _ in range(1, k):
        moved = step.T @ prob
        prob = moved * (1.0 - emit)[:, None]
        prob[:, 1:] += moved[:, :-1] * emit[:, None]
    yield 0, prob.sum(axis=0)[:, None]

    # Phase 2: the repair positions; joint[s, i, l].
    joint = np.zeros((2, k + 1, max_m + 1))
    joint[:, :, 0] = prob
    for m in range(1, max_m + 1):
        moved = np.tensordot(step.T, joint, axes=1)
        joint = moved * (1.0 - emit)[:, None, None]
        joint[:, :, 1:] += moved[:, :, :-1] * emit[:, None, None]
        yield m, joint.sum(axis=0)[:, : m + 1]


def block_loss_distribution(channel: GilbertElliott, k: int, m: int, depth: int = 1) -> np.ndarray:
    """P[i, l]: a block of (k, m) loses i of its source and l of its repair packets (exact).

    The block fails when i + l > m and then i datagrams stay lost, so moments of the residual
    (e.g. the variance a test run must allow for) follow directly.
    """
    *_, (_, counts) = _block_loss_counts(channel, k, m, depth)
    distribution: np.ndarray = counts
    return distribution


def evaluate_repair_range(channel: GilbertElliott, k: int, max_m: int, depth: int = 1) -> list[CodeFigures]:
    """Figures for (k, m, depth) for every m in 0..max_m, from one pass of the recursion."""
    source_lost = np.arange(k + 1)[:, None]
    figures = []
    for m, counts in _block_loss_counts(channel, k, max_m, depth):
        failing = source_lost + np.arange(m + 1)[None, :] > m
        figures.append(
            CodeFigures(
                k=k,
                m=m,
                depth=depth,
                block_failure=float(counts[failing].sum()),
                residual_loss=float((counts * source_lost)[failing].sum() / k),
            )
        )
    return figures


def evaluate(channel: GilbertElliott, k: int, m: int, depth: int = 1) -> CodeFigures:
    """Exact block failure and residual loss of one code on a Gilbert–Elliott channel."""
    return evaluate_repair_range(channel, k, m, depth)[m]


def effective_k(k: int, rate: float | None, flush: float | None, depth: int = 1) -> int:
    """Source packets a block really holds when the sender closes it ``flush`` seconds after opening.

    Evenly paced datagrams: the block opens with a datagram at time 0 and takes the ones at
    D/rate, 2·D/rate, … (interleave depth D: every D-th datagram) strictly before the deadline,
    as the encoder's timer closes the block before a datagram arriving exactly at it — so
    ceil(rate·flush/D) of them, at most k.  The repair count of such a short block is
    :func:`effective_code`'s business.
    """
    if rate is None or flush is None:
        return k
    fits = math.ceil(rate * flush / depth - _BUDGET_SLACK)
    return max(1, min(k, fits))


def block_span(k: int, k_effective: int, rate: float, flush: float, depth: int = 1) -> float:
    """Seconds from a block's first datagram to its repair packets: the longest a rebuilt datagram
    waits.  A full block closes with its k-th datagram, (k − 1)·D/rate after the first; one the
    flush timer closes short waits the whole flush time."""
    if k_effective < k:
        return flush
    return (k_effective - 1) * depth / rate


def effective_code(
    k: int, m: int, rate: float | None, flush: float | None, depth: int = 1, rule: str = DEFAULT_SHORT_BLOCK_RULE
) -> tuple[int, int]:
    """(k', m'): the block the sender really sends for a configured (k, m) at this rate and flush time.

    m' comes from the encoder's own rule (fecproxy.protocol.repair_rule), not a copy of it: proportional
    gives ceil(m·k'/k), at least 1 when m > 0; full gives m.
    """
    _check_code(k, m, depth)
    if rule not in SHORT_BLOCK_RULES:
        raise PlanError(f"short-block rule must be one of {', '.join(SHORT_BLOCK_RULES)}, got {rule!r}")
    k_eff = effective_k(k, rate, flush, depth)
    return k_eff, repair_count(k, m, k_eff, rule)


@dataclass(frozen=True)
class PlanRequest:
    """What the operator knows about the link and wants from the code; validated once here."""

    channel: GilbertElliott
    rate: float  # datagrams per second offered to the sender
    latency_budget: float  # seconds a recovered datagram may wait for its block
    max_overhead: float  # m/k
    target: float  # residual datagram loss to reach
    k_values: tuple[int, ...] = DEFAULT_K_VALUES
    depths: tuple[int, ...] = (1,)
    flush: float | None = None  # seconds the sender keeps a block open; None = the latency budget
    short_block_repair: str = DEFAULT_SHORT_BLOCK_RULE  # the sender's fec.short_block_repair
    mean_bytes: float | None = None  # mean datagram size of the flow (its size class); None = bytes not modelled
    max_bytes: int | None = None  # longest datagram of the flow: the length of every repair symbol
    max_byte_overhead: float | None = None  # repair bytes / source bytes on the link; None = no byte budget
    allow_repair_above_source: bool = False  # the sender's fec.allow_repair_above_source: overheads above 1
    budget: LinkBudget | None = None  # the air rate and bursts (plan --link-rate); None = rate not modelled

    def __post_init__(self) -> None:
        if not (math.isfinite(self.rate) and self.rate > 0):
            raise PlanError(f"datagram rate must be > 0 per second, got {self.rate!r}")
        if not (math.isfinite(self.latency_budget) and self.latency_budget > 0):
            raise PlanError(f"latency budget must be > 0 seconds, got {self.latency_budget!r}")
        ceiling = MAX_BLOCK_PACKETS - 1 if self.allow_repair_above_source else MAX_OVERHEAD
        if not (0 <= self.max_overhead <= ceiling):
            if self.allow_repair_above_source or not math.isfinite(self.max_overhead) or self.max_overhead < 0:
                raise PlanError(f"max overhead must be in [0, {ceiling:g}], got {self.max_overhead!r}")
            raise PlanError(
                f"max overhead must be in [0, {MAX_OVERHEAD:g}] (RFC 6363 §8.2: repair rate never above the "
                f"source rate), got {self.max_overhead!r}; above 1 needs the sender's fec.allow_repair_above_source "
                "(--allow-repair-above-source)"
            )
        if not (0 < self.target < 1):
            raise PlanError(f"target residual loss must be in (0, 1), got {self.target!r}")
        if not self.k_values or not self.depths:
            raise PlanError("need at least one k and one interleave depth to consider")
        for k in self.k_values:
            if not 1 <= k < MAX_BLOCK_PACKETS:
                raise PlanError(
                    f"k = {k} is out of range: k must be 1..{MAX_BLOCK_PACKETS - 1}, since a block of k source "
                    f"and at least one repair packet has at most {MAX_BLOCK_PACKETS} packets (RFC 5510 §8.2, GF(2^8))"
                )
        for depth in self.depths:
            _check_code(1, 0, depth)
            if depth > SENDER_MAX_INTERLEAVE:
                raise PlanError(
                    f"interleave depth {depth} is more than the sender supports (fec.interleave ≤ "
                    f"{SENDER_MAX_INTERLEAVE})"
                )
        if (self.mean_bytes is None) != (self.max_bytes is None):
            raise PlanError("datagram sizes need both the mean and the longest size")
        if self.mean_bytes is not None and self.max_bytes is not None:
            if not (
                math.isfinite(self.mean_bytes) and 0 <= self.mean_bytes <= self.max_bytes <= wire.MAX_DATAGRAM_LIMIT
            ):
                raise PlanError(
                    f"datagram sizes must satisfy 0 ≤ mean ≤ max ≤ {wire.MAX_DATAGRAM_LIMIT} bytes, "
                    f"got mean {self.mean_bytes!r} and max {self.max_bytes!r}"
                )
        if self.max_byte_overhead is not None:
            if self.mean_bytes is None:
                raise PlanError("a byte overhead budget needs the datagram sizes (mean and max bytes)")
            if not (0 <= self.max_byte_overhead <= ceiling):
                raise PlanError(
                    f"max byte overhead must be in [0, {MAX_OVERHEAD:g}] (RFC 6363 §8.2: repair bytes never above "
                    f"the source bytes), got {self.max_byte_overhead!r}"
                )
        if self.flush is not None and not (math.isfinite(self.flush) and self.flush > 0):
            raise PlanError(f"flush time must be > 0 seconds, got {self.flush!r}")
        if self.short_block_repair not in SHORT_BLOCK_RULES:
            raise PlanError(
                f"short-block rule must be one of {', '.join(SHORT_BLOCK_RULES)}, got {self.short_block_repair!r}"
            )
        object.__setattr__(self, "k_values", tuple(sorted(set(self.k_values))))
        object.__setattr__(self, "depths", tuple(sorted(set(self.depths))))

    def block_fill(self, k: int, depth: int = 1) -> int:
        """Datagrams a block really holds: a burst (budget.burst_datagrams) fills blocks to k at
        once whatever the average rate; otherwise the flush timer decides (:func:`effective_k`)."""
        burst = None if self.budget is None else self.budget.burst_datagrams
        if burst is not None:
            return max(1, min(k, burst // depth))
        return effective_k(k, self.rate, self.flush_time, depth)

    @property
    def flush_time(self) -> float:
        return self.latency_budget if self.flush is None else self.flush

    @property
    def bytes_modelled(self) -> bool:
        return self.mean_bytes is not None

    def byte_capped(self, k_effective: int, m_effective: int) -> int:
        """m' as the sender's RFC 6363 §8.2 byte rule leaves it for a block of mean-sized
        datagrams with one of the longest (the symbol length); unchanged without sizes."""
        if self.mean_bytes is None or self.max_bytes is None or self.allow_repair_above_source:
            return m_effective
        prefix = wire.SYMBOL_PREFIX_BYTES
        content = int(k_effective * (prefix + self.mean_bytes))
        return repair_byte_cap(m_effective, content, prefix + self.max_bytes)

    def byte_overhead(self, k_effective: int, m_effective: int) -> float | None:
        """Repair bytes per source byte on the link, headers included; None without sizes."""
        if self.mean_bytes is None or self.max_bytes is None:
            return None
        repair = m_effective * (wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + self.max_bytes)
        return repair / (k_effective * (wire.SOURCE_HEADER_BYTES + self.mean_bytes))


@dataclass(frozen=True)
class Candidate:
    """One row of the plan: a code as configured (k, m) and as the sender really sends it at this
    rate (k_effective, m_effective: the short block its flush timer closes, and that block's repair)."""

    k: int
    k_effective: int
    m: int
    m_effective: int
    depth: int
    block_failure: float
    residual_loss: float
    span: float  # seconds from a block's first datagram to its repair: see block_span
    meets_target: bool
    within_latency: bool
    within_overhead: bool
    byte_overhead: float | None = None  # repair bytes / source bytes, when datagram sizes are given
    within_byte_overhead: bool = True
    source_air: float | None = None  # share of link.rate the source packets take (with --link-rate)
    repair_air: float | None = None  # share of link.rate the repair packets take
    burst_delay: float | None = None  # seconds a burst's last datagram waits in the pacer
    within_air: bool = True  # source + repair fit the air rate
    within_queue: bool = True  # a burst and its repair fit the pacer's queue (link.queue_ms)

    @property
    def overhead(self) -> float:
        """Repair packets per source packet as they go on the link: m'/k'."""
        return self.m_effective / self.k_effective

    @property
    def short(self) -> bool:
        """True when the rate cannot fill a block before the flush timer closes it."""
        return self.k_effective < self.k

    @property
    def acceptable(self) -> bool:
        return (
            self.meets_target
            and self.within_latency
            and self.within_overhead
            and self.within_byte_overhead
            and self.within_air
            and self.within_queue
        )

    def config_keys(self) -> dict[str, int | bool]:
        """The sender's config keys that apply this row (fec.*)."""
        keys: dict[str, int | bool] = {"fec.block_size": self.k, "fec.repair": self.m, "fec.interleave": self.depth}
        if self.m > self.k or self.m_effective > self.k_effective:
            keys["fec.allow_repair_above_source"] = True
        return keys

    def as_dict(self) -> dict[str, Any]:
        return {
            "k": self.k,
            "k_effective": self.k_effective,
            "m": self.m,
            "m_effective": self.m_effective,
            "depth": self.depth,
            "overhead": self.overhead,
            "block_failure": self.block_failure,
            "residual_loss": self.residual_loss,
            "block_span_ms": self.span * 1000.0,
            "meets_target": self.meets_target,
            "within_latency": self.within_latency,
            "within_overhead": self.within_overhead,
            "byte_overhead": self.byte_overhead,
            "within_byte_overhead": self.within_byte_overhead,
            "source_air": self.source_air,
            "repair_air": self.repair_air,
            "burst_delay_ms": None if self.burst_delay is None else self.burst_delay * 1000.0,
            "within_air": self.within_air,
            "within_queue": self.within_queue,
            "acceptable": self.acceptable,
            "config": self.config_keys(),
        }


@dataclass(frozen=True)
class Plan:
    request: PlanRequest
    candidates: list[Candidate] = field(default_factory=list)
    recommended: Candidate | None = None


def _cost(c: Candidate) -> tuple[float, float, int, int, int]:
    """Cheapest first: lowest overhead, then lowest added delay, then the simpler code."""
    return (round(c.overhead, 12), round(c.span, 12), c.k_effective, c.depth, c.k)


def make_candidate(request: PlanRequest, k: int, m: int, figures: CodeFigures) -> Candidate:
    """A plan row for configured (k, m) whose effective code (k', m') has ``figures``."""
    link = request.budget
    if link is not None and link.burst_datagrams is not None:
        # A burst's block: its datagrams arrive together and leave at the air rate, so the block
        # spans its k'·D source packets' air time (a short remainder block waits for the flush).
        span = (
            request.flush_time
            if figures.k < k and figures.k * figures.depth < link.burst_datagrams
            else (figures.k * figures.depth - 1) * link.source_wire_bytes / link.rate_bytes
        )
    else:
        span = block_span(k, figures.k, request.rate, request.flush_time, figures.depth)
    byte_overhead = request.byte_overhead(figures.k, figures.m)
    budget = request.max_byte_overhead
    source_air = repair_air = burst_delay = None
    within_air = within_queue = True
    if link is not None:
        source_air = link.source_use(request.rate)
        repair_air = link.repair_use(request.rate, figures.k, figures.m)
        burst_delay = link.burst_delay(k, m)
        within_air = source_air + repair_air <= 1.0 + _BUDGET_SLACK
        within_queue = link.burst_source_fits() and link.burst_fits(k, m)
    return Candidate(
        k=k,
        k_effective=figures.k,
        m=m,
        m_effective=figures.m,
        depth=figures.depth,
        block_failure=figures.block_failure,
        residual_loss=figures.residual_loss,
        span=span,
        meets_target=figures.residual_loss <= request.target,
        within_latency=span <= request.latency_budget * (1 + _BUDGET_SLACK),
        within_overhead=figures.overhead <= request.max_overhead + _BUDGET_SLACK,
        byte_overhead=byte_overhead,
        within_byte_overhead=budget is None or byte_overhead is None or byte_overhead <= budget + _BUDGET_SLACK,
        source_air=source_air,
        repair_air=repair_air,
        burst_delay=burst_delay,
        within_air=within_air,
        within_queue=within_queue,
    )


def plan(request: PlanRequest) -> Plan:
    """One row per (k, D): the fewest configured repair packets m whose effective code (k', m')
    meets the target within the overhead budget, or — if none does — the largest m the budget
    allows (the best that k can do); then the cheapest acceptable row is recommended.  Rows whose
    effective code repeats an earlier one are dropped.

    The overhead budget applies to what goes on the link, m'/k': with the proportional rule
    rounding up, or the full rule, a short block carries more repair per datagram than m/k.
    """
    rows: list[Candidate] = []
    seen: set[tuple[int, int, int]] = set()
    rule = request.short_block_repair
    for depth in request.depths:
        for k in request.k_values:
            k_eff = request.block_fill(k, depth)
            max_m = min(math.floor(k * request.max_overhead + _BUDGET_SLACK), MAX_BLOCK_PACKETS - k)
            m_eff = {m: request.byte_capped(k_eff, repair_count(k, m, k_eff, rule)) for m in range(max_m + 1)}
            in_budget = [m for m in range(max_m + 1) if m_eff[m] <= k_eff * request.max_overhead + _BUDGET_SLACK]
            byte_budget = request.max_byte_overhead
            if byte_budget is not None:
                # byte_overhead is never None here: a byte budget needs the sizes (checked above).
                in_budget = [
                    m
                    for m in in_budget
                    if (request.byte_overhead(k_eff, m_eff[m]) or 0.0) <= byte_budget + _BUDGET_SLACK
                ] or [0]
            if request.budget is not None:
                fits = request.budget.source_use(request.rate)
                in_budget = [
                    m
                    for m in in_budget
                    if fits + request.budget.repair_use(request.rate, k_eff, m_eff[m]) <= 1.0 + _BUDGET_SLACK
                ] or [0]
            options = evaluate_repair_range(request.channel, k_eff, max(m_eff[m] for m in in_budget), depth)
            chosen = next((m for m in in_budget if options[m_eff[m]].residual_loss <= request.target), in_budget[-1])
            figures = options[m_eff[chosen]]
            key = (figures.k, figures.m, figures.depth)
            if key in seen:
                continue
            seen.add(key)
            rows.append(make_candidate(request, k, chosen, figures))
    rows.sort(key=lambda c: (c.depth, c.k))
    acceptable = [c for c in rows if c.acceptable]
    return Plan(request=request, candidates=rows, recommended=min(acceptable, key=_cost) if acceptable else None)


def parse_int_list(text: str | Sequence[int] | Iterable[int]) -> tuple[int, ...]:
    """'1,2,4' or '4-16' or a mix ('1,2,8-10') → a tuple of ints; raises PlanError on junk."""
    if not isinstance(text, str):
        return tuple(int(v) for v in text)
    values: list[int] = []
    for part in text.split(","):
        part = part.strip()
        if not part:
            continue
        try:
            if "-" in part:
                low, high = (int(x) for x in part.split("-", 1))
                if high < low or high - low > MAX_BLOCK_PACKETS:
                    raise ValueError
                values.extend(range(low, high + 1))
            else:
                values.append(int(part))
        except ValueError:
            raise PlanError(f"not a list of integers or ranges: {text!r}") from None
    if not values:
        raise PlanError(f"empty list: {text!r}")
    return tuple(values)
