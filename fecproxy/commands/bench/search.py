"""The pure half of ``fecproxy bench pipeline``: trials, the rate search and the printed result.

No processes, sockets or clocks here, so the search logic and the report are tested directly.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

#: Loss a trial may show and still count as carried: below 0.1 %, the pair is "loss-free".
LOSS_LIMIT = 0.001
#: A trial whose generator reached less than this share of the asked rate is generator-bound:
#: the machine cannot offer more, so the search stops there and says so.
GENERATOR_SHORTFALL = 0.95
#: Search: step up by this factor until a trial fails, then bisect (geometrically) until the
#: highest passing and lowest failing rates are within SEARCH_PRECISION of each other.
STEP_UP = 1.5
SEARCH_PRECISION = 0.05

#: Standard deviations of sampling noise allowed above the predicted residual loss (3σ: a trial
#: at a sustainable rate fails by chance about once in a few hundred; common practice, no source).
RESIDUAL_SIGMAS = 3.0


@dataclass(frozen=True)
class Trial:
    pipeline: str
    asked: float  # datagrams/s asked of the generator
    offered: float  # datagrams/s it actually sent
    sent: int
    received: int
    duplicates: int
    #: CPU time (user + system) each process spent during the trial, in µs per datagram sent:
    #: shows which stage limits the rate on a machine where all of them share the cores.
    cpu_us: dict[str, float] = field(default_factory=dict)
    #: Loss a trial may show and still pass: LOSS_LIMIT on a clean link; over an impaired link,
    #: the planner's predicted residual loss plus its sampling margin (:func:`residual_allowance`).
    loss_limit: float = LOSS_LIMIT

    @property
    def loss(self) -> float:
        return (self.sent - self.received) / self.sent if self.sent else 0.0

    @property
    def passed(self) -> bool:
        return self.loss < self.loss_limit

    @property
    def generator_bound(self) -> bool:
        return self.offered < GENERATOR_SHORTFALL * self.asked


def residual_allowance(predicted: float, sent: int, m: int) -> float:
    """Residual loss a trial of ``sent`` datagrams may show over the impaired link and still be
    "within the planner's prediction": the prediction plus RESIDUAL_SIGMAS standard deviations.

    Residual losses come in clumps (a failed block loses more than m packets at once, about
    m + 1), so the count of lost datagrams varies like a Poisson count of clumps of m + 1:
    variance ≈ predicted·(m + 1)/sent in loss-rate units.  A rough model, our own.
    """
    if sent <= 0:
        return predicted
    return predicted + RESIDUAL_SIGMAS * math.sqrt(predicted * (m + 1) / sent)


@dataclass
class RateSearch:
    """Step up until a trial fails, then bisect between the best pass and the lowest failure."""

    pipeline: str
    start: float
    ceiling: float
    best: float | None = None  # highest rate carried with < 0.1 % loss
    lowest_failure: float | None = None
    trials: list[Trial] = field(default_factory=list)
    stopped: str = ""  # why the search ended

    def next_rate(self) -> float | None:
        if self.stopped:
            return None
        if self.lowest_failure is None:
            if self.best is None:
                return self.start
            if self.best >= self.ceiling:
                self.stopped = "ceiling"
                return None
            return min(self.best * STEP_UP, self.ceiling)
        if self.best is None:
            return self.lowest_failure / STEP_UP
        if self.lowest_failure <= self.best * (1 + SEARCH_PRECISION):
            self.stopped = "converged"
            return None
        return math.sqrt(self.best * self.lowest_failure)

    def record(self, trial: Trial) -> None:
        self.trials.append(trial)
        if trial.passed:
            self.best = max(self.best or 0.0, trial.offered)
            if trial.generator_bound:
                self.stopped = "generator-bound"
        else:
            self.lowest_failure = min(self.lowest_failure or math.inf, trial.offered)
            if self.best is not None and self.lowest_failure <= self.best:
                # A noisy failure below a rate already carried: trust the carried rate, and try
                # just above it rather than abandoning the search.
                self.lowest_failure = self.best * (1 + 2 * SEARCH_PRECISION)


@dataclass(frozen=True)
class DelayFigures:
    path: str
    rate: float
    samples: int
    loss: float
    p50_us: float
    p99_us: float


@dataclass
class PipelineResult:
    datagram_bytes: int
    k: int
    m: int
    trial_seconds: float
    plain_rate: float | None
    pair_rate: float | None
    plain_stopped: str
    pair_stopped: str
    delays: list[DelayFigures]
    trials: list[Trial]
    #: Set when the run also searched the pair over an impaired link (``--loss``).
    link_loss: float | None = None
    link_burst: float | None = None
    predicted_residual: float | None = None
    lossy_rate: float | None = None
    lossy_stopped: str = ""
    #: The same pair and relay hop with no loss: the like-for-like reference for ``lossy_rate``.
    relayed_rate: float | None = None
    relayed_stopped: str = ""

    @property
    def lossy_ratio(self) -> float | None:
        """Highest rate over the impaired link / the same pair's clean-link rate, same run."""
        if not self.pair_rate or self.lossy_rate is None:
            return None
        return self.lossy_rate / self.pair_rate

    @property
    def lossy_over_relayed(self) -> float | None:
        """Highest rate over the impaired link / over the same relay hop without loss, same run."""
        if not self.relayed_rate or self.lossy_rate is None:
            return None
        return self.lossy_rate / self.relayed_rate

    @property
    def ratio(self) -> float | None:
        if not self.plain_rate or self.pair_rate is None:
            return None
        return self.pair_rate / self.plain_rate

    def best_trial(self, pipeline: str) -> Trial | None:
        """The passing trial at the highest rate: its CPU figures show what limits the rate."""
        passed = [t for t in self.trials if t.pipeline == pipeline and t.passed]
        return max(passed, key=lambda t: t.offered, default=None)

    def delay(self, path: str) -> DelayFigures | None:
        return next((d for d in self.delays if d.path == path), None)

    def as_dict(self) -> dict:
        out = {k: v for k, v in asdict(self).items() if k != "trials"}
        out["ratio"] = self.ratio
        out["lossy_ratio"] = self.lossy_ratio
        out["lossy_over_relayed"] = self.lossy_over_relayed
        out["trials"] = [dict(asdict(t), loss=t.loss, passed=t.passed) for t in self.trials]
        direct, pair = self.delay("direct"), self.delay("pair")
        if direct and pair:
            out["added_delay_us"] = dict(p50=pair.p50_us - direct.p50_us, p99=pair.p99_us - direct.p99_us)
        return out


