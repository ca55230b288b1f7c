"""Packet loss models (Gilbert–Elliott, Bernoulli): parameters and seeded loss processes; sans-IO.

Convention (Gilbert 1960; Elliott 1963): a two-state Markov chain advances once per packet.

* ``p`` = P(good → bad), ``r`` = P(bad → good);
* ``loss_good`` and ``loss_bad`` = probability that a packet is lost while the chain is in the good
  or the bad state (Gilbert–Elliott's 1 − k and 1 − h).  The defaults 0 and 1 give the *simple
  Gilbert* channel, where "bad" simply means "lost".

Average loss = (loss_good·r + loss_bad·p) / (p + r).  In the simple Gilbert case the mean burst
(run of consecutive losses) is 1/r and the mean gap is 1/p, so a target average loss P with mean
burst B is reached with r = 1/B and p = P / (B·(1 − P)).

Why it lives here: the impairment emulator draws losses from these channels, the planner prices
codes on them, and the tests' Monte Carlo checks sample them in bulk (the receiver's online
estimate of the same figures is :mod:`fecproxy.linkmodel.estimator`).  No clocks, no sockets: a
channel advances when asked.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass
from typing import Protocol

import numpy as np

#: Sojourns drawn per numpy call when sampling in bulk; large enough that the Python loop runs a
#: handful of times even for 10^7 packets, small enough to waste little memory on overshoot.
_SOJOURN_CHUNK = 65536


class ChannelConfigError(ValueError):
    """Channel parameters that do not describe a valid loss process."""


def _probability(name: str, value: float) -> float:
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise ChannelConfigError(f"{name} must be a number, got {value!r}") from None
    if not (0.0 <= value <= 1.0):  # also rejects NaN
        raise ChannelConfigError(f"{name} must be a probability in [0, 1], got {value!r}")
    return value


@dataclass(frozen=True)
class GilbertElliott:
    """Parameters of a Gilbert–Elliott channel (see the module docstring for the convention).

    Validated once on construction and trusted afterwards.  A Bernoulli (independent) channel
    with loss P is the memoryless case p = P, r = 1 − P: use :meth:`bernoulli`.
    """

    p: float
    r: float
    loss_good: float = 0.0
    loss_bad: float = 1.0

    def __post_init__(self) -> None:
        for name in ("p", "r", "loss_good", "loss_bad"):
            object.__setattr__(self, name, _probability(name, getattr(self, name)))
        if self.p + self.r == 0.0:
            raise ChannelConfigError(
                "p + r must be > 0: with p = r = 0 the chain never moves and has no stationary state"
            )

    # -- constructors ---------------------------------------------------------------------------

    @classmethod
    def no_loss(cls) -> GilbertElliott:
        """A perfect link: the chain never leaves the good state, which loses nothing."""
        return cls(p=0.0, r=1.0)

    @classmethod
    def bernoulli(cls, loss: float) -> GilbertElliott:
        """Independent losses with probability ``loss``: the memoryless chain p = loss, r = 1 − loss."""
        loss = _probability("loss", loss)
        if loss == 1.0:
            return cls(p=1.0, r=0.0)
        return cls(p=loss, r=1.0 - loss)

    @classmethod
    def from_loss_burst(cls, loss: float, burst: float) -> GilbertElliott:
        """Simple Gilbert channel with average loss P and mean burst B: r = 1/B, p = P/(B(1 − P)).

        B counts consecutive lost packets, so B ≥ 1; B = 1 means losses never touch (that is *not*
        independent loss, whose mean burst is 1/(1 − P) — use :meth:`bernoulli` for that).
        """
        loss = _probability("average loss", loss)
        try:
            burst = float(burst)
        except (TypeError, ValueError):
            raise ChannelConfigError(f"mean burst must be a number, got {burst!r}") from None
        if loss == 0.0:
            return cls.no_loss()
        if loss == 1.0:
            raise ChannelConfigError("average loss 1 is a dead link; it has no finite mean burst")
        if not (math.isfinite(burst) and burst >= 1.0):
            raise ChannelConfigError(f"mean burst must be a finite number of packets ≥ 1, got {burst!r}")
        p = loss / (burst * (1.0 - loss))
        if p > 1.0:
            raise ChannelConfigError(
                f"average loss {loss:g} with mean burst {burst:g} needs p = {p:.3g} > 1; "
                f"at this loss the mean burst must be at least {loss / (1.0 - loss):.3g}"
            )
        return cls(p=p, r=1.0 / burst)

    # -- derived figures ------------------------------------------------------------------------

    @property
    def stationary_bad(self) -> float:
        """Long-run fraction of packets sent while the chain is in the bad state: p/(p + r)."""
        return self.p / (self.p + self.r)

    @property
    def average_loss(self) -> float:
        """Long-run loss ratio: (loss_good·r + loss_bad·p)/(p + r)."""
        bad = self.stationary_bad
        return (1.0 - bad) * self.loss_good + bad * self.loss_bad

    @property
    def mean_burst(self) -> float:
        """Mean length of a run of consecutive lost packets (1/r for the simple Gilbert channel).

        Exact for any emission probabilities: P(lost) / P(received then lost), both stationary.
        0 when nothing is ever lost; inf when losses never end.
        """
        lost = self.average_loss
        if lost == 0.0:
            return 0.0
        t = self.transition_matrix()
        pi = np.array([1.0 - self.stationary_bad, self.stationary_bad])
        e = np.array([self.loss_good, self.loss_bad])
        burst_starts = float((pi * (1.0 - e)) @ t @ e)
        return math.inf if burst_starts == 0.0 else lost / burst_starts

    @property
    def is_memoryless(self) -> bool:
        """True when p + r = 1: each packet's state is independent of the last (a Bernoulli channel)."""
        return abs(self.p + self.r - 1.0) <= 1e-15

    def transition_matrix(self, steps: int = 1) -> np.ndarray:
        """The ``steps``-step transition matrix [[good→good, good→bad], [bad→good, bad→bad]].

        Closed form of T^D for a two-state chain: T^D = Π + (1 − p − r)^D (I − Π), where Π has
        the stationary distribution in each row.  Used for interleaving depth D.
        """
        if steps < 1:
            raise ChannelConfigError(f"steps must be ≥ 1, got {steps}")
        bad = self.stationary_bad
        stationary = np.array([[1.0 - bad, bad], [1.0 - bad, bad]])
        decay = (1.0 - self.p - self.r) ** steps
        matrix: np.ndarray = stationary + decay * (np.eye(2) - stationary)
        return matrix

    def describe(self) -> str:
        return (
            f"Gilbert–Elliott p={self.p:.4g} r={self.r:.4g} loss_good={self.loss_good:g} "
            f"loss_bad={self.loss_bad:g} (average loss {self.average_loss:.4g}, mean burst {self.mean_burst:.4g})"
        )


