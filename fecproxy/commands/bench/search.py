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
    """One path's one-way delay: the median over the repetitions of each repetition's p50/p99,
    with the lowest and highest repetition beside it (the spread shows how steady it was)."""

    path: str
    rate: float
    samples: int
    loss: float
    p50_us: float
    p99_us: float
    repeats: int = 1
    p50_range_us: tuple[float, float] = (math.nan, math.nan)
    p99_range_us: tuple[float, float] = (math.nan, math.nan)


@dataclass(frozen=True)
class DelaySample:
    """One path in one repetition of the delay trials."""

    path: str
    rate: float
    samples: int
    loss: float
    p50_us: float
    p99_us: float


@dataclass(frozen=True)
class AddedDelay:
    """A difference of two paths' delays taken within each repetition (so a noisy moment moves
    both sides of it), then summarised as the median and range over the repetitions."""

    label: str
    minuend: str
    subtrahend: str
    p50_us: float
    p99_us: float
    p50_range_us: tuple[float, float]
    p99_range_us: tuple[float, float]


#: The differences the report gives: what the pair adds over no relay, and what FEC adds over
#: two plain relays on the same socket layer.
ADDED_DELAYS = (
    ("added by the pair (pair − direct)", "pair", "direct"),
    ("of which FEC (pair − plain relays)", "pair", "plain"),
)


def _median_range(values: list[float]) -> tuple[float, tuple[float, float]]:
    finite = sorted(v for v in values if not math.isnan(v))
    if not finite:
        return math.nan, (math.nan, math.nan)
    middle = len(finite) // 2
    median = finite[middle] if len(finite) % 2 else (finite[middle - 1] + finite[middle]) / 2
    return median, (finite[0], finite[-1])


def summarize_delays(repetitions: list[list[DelaySample]]) -> tuple[list[DelayFigures], list[AddedDelay]]:
    """Per path: median and range of p50/p99 over the repetitions; per difference in
    ADDED_DELAYS: the difference within each repetition, then its median and range."""
    if not repetitions:
        return [], []
    paths = [sample.path for sample in repetitions[0]]
    by_path = {path: [s for rep in repetitions for s in rep if s.path == path] for path in paths}
    figures = []
    for path, samples in by_path.items():
        p50, p50_range = _median_range([s.p50_us for s in samples])
        p99, p99_range = _median_range([s.p99_us for s in samples])
        sent = sum(s.samples for s in samples)
        loss = sum(s.loss for s in samples) / len(samples)
        rate = sum(s.rate for s in samples) / len(samples)
        figures.append(DelayFigures(path, rate, sent, loss, p50, p99, len(samples), p50_range, p99_range))
    added = []
    for label, minuend, subtrahend in ADDED_DELAYS:
        if minuend not in by_path or subtrahend not in by_path:
            continue
        differences = []
        for rep in repetitions:
            here = {s.path: s for s in rep}
            if minuend in here and subtrahend in here:
                differences.append(
                    (here[minuend].p50_us - here[subtrahend].p50_us, here[minuend].p99_us - here[subtrahend].p99_us)
                )
        p50, p50_range = _median_range([d[0] for d in differences])
        p99, p99_range = _median_range([d[1] for d in differences])
        added.append(AddedDelay(label, minuend, subtrahend, p50, p99, p50_range, p99_range))
    return figures, added


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
    #: Differences between paths taken within each delay repetition (:func:`summarize_delays`).
    added_delays: list[AddedDelay] = field(default_factory=list)
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
        for added in self.added_delays:
            if (added.minuend, added.subtrahend) == ("pair", "direct"):
                out["added_delay_us"] = dict(p50=added.p50_us, p99=added.p99_us)
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
        first = result.delays[0]
        lines.append(
            f"one-way delay at {first.rate:,.0f} datagrams/s, median of {first.repeats} repetitions "
            f"[lowest–highest]; differences taken within each repetition"
        )
        lines.append(f"  {'path':<36} {'p50 µs':>22} {'p99 µs':>24} {'loss':>8} {'samples':>8}")
        for d in result.delays:
            lines.append(
                f"  {d.path:<36} {_spread(d.p50_us, d.p50_range_us):>22} {_spread(d.p99_us, d.p99_range_us):>24} "
                f"{d.loss:>8.3%} {d.samples:>8}"
            )
        for a in result.added_delays:
            lines.append(
                f"  {a.label:<36} {_spread(a.p50_us, a.p50_range_us):>22} {_spread(a.p99_us, a.p99_range_us):>24}"
            )
    return "\n".join(lines)


def _spread(median: float, bounds: tuple[float, float]) -> str:
    """``median [lowest–highest]``, or the median alone for a single repetition."""
    low, high = bounds
    if math.isnan(low) or low == high:
        return f"{median:.1f}"
    return f"{median:.1f} [{low:.0f}–{high:.0f}]"