def format_result(result: PipelineResult) -> str:
    def rate(value: float | None) -> str:
        return "none passed" if value is None else f"{value:,.0f}"

    lines = [
        f"pipeline benchmark: {result.datagram_bytes}-byte datagrams on 127.0.0.1, "
        f"highest rate with < {LOSS_LIMIT:.1%} loss, trials of {result.trial_seconds:g} s",
        f"{'path':<34} {'datagrams/s':>12}  {'trials':>6}  search ended by",
        f"{'plain relays ×2 (no FEC)':<34} {rate(result.plain_rate):>12}  "
        f"{sum(t.pipeline == 'plain' for t in result.trials):>6}  {result.plain_stopped}",
        f"{f'fecproxy pair k={result.k} m={result.m}':<34} {rate(result.pair_rate):>12}  "
        f"{sum(t.pipeline == 'pair' for t in result.trials):>6}  {result.pair_stopped}",
        f"{'ratio pair / plain':<34} {'-' if result.ratio is None else f'{result.ratio:.2f}':>12}",
    ]
    if result.link_loss is not None:
        burst = "i.i.d." if result.link_burst is None else f"mean burst {result.link_burst:g}"
        title = f"pair over {result.link_loss:.1%} link loss"
        lines += [
            f"{title:<34} {rate(result.lossy_rate):>12}  "
            f"{sum(t.pipeline == 'lossy' for t in result.trials):>6}  {result.lossy_stopped}",
            f"{'pair over the same relay, no loss':<34} {rate(result.relayed_rate):>12}  "
            f"{sum(t.pipeline == 'relayed' for t in result.trials):>6}  {result.relayed_stopped}",
            f"{'ratio lossy link / clean link':<34} "
            f"{'-' if result.lossy_ratio is None else f'{result.lossy_ratio:.2f}':>12}",
            f"{'ratio lossy / relayed (same hops)':<34} "
            f"{'-' if result.lossy_over_relayed is None else f'{result.lossy_over_relayed:.2f}':>12}",
            f"  link: {result.link_loss:.1%} loss ({burst}, seeded, impaired in-process between sender and "
            f"receiver); pass = residual loss within the planner's prediction {result.predicted_residual:.3%} "
            f"+ {RESIDUAL_SIGMAS:g}σ sampling margin",
        ]
    for pipeline, title in (
        ("plain", "plain relays"),
        ("pair", "fecproxy pair"),
        ("lossy", "pair, lossy link"),
        ("relayed", "pair, lossless relay"),
    ):
        best = result.best_trial(pipeline)
        if best is not None and best.cpu_us:
            parts = ", ".join(f"{role} {us:.1f}" for role, us in best.cpu_us.items())
            lines.append(
                f"  CPU µs per datagram at {best.offered:,.0f}/s, {title}: {parts} "
                f"(total {sum(best.cpu_us.values()):.1f})"
            )
    if result.delays:
        lines.append(
            f"one-way delay at {result.delays[0].rate:,.0f} datagrams/s   "
            f"{'p50 µs':>8} {'p99 µs':>8} {'loss':>8} {'samples':>8}"
        )
        for d in result.delays:
            lines.append(f"  {d.path:<36} {d.p50_us:>8.1f} {d.p99_us:>8.1f} {d.loss:>8.3%} {d.samples:>8}")
        direct, plain, pair = result.delay("direct"), result.delay("plain"), result.delay("pair")
        if direct and pair:
            lines.append(
                f"  {'added by the pair (pair − direct)':<36} "
                f"{pair.p50_us - direct.p50_us:>8.1f} {pair.p99_us - direct.p99_us:>8.1f}"
            )
        if plain and pair:
            # Two hops through any user-space relay cost wake-ups; this part is FEC's own.
            lines.append(
                f"  {'of which FEC (pair − plain relays)':<36} "
                f"{pair.p50_us - plain.p50_us:>8.1f} {pair.p99_us - plain.p99_us:>8.1f}"
            )
    return "\n".join(lines)
