"""One direction of an emulated lossy link, sans-IO: datagrams and ``now`` in, due datagrams out.

What happens to a datagram, in the order a radio link would do it:

1. **rate cap and modem buffer** — the transmitter sends one packet at a time at ``rate_bps``
   (counting IP/UDP headers) and/or ``rate_pps``; packets wait in a FIFO of ``queue_packets``
   (the one on the air included) and a packet arriving to a full buffer is tail-dropped;
2. **blackout** — a packet whose transmission starts inside a scheduled outage is lost (shadowing
   behind a building on a moving vehicle, a satellite handover);
3. **loss model** — Gilbert–Elliott or Bernoulli (:mod:`fecproxy.channel`), one step per packet
   that went on the air, so measured loss and burst length can be compared with the configuration;
4. **duplication** — a delivered packet is sometimes delivered twice (a link-layer retransmission
   whose acknowledgement was lost);
5. **delay and jitter** — each copy arrives ``delay ± jitter`` (uniform, never before it was sent)
   after its transmission ends; unless reordering is allowed, a packet never overtakes an earlier
   one (it waits for it, as on a FIFO link).

The caller (a trio relay, or a test with a fake clock) feeds :meth:`ImpairedLink.submit`, drains
:meth:`ImpairedLink.due` and sleeps until :meth:`ImpairedLink.next_deadline`.
"""

from __future__ import annotations

import heapq
import math
import random
import re
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field

from fecproxy.linkmodel.estimator import LossEstimator
from fecproxy.linkmodel.loss_models import GilbertElliott, make_channel

#: Bytes of IP + UDP header per datagram counted against ``rate_bps``: a radio carries them too.
#: IPv4: a 20-byte header without options (RFC 791 §3.1) + 8 bytes of UDP (RFC 768).
IPV4_UDP_HEADER_BYTES = 28
#: IPv6: the 40-byte fixed header (RFC 8200 §3) + 8 bytes of UDP (RFC 768).
IPV6_UDP_HEADER_BYTES = 48
#: Datagrams held in flight (delayed, not yet due) per direction.  Bounds memory when a fast
#: sender meets a long delay: 20 000 × 1500 B ≈ 30 MB, and 20 000 packets in flight is 20 kpps at
#: one second of delay — far above the data radios and satellite terminals this emulates.
MAX_IN_FLIGHT_PACKETS = 20_000
#: Largest modem buffer we accept; a real radio buffers tens to a few hundred packets.
MAX_QUEUE_PACKETS = 100_000

#: Why a datagram did not come out; every one is counted under exactly one reason.
DROP_REASONS = ("loss", "queue", "blackout", "in_flight_limit")


class ImpairmentConfigError(ValueError):
    """Impairment settings that cannot describe a link."""


@dataclass(frozen=True)
class Blackout:
    """Outages of ``duration`` seconds every ``period`` seconds, the first ``offset`` seconds after start.

    Default offset = one period: the link comes up clean and the first outage is at ``period``.
    """

    duration: float
    period: float
    offset: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.period) and self.period > 0):
            raise ImpairmentConfigError(f"blackout period must be > 0 s, got {self.period!r}")
        if not (math.isfinite(self.duration) and 0 < self.duration <= self.period):
            raise ImpairmentConfigError(f"blackout duration must be in (0, period], got {self.duration!r}")
        if self.offset is None:
            object.__setattr__(self, "offset", self.period)
        if not (math.isfinite(self.first) and self.first >= 0):
            raise ImpairmentConfigError(f"blackout offset must be ≥ 0 s, got {self.offset!r}")

    @property
    def first(self) -> float:
        """Seconds from start to the first outage: ``offset``, which __post_init__ fills when None."""
        return self.period if self.offset is None else self.offset

    def active(self, elapsed: float) -> bool:
        """True when ``elapsed`` seconds after start fall inside an outage."""
        if elapsed < self.first:
            return False
        return (elapsed - self.first) % self.period < self.duration

    @classmethod
    def parse(cls, text: str) -> Blackout | None:
        """'3s/60s', '500ms/10s@2s', '3/60' (seconds), or 'none'."""
        text = text.strip().lower()
        if text in ("", "none", "off", "0"):
            return None
        match = re.fullmatch(r"([^/@]+)/([^/@]+)(?:@(.+))?", text)
        if not match:
            raise ImpairmentConfigError(f"blackout must look like DURATION/PERIOD[@OFFSET], e.g. 3s/60s; got {text!r}")
        duration, period, offset = match.groups()
        return cls(
            duration=parse_duration(duration),
            period=parse_duration(period),
            offset=None if offset is None else parse_duration(offset),
        )

    def describe(self) -> str:
        return f"{self.duration:g}s every {self.period:g}s from {self.offset:g}s"


