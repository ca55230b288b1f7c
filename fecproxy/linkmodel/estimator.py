"""Online estimate of a link's loss and burstiness from what a receiver sees.

The receiver feeds each finished block's arrival pattern; the estimate (simple Gilbert view:
"lost" is the bad state) backs the ``fecproxy_link_*`` gauges and ``fecproxy plan --from-metrics``.
Sans-IO: samples in, figures out.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass

from fecproxy.linkmodel.loss_models import ChannelConfigError, GilbertElliott


@dataclass(frozen=True)
class LossEstimate:
    """A snapshot of :class:`LossEstimator`; NaN where there is not yet data to say."""

    samples: int
    lost: int
    average_loss: float
    p: float
    r: float
    mean_burst: float

    def as_channel(self) -> GilbertElliott | None:
        """The simple Gilbert channel these figures describe, or None while they are undefined."""
        if not (math.isfinite(self.average_loss) and self.samples > 1):
            return None
        if self.lost == 0:
            return GilbertElliott.no_loss()
        if not (math.isfinite(self.p) and math.isfinite(self.r)) or self.p + self.r == 0.0:
            return None
        return GilbertElliott(p=self.p, r=self.r)


class LossEstimator:
    """Transition counting over a stream of received/lost flags, optionally over a sliding window.

    Treats "lost" as the bad state (the simple Gilbert view, which is what a receiver can see):
    p̂ = good→bad transitions / transitions out of a good packet, r̂ = bad→good / transitions out
    of a bad packet (the maximum-likelihood estimates for a Markov chain), average loss = lost /
    samples, mean burst = 1/r̂.  Each sample costs O(1): four transition counters, plus a deque of
    the window's flags so the oldest pair can be taken back out.

    Segments: only *adjacent* packets make a transition.  A receiver sees the source positions of
    each block but not the repair packets sent between two blocks' sources, so the last source of
    one block and the first of the next are m + 1 link steps apart; counting that pair as one step
    would mix the chain and bias r̂ up, the mean burst down (by about
    ((1 − [T^(m+1)]_bb) − r)/(k·r) relative, where T^(m+1)[bad→bad] = π_b + (1 − π_b)(1 − p − r)^(m+1):
    −8 % for k = 8, m = 2 at 5 % loss, mean burst 2).  :meth:`observe_block` therefore makes each
    block its own segment: no transition is counted across a segment boundary, every counted pair is a
    true one-step pair, and the order in which blocks are reported no longer matters (a failed block
    is reported at its hold-time expiry, after later blocks that completed).  The loss ratio is
    unbiased either way: every source position has the stationary loss probability.
    """

    def __init__(self, window: int | None = None) -> None:
        if window is not None and (not isinstance(window, int) or window < 2):
            raise ChannelConfigError(f"window must be an int ≥ 2 samples (or None for all), got {window!r}")
        self.window = window
        self.reset()

    def reset(self) -> None:
        """Forget every sample (the window size stays)."""
        #: The window's samples as runs of one outcome, oldest first: [lost (0/1), count, linked
        #: (1 when its first sample is paired with the sample before it)].  Runs, not samples, so
        #: a block costs O(1) to add and to forget whatever its length.
        self._runs: deque[list[int]] = deque()
        #: Outcome of the last sample, or None when the next sample starts a new segment.
        self._last: bool | None = None
        self._samples = 0
        self._lost = 0
        # transitions[(from_lost, to_lost)]
        self._gg = self._gb = self._bg = self._bb = 0

    def _count_pair(self, before: bool | int, after: bool | int, delta: int) -> None:
        if before:
            if after:
                self._bb += delta
            else:
                self._bg += delta
        elif after:
            self._gb += delta
        else:
            self._gg += delta

    def observe(self, lost: bool) -> None:
        """One packet: True if it was lost, False if it arrived."""
        self.observe_run(lost, 1)

    def _forget_oldest(self, count: int) -> None:
        """Take the ``count`` oldest samples out of the window, with the pairs they start."""
        runs = self._runs
        while count:
            first = runs[0]
            lost, size = first[0], first[1]
            if count < size:  # part of the run: each sample taken out starts a pair inside it
                first[1] = size - count
                first[2] = 0
                self._samples -= count
                self._lost -= lost * count
                self._count_pair(lost, lost, -count)
                return
            runs.popleft()
            self._samples -= size
            self._lost -= lost * size
            self._count_pair(lost, lost, -(size - 1))
            count -= size
            following = runs[0]  # the window keeps ≥ 2 samples, so one follows
            if following[2]:  # the pair (this run's last, the next's first) was counted
                self._count_pair(lost, following[0], -1)
                following[2] = 0

    def observe_many(self, flags: Iterable[bool]) -> None:
        for lost in flags:
            self.observe(lost)

    def observe_run(self, lost: bool, count: int) -> None:
        """``count`` packets in a row with the same outcome (e.g. a sequence-number gap or a
        clean block): O(1), with or without a window."""
        count = int(count)
        if count <= 0:
            return
        lost = bool(lost)
        previous = self._last
        if previous is not None:
            self._count_pair(previous, lost, +1)
        self._count_pair(lost, lost, count - 1)
        self._last = lost
        self._samples += count
        self._lost += count if lost else 0
        if self.window is not None:
            runs = self._runs
            if previous is not None and previous == lost and runs:
                runs[-1][1] += count  # the same outcome, linked: one longer run
            else:
                runs.append([int(lost), count, int(previous is not None)])
            excess = self._samples - self.window
            if excess > 0:
                self._forget_oldest(excess)

    def end_segment(self) -> None:
        """The next packet is not the link neighbour of the last one: count no transition between them."""
        self._last = None

    def observe_block(self, arrived_mask: int, span: int) -> None:
        """A block's source positions 0..span−1 in order (bit i of ``arrived_mask`` set = arrived),
        as a segment of its own; see the class docstring for why blocks are not chained."""
        span = int(span)
        self.end_segment()
        if arrived_mask == (1 << span) - 1:  # the usual clean block: one run, no bit walk
            if span:
                self.observe_run(False, span)
            self.end_segment()
            return
        position = 0
        while position < span:
            lost = not (arrived_mask >> position) & 1
            run = position + 1
            while run < span and (not (arrived_mask >> run) & 1) == lost:
                run += 1
            self.observe_run(lost, run - position)
            position = run
        self.end_segment()

    def estimate(self) -> LossEstimate:
        from_good = self._gg + self._gb
        from_bad = self._bb + self._bg
        nan = math.nan
        average = self._lost / self._samples if self._samples else nan
        p = self._gb / from_good if from_good else nan
        r = self._bg / from_bad if from_bad else nan
        if self._samples == 0:
            burst = nan
        elif self._lost == 0:
            burst = 0.0  # no bursts at all: 0, not NaN, so a gauge reads sensibly on a clean link
        elif from_bad == 0:
            burst = float(self._lost)  # a single lost packet as the last sample: a burst of ≥ 1 so far
        elif self._bg == 0:
            burst = math.inf  # every loss so far is one burst still going on
        else:
            burst = 1.0 / r
        return LossEstimate(samples=self._samples, lost=self._lost, average_loss=average, p=p, r=r, mean_burst=burst)

    @property
    def average_loss(self) -> float:
        return self.estimate().average_loss

    @property
    def mean_burst(self) -> float:
        return self.estimate().mean_burst