def channel_from_figures(
    *,
    loss: float | None = None,
    burst: float | None = None,
    p: float | None = None,
    r: float | None = None,
    loss_good: float | None = None,
    loss_bad: float | None = None,
) -> GilbertElliott:
    """Resolve the two ways a user may describe a link, as the CLIs accept them.

    Either the friendly pair (``loss`` alone → independent losses; ``loss`` + ``burst`` → simple
    Gilbert), or the four Gilbert–Elliott parameters (``p`` and ``r`` required, emissions default
    to 0 and 1).  Mixing the two, or giving none, is an error; none at all means no loss.
    """
    friendly = loss is not None or burst is not None
    four = any(v is not None for v in (p, r, loss_good, loss_bad))
    if friendly and four:
        raise ChannelConfigError(
            "give either average loss (+ mean burst) or the Gilbert–Elliott p, r, loss_good, loss_bad, not both"
        )
    if four:
        if p is None or r is None:
            raise ChannelConfigError("the Gilbert–Elliott form needs both p and r")
        return GilbertElliott(
            p=p, r=r, loss_good=0.0 if loss_good is None else loss_good, loss_bad=1.0 if loss_bad is None else loss_bad
        )
    if burst is not None and loss is None:
        raise ChannelConfigError("a mean burst needs an average loss to go with it")
    if loss is None:
        return GilbertElliott.no_loss()
    if burst is None:
        return GilbertElliott.bernoulli(loss)
    return GilbertElliott.from_loss_burst(loss, burst)


def channel_from_estimate(loss: float, burst: float) -> GilbertElliott:
    """The simple Gilbert channel of a receiver's online estimate (average loss, mean burst).

    An estimate may sit just under the conversion's limits (burst < 1 on a nearly clean link):
    it is clamped to the smallest burst the loss allows rather than refused.  Raises
    ChannelConfigError for a loss of 1 (a dead link has no code).
    """
    if loss == 0.0:
        return GilbertElliott.no_loss()
    return GilbertElliott.from_loss_burst(loss, max(burst, 1.0, loss / (1.0 - loss)))


# -- channels (stateful, seeded) ------------------------------------------------------------------