def parse_duration(text: str) -> float:
    """'3s', '250ms', '2.5' (seconds) → seconds."""
    match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:e[-+]?[0-9]+)?)\s*(ms|s)?\s*", text.lower())
    if not match:
        raise ImpairmentConfigError(f"not a duration (e.g. 3s, 250ms): {text!r}")
    value = float(match.group(1))
    return value / 1000.0 if match.group(2) == "ms" else value


@dataclass(frozen=True)
class LinkImpairment:
    """How one direction of the link misbehaves.  Validated once; zero/None means "not impaired"."""

    loss: GilbertElliott = field(default_factory=GilbertElliott.no_loss)
    delay: float = 0.0  # seconds
    jitter: float = 0.0  # seconds, ± around delay
    reorder: bool = False
    duplicate: float = 0.0  # probability a delivered packet is delivered twice
    rate_bps: float | None = None  # bits per second on the air, headers included
    rate_pps: float | None = None  # packets per second
    queue_packets: int = 64  # modem buffer when a rate is set; common practice, no source
    blackout: Blackout | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.loss, GilbertElliott):
            raise ImpairmentConfigError(f"loss must be a GilbertElliott, got {type(self.loss).__name__}")
        for name in ("delay", "jitter"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
                raise ImpairmentConfigError(f"{name} must be ≥ 0 seconds, got {value!r}")
        if not (0.0 <= self.duplicate <= 1.0):
            raise ImpairmentConfigError(f"duplicate must be a probability in [0, 1], got {self.duplicate!r}")
        for name in ("rate_bps", "rate_pps"):
            value = getattr(self, name)
            if value is not None and not (math.isfinite(value) and value > 0):
                raise ImpairmentConfigError(f"{name} must be > 0 (or unset for no cap), got {value!r}")
        if not (isinstance(self.queue_packets, int) and 1 <= self.queue_packets <= MAX_QUEUE_PACKETS):
            raise ImpairmentConfigError(
                f"queue_packets must be an int in [1, {MAX_QUEUE_PACKETS}], got {self.queue_packets!r}"
            )

    @property
    def rate_capped(self) -> bool:
        return self.rate_bps is not None or self.rate_pps is not None

    def transmit_time(self, size: int, header_bytes: int = IPV4_UDP_HEADER_BYTES) -> float:
        """Seconds the transmitter is busy with one datagram of ``size`` payload bytes, carried
        with ``header_bytes`` of IP and UDP header (IPv4 or IPv6, see the constants above)."""
        seconds = 0.0
        if self.rate_bps is not None:
            seconds = (size + header_bytes) * 8 / self.rate_bps
        if self.rate_pps is not None:
            seconds = max(seconds, 1.0 / self.rate_pps)
        return seconds

    def describe(self) -> str:
        parts = [self.loss.describe() if self.loss.average_loss > 0 else "no loss"]
        if self.delay or self.jitter:
            text = f"delay {self.delay * 1000:g}±{self.jitter * 1000:g} ms" + (" reordering" if self.reorder else "")
            if self.jitter > self.delay:
                # Nothing arrives before it was sent: draws below zero delay are cut to zero.
                text += " (jitter above the delay is cut at 0 ms, so the mean delay is above the set delay)"
            parts.append(text)
        if self.duplicate:
            parts.append(f"duplicate {self.duplicate:g}")
        if self.rate_bps is not None:
            parts.append(f"rate {self.rate_bps / 1000:g} kbit/s")
        if self.rate_pps is not None:
            parts.append(f"rate {self.rate_pps:g} pkt/s")
        if self.rate_capped:
            parts.append(f"buffer {self.queue_packets} pkts")
        if self.blackout is not None:
            parts.append(f"blackout {self.blackout.describe()}")
        return ", ".join(parts)


@dataclass(frozen=True)
class LinkStats:
    """Counters of one direction.  ``measured_loss``/``measured_mean_burst`` are of the loss model
    alone (packets that went on the air), so they are comparable with the configured figures."""

    submitted: int  # datagrams offered
    sent: int  # went on the air (passed buffer and blackout), i.e. faced the loss model
    lost: int  # lost by the loss model
    delivered: int  # copies handed back by due(), duplicates included
    duplicates: int
    queue_drops: int
    blackout_drops: int
    in_flight_drops: int
    queued: int  # in the modem buffer at ``now`` (without ``now``: as of the last submit)
    in_flight: int  # delayed, not yet due
    measured_loss: float
    measured_mean_burst: float

    @property
    def drops(self) -> dict[str, int]:
        """Drops by reason (the keys are :data:`DROP_REASONS`)."""
        return {
            "loss": self.lost,
            "queue": self.queue_drops,
            "blackout": self.blackout_drops,
            "in_flight_limit": self.in_flight_drops,
        }


class ImpairedLink:
    """One direction of the emulated link.  Deterministic for a given seed and call sequence."""

    def __init__(
        self,
        config: LinkImpairment,
        *,
        seed: int | str = 0,
        start: float = 0.0,
        header_bytes: int = IPV4_UDP_HEADER_BYTES,
    ) -> None:
        self.config = config
        self.header_bytes = header_bytes  # IP + UDP bytes the rate cap counts per datagram
        self.start = start  # the blackout schedule counts from here
        self._seed = seed
        self._changes = 0  # reconfigure() calls so far: each new channel gets a seed of its own
        self._rng = random.Random(f"{seed}:link")
        self._channel = make_channel(config.loss, f"{seed}:loss")
        self._estimator = LossEstimator()
        self._busy_until = start  # when the transmitter finishes what it has accepted
        self._buffer: deque[float] = deque()  # transmission end times of buffered packets
        self._pending: list[tuple[float, int, bytes]] = []  # heap of (due time, order, datagram)
        self._order = 0
        self._last_due = -math.inf  # for FIFO delivery when reordering is off
        self._submitted = self._sent = self._lost = self._delivered = self._duplicates = 0
        self._queue_drops = self._blackout_drops = self._in_flight_drops = 0
        #: Optional observer called as ``on_air(datagram, lost)`` for every datagram that went on
        #: the air (after the modem buffer and blackouts), so a tool can see each packet's fate.
        self.on_air: Callable[[bytes, bool], None] | None = None

    def reconfigure(self, config: LinkImpairment) -> None:
        """Change how the link misbehaves from now on (a fade begins or ends), keeping what is
        queued and in flight and every counter.  The new loss model starts in its stationary
        state, drawn from a seed derived from the link's and the change's number, so a run stays
        reproducible."""
        self._changes += 1
        self.config = config
        self._channel = make_channel(config.loss, f"{self._seed}:loss:{self._changes}")

    # -- feeding ---------------------------------------------------------------------------------

    def submit(self, datagram: bytes, now: float) -> None:
        """A datagram enters the link at ``now``; it comes out of :meth:`due` later, or is counted as dropped."""
        config = self.config
        self._submitted += 1
        if config.rate_capped:
            buffer = self._buffer
            while buffer and buffer[0] <= now:
                buffer.popleft()
            if len(buffer) >= config.queue_packets:
                self._queue_drops += 1
                return
            begin = max(now, self._busy_until)
            end = begin + config.transmit_time(len(datagram), self.header_bytes)
            self._busy_until = end
            buffer.append(end)
        else:
            begin = end = now
        if config.blackout is not None and config.blackout.active(begin - self.start):
            self._blackout_drops += 1
            return
        self._sent += 1
        lost = self._channel.lose()
        self._estimator.observe(lost)
        if self.on_air is not None:
            self.on_air(datagram, lost)
        if lost:
            self._lost += 1
            return
        self._schedule(datagram, end)
        if config.duplicate and self._rng.random() < config.duplicate:
            if self._schedule(datagram, end):
                self._duplicates += 1

    def _schedule(self, datagram: bytes, sent_at: float) -> bool:
        config = self.config
        if len(self._pending) >= MAX_IN_FLIGHT_PACKETS:
            self._in_flight_drops += 1
            return False
        delay = config.delay
        if config.jitter:
            delay = max(0.0, delay + self._rng.uniform(-config.jitter, config.jitter))
        due = sent_at + delay
        if not config.reorder:
            due = max(due, self._last_due)
            self._last_due = due
        heapq.heappush(self._pending, (due, self._order, bytes(datagram)))
        self._order += 1
        return True

    # -- draining --------------------------------------------------------------------------------

    def due(self, now: float) -> list[bytes]:
        """Datagrams whose arrival time has come, in arrival order."""
        out = []
        pending = self._pending
        while pending and pending[0][0] <= now:
            out.append(heapq.heappop(pending)[2])
        self._delivered += len(out)
        return out

    def next_deadline(self) -> float | None:
        """When :meth:`due` next has something to give; None when nothing is in flight."""
        return self._pending[0][0] if self._pending else None

    # -- reporting -------------------------------------------------------------------------------

    def queued(self, now: float) -> int:
        """Packets in the modem buffer at ``now`` (including the one on the air)."""
        return sum(1 for end in self._buffer if end > now)

    def stats(self, now: float | None = None) -> LinkStats:
        estimate = self._estimator.estimate()
        return LinkStats(
            submitted=self._submitted,
            sent=self._sent,
            lost=self._lost,
            delivered=self._delivered,
            duplicates=self._duplicates,
            queue_drops=self._queue_drops,
            blackout_drops=self._blackout_drops,
            in_flight_drops=self._in_flight_drops,
            queued=len(self._buffer) if now is None else self.queued(now),
            in_flight=len(self._pending),
            measured_loss=estimate.average_loss,
            measured_mean_burst=estimate.mean_burst,
        )
