"""Seeded simulation of residual loss and recovery delay, sliding-window code beside block code.

No closed form gives the residual loss or the delay of a sliding-window code over a
Gilbert–Elliott link (the window's equations overlap), so ``fecproxy plan`` estimates them by
simulation: the real sans-IO encoder and decoder (:mod:`fecproxy.protocol`) exchange packets at
a constant datagram rate over the same loss channel (:mod:`fecproxy.linkmodel.loss_models`),
with a fake clock and no link delay, so a rebuilt datagram's delay is purely what the code adds
(the time from its sending to its delivery).  The block code runs through the same loop on the
same channel, so the two are compared on equal terms.

The run is split into REPLICATIONS independent replications (seeds seed, seed+1, …); each figure
is the mean over replications with a 95 % confidence interval from Student's t distribution
(a textbook interval for a mean of independent replications; the quantiles below are the
standard two-sided 97.5 % values of the t table).  Stated as such by the plan command: these are
estimates, not the exact figures the block planner computes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from fecproxy.linkmodel.loss_models import GilbertElliott, make_channel
from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import Delivery, Event
from fecproxy.protocol.sliding_decoder import SlidingDecoder, SlidingDecoderSettings
from fecproxy.protocol.sliding_encoder import SlidingEncoder, SlidingSettings

#: Independent replications per estimate: 8 gives a usable t interval (7 degrees of freedom)
#: while each replication stays long enough to see several loss bursts.
REPLICATIONS = 8
#: Datagrams simulated in all, split over the replications.  20 000 at ~5 µs–50 µs each keeps
#: an estimate to a second or two; residual losses far below 1/DEFAULT_DATAGRAMS read as 0.
DEFAULT_DATAGRAMS = 20_000
#: The largest run the plan command accepts (bounded time on a shared machine).
MAX_DATAGRAMS = 1_000_000
#: Two-sided 95 % Student t quantiles t(0.975, df) for df = 1..10 (standard t table).
_T975 = {1: 12.706, 2: 4.303, 3: 3.182, 4: 2.776, 5: 2.571, 6: 2.447, 7: 2.365, 8: 2.306, 9: 2.262, 10: 2.228}
#: Payload of a simulated datagram: a 4-byte sequence number and padding (the code's figures
#: do not depend on the length; a short one keeps the simulation fast).
_PAYLOAD_BYTES = 32


@dataclass(frozen=True)
class Estimate:
    """A mean over replications and its 95 % confidence interval."""

    mean: float
    low: float
    high: float

    def as_dict(self) -> dict[str, Any]:
        return {"mean": self.mean, "ci95": [self.low, self.high]}


@dataclass(frozen=True)
class SimulatedCode:
    code: str  # "block k=16 m=4" or "sliding window=32 interval=4"
    overhead: float  # repair packets per source packet, as simulated
    residual_loss: Estimate
    mean_delay: Estimate  # seconds, rebuilt datagrams only
    p99_delay: Estimate  # seconds, rebuilt datagrams only
    rebuilt: int
    datagrams: int

    def as_dict(self) -> dict[str, Any]:
        return {
            "code": self.code,
            "overhead": self.overhead,
            "residual_loss": self.residual_loss.as_dict(),
            "mean_delay_s": self.mean_delay.as_dict(),
            "p99_delay_s": self.p99_delay.as_dict(),
            "rebuilt": self.rebuilt,
            "datagrams": self.datagrams,
            "method": f"seeded simulation, {REPLICATIONS} replications, 95 % t interval",
        }


def _estimate(values: list[float]) -> Estimate:
    count = len(values)
    mean = sum(values) / count
    if count < 2:
        return Estimate(mean, mean, mean)
    spread = math.sqrt(sum((v - mean) ** 2 for v in values) / (count - 1))
    half = _T975.get(count - 1, 1.96) * spread / math.sqrt(count)
    return Estimate(mean, max(0.0, mean - half), mean + half)


def _replicate(
    make: tuple[str, dict[str, Any]], channel: GilbertElliott, rate: float, datagrams: int, seed: int
) -> tuple[float, list[float], int]:
    """One replication: (residual loss, delays of rebuilt datagrams, link packets sent)."""
    kind, params = make
    encoder: BlockEncoder | SlidingEncoder
    decoder: BlockDecoder | SlidingDecoder
    if kind == "block":
        encoder = BlockEncoder(EncoderSettings(**params), session=1)
        decoder = BlockDecoder(DecoderSettings())
    else:
        encoder = SlidingEncoder(SlidingSettings(**params), session=1)
        decoder = SlidingDecoder(SlidingDecoderSettings(max_window=max(params.get("window", 1), 1)))
    lost = make_channel(channel, seed)
    sent_at = np.arange(datagrams) / rate
    delays: list[float] = []
    delivered = 0
    packets = 0

    def take(events: list[Event], now: float) -> None:
        nonlocal delivered
        for event in events:
            if isinstance(event, Delivery):
                delivered += 1
                if event.recovered:
                    delays.append(now - sent_at[int.from_bytes(event.data[:4], "big")])

    def carry(out: list[bytes], now: float) -> None:
        nonlocal packets
        packets += len(out)
        for packet in out:
            if not lost.lose():
                if isinstance(decoder, BlockDecoder):
                    take(decoder.receive(packet, None, now), now)
                else:
                    take(decoder.receive(packet, now)[0], now)

    padding = bytes(_PAYLOAD_BYTES - 4)
    for index in range(datagrams):
        now = float(sent_at[index])
        deadline = encoder.next_deadline()
        if deadline is not None and deadline <= now:
            carry(encoder.on_timer(now), now)
        deadline = decoder.next_deadline()
        if deadline is not None and deadline <= now:
            take(decoder.on_timer(now), now)
        carry(encoder.send(index.to_bytes(4, "big") + padding, 0, now), now)
    end = datagrams / rate + 10.0
    carry(encoder.close(), end)
    take(decoder.on_timer(end + 10.0) + decoder.close(), end + 10.0)
    return 1 - delivered / datagrams, delays, packets


def simulate(
    kind: str,
    params: dict[str, Any],
    channel: GilbertElliott,
    rate: float,
    *,
    datagrams: int = DEFAULT_DATAGRAMS,
    seed: int = 1,
) -> SimulatedCode:
    """Residual loss and rebuilt datagrams' delay of one code, ``kind`` "block" (``params`` are
    EncoderSettings fields) or "sliding" (SlidingSettings fields), at ``rate`` datagrams/s."""
    if kind not in ("block", "sliding"):
        raise ValueError(f"code must be block or sliding, got {kind!r}")
    if not (math.isfinite(rate) and rate > 0):
        raise ValueError(f"rate must be > 0, got {rate!r}")
    if not REPLICATIONS <= datagrams <= MAX_DATAGRAMS:
        raise ValueError(f"datagrams must be {REPLICATIONS}..{MAX_DATAGRAMS}, got {datagrams}")
    per = datagrams // REPLICATIONS
    residuals, means, p99s, rebuilt, packets = [], [], [], 0, 0
    for replication in range(REPLICATIONS):
        residual, delays, sent = _replicate((kind, params), channel, rate, per, seed + replication)
        residuals.append(residual)
        means.append(float(np.mean(delays)) if delays else 0.0)
        p99s.append(float(np.percentile(delays, 99)) if delays else 0.0)
        rebuilt += len(delays)
        packets += sent
    total = per * REPLICATIONS
    if kind == "block":
        name = f"block k={params.get('block_size')} m={params.get('repair')}"
    else:
        name = f"sliding window={params.get('window')} interval={params.get('repair_interval')}"
    return SimulatedCode(
        code=name,
        overhead=packets / total - 1,
        residual_loss=_estimate(residuals),
        mean_delay=_estimate(means),
        p99_delay=_estimate(p99s),
        rebuilt=rebuilt,
        datagrams=total,
    )