class LossChannel(Protocol):
    """What the emulator and the Monte Carlo checks need from a channel."""

    def lose(self) -> bool:
        """Advance one packet; True when that packet is lost."""

    def losses(self, count: int) -> np.ndarray:
        """Advance ``count`` packets at once; a bool array, True = lost."""


class BernoulliChannel:
    """Independent losses with a fixed probability; the cheapest channel per packet."""

    def __init__(self, loss: float, seed: int | str | None = None) -> None:
        self.loss = _probability("loss", loss)
        self._rng = random.Random(seed)
        self._np = np.random.default_rng(random.Random(seed).getrandbits(64))

    def lose(self) -> bool:
        return self._rng.random() < self.loss

    def losses(self, count: int) -> np.ndarray:
        return self._np.random(int(count)) < self.loss


class GilbertElliottChannel:
    """A running Gilbert–Elliott chain, started in its stationary distribution.

    :meth:`lose` steps one packet (Python ``random``, fine for a relay's packet rate);
    :meth:`losses` draws many packets at once from geometric sojourn lengths (numpy), which is
    what a Monte Carlo over 10^7 packets needs.  Both continue the same chain state.
    """

    def __init__(self, params: GilbertElliott, seed: int | str | None = None) -> None:
        self.params = params
        self._rng = random.Random(seed)
        self._np = np.random.default_rng(self._rng.getrandbits(64))
        #: State of the *next* packet: True = bad.  Stationary start, so the first block a
        #: planner check looks at is a typical one.
        self._bad = self._rng.random() < params.stationary_bad

    @property
    def in_bad_state(self) -> bool:
        return self._bad

    def lose(self) -> bool:
        params = self.params
        rng = self._rng
        if self._bad:
            lost = params.loss_bad == 1.0 or (params.loss_bad > 0.0 and rng.random() < params.loss_bad)
            self._bad = rng.random() >= params.r
        else:
            lost = params.loss_good == 1.0 or (params.loss_good > 0.0 and rng.random() < params.loss_good)
            self._bad = rng.random() < params.p
        return lost

    def states(self, count: int) -> np.ndarray:
        """Advance ``count`` packets; the chain state of each (True = bad)."""
        count = int(count)
        if count <= 0:
            return np.zeros(0, dtype=bool)
        params = self.params
        need = count + 1  # one more, to know the state of the packet after these
        lengths: list[np.ndarray] = []
        first_bad = self._bad
        bad = first_bad
        total = 0
        while total < need:
            # Alternate sojourns starting from the current state; by memorylessness the
            # remaining time in the current state is geometric like a fresh sojourn.
            half = _SOJOURN_CHUNK
            out = np.empty(2 * half, dtype=np.int64)
            leave_now, leave_other = (params.r, params.p) if bad else (params.p, params.r)
            out[0::2] = self._geometric(leave_now, half, need)
            out[1::2] = self._geometric(leave_other, half, need)
            lengths.append(out)
            total += int(out.sum(dtype=np.int64))
            # An even number of sojourns per chunk keeps the alternation aligned across chunks.
        sojourns = np.concatenate(lengths)
        ends = np.cumsum(sojourns)
        used = int(np.searchsorted(ends, need, side="left")) + 1
        sojourns = sojourns[:used]
        labels = np.zeros(used, dtype=bool)
        labels[0::2] = first_bad
        labels[1::2] = not first_bad
        path = np.repeat(labels, sojourns)[:need]
        self._bad = bool(path[count])
        return path[:count]

    def losses(self, count: int) -> np.ndarray:
        path = self.states(count)
        params = self.params
        if params.loss_good == 0.0 and params.loss_bad == 1.0:
            return path
        emission = np.where(path, params.loss_bad, params.loss_good)
        return self._np.random(path.size) < emission

    def _geometric(self, leave: float, size: int, cap: int) -> np.ndarray:
        """Sojourn lengths ≥ 1 with P(L = l) = (1 − leave)^(l−1)·leave; capped when leave = 0."""
        if leave <= 0.0:
            return np.full(size, cap, dtype=np.int64)
        return np.minimum(self._np.geometric(leave, size), cap)


def make_channel(params: GilbertElliott, seed: int | str | None = None) -> BernoulliChannel | GilbertElliottChannel:
    """The channel for ``params``: a Bernoulli channel when the chain is memoryless, else Gilbert–Elliott."""
    if params.is_memoryless:
        return BernoulliChannel(params.average_loss, seed)
    return GilbertElliottChannel(params, seed)
