"""Air time of a code on a narrow link, as the daemon's pacer spends it: the planner's link budget.

Pure arithmetic over the same constants the pacer and the packet format use, so a plan and a
running pair agree:

* **Air rate used**: source packets are header + datagram, repair packets header + symbol prefix +
  the longest datagram (a repair symbol is as long as its block's longest datagram); each also
  carries IP + UDP headers on the air (the pacer counts them against ``link.rate``).
* **A burst's queueing delay**: B datagrams arriving at once (a camera still sent back to back)
  fill blocks of k; each full block's m repair packets are queued right after its k-th datagram
  (first in, first out, as the pacer sends data).  The pacer's bucket lets its burst size out at
  once and the rest at the rate, so the burst's last datagram leaves after
  (B·source + ⌊(B−1)/k⌋·m·repair − burst size) / rate seconds — on an otherwise idle link.
* **The queue bound**: the pacer holds at most ``link.queue_ms`` of air time; a burst whose
  packets exceed it loses repair (the pacer's rule), and if its source alone exceeds it, data.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from fecproxy.protocol import wire
from fecproxy.protocol.pacer import DEFAULT_BURST_PACKETS, IPV4_UDP_HEADER_BYTES

#: The pacer's queue bound when ``link.queue_ms`` is not set (the config's default, kept here so
#: the planner needs no config import: the config layer sits above this one).
DEFAULT_QUEUE_MS = 1000
#: The MTU the pacer's default burst size is counted in (config ``link.mtu``'s default).
DEFAULT_MTU = 1500


class BudgetError(ValueError):
    """Link-budget inputs that cannot describe a link."""


@dataclass(frozen=True)
class LinkBudget:
    """What the operator declares about the air: rate, datagram sizes, bursts, the pacer's queue."""

    rate_bps: float  # link.rate: bits per second on the air, IP/UDP headers counted
    datagram_bytes: float  # mean application datagram size
    max_bytes: float | None = None  # longest datagram (repair symbol length); None = datagram_bytes
    burst_datagrams: int | None = None  # datagrams an application sends back to back
    queue_ms: float = DEFAULT_QUEUE_MS  # link.queue_ms
    header_bytes: int = IPV4_UDP_HEADER_BYTES  # 48 over IPv6
    trailer_bytes: int = 0  # the authentication trailer (auth.key_file set: 25 bytes)
    mtu: int = DEFAULT_MTU

    def __post_init__(self) -> None:
        if not (math.isfinite(self.rate_bps) and self.rate_bps > 0):
            raise BudgetError(f"link rate must be > 0 bit/s, got {self.rate_bps!r}")
        if not (math.isfinite(self.datagram_bytes) and 0 <= self.datagram_bytes <= wire.MAX_DATAGRAM_LIMIT):
            raise BudgetError(f"datagram size must be 0..{wire.MAX_DATAGRAM_LIMIT} bytes, got {self.datagram_bytes!r}")
        if self.burst_datagrams is not None and not (1 <= self.burst_datagrams <= 100_000):
            raise BudgetError(f"burst must be 1..100000 datagrams, got {self.burst_datagrams!r}")
        if not (math.isfinite(self.queue_ms) and self.queue_ms > 0):
            raise BudgetError(f"queue time must be > 0 ms, got {self.queue_ms!r}")

    @property
    def rate_bytes(self) -> float:
        return self.rate_bps / 8.0

    @property
    def symbol_bytes(self) -> float:
        return self.datagram_bytes if self.max_bytes is None else max(self.max_bytes, self.datagram_bytes)

    @property
    def source_wire_bytes(self) -> float:
        return wire.SOURCE_HEADER_BYTES + self.datagram_bytes + self.trailer_bytes + self.header_bytes

    @property
    def repair_wire_bytes(self) -> float:
        return (
            wire.REPAIR_HEADER_BYTES
            + wire.SYMBOL_PREFIX_BYTES
            + self.symbol_bytes
            + self.trailer_bytes
            + self.header_bytes
        )

    @property
    def pacer_burst_bytes(self) -> int:
        """The pacer's bucket size (RFC 2697's CBS) with its defaults."""
        return DEFAULT_BURST_PACKETS * self.mtu

    @property
    def queue_limit_bytes(self) -> float:
        return self.rate_bytes * self.queue_ms / 1000.0

    def source_use(self, datagram_rate: float) -> float:
        """Share of the air rate the source packets take (1 = all of it)."""
        return datagram_rate * self.source_wire_bytes / self.rate_bytes

    def repair_use(self, datagram_rate: float, k: int, m: int) -> float:
        """Share of the air rate the repair packets take, m per k datagrams."""
        return datagram_rate * (m / k) * self.repair_wire_bytes / self.rate_bytes

    def burst_queue_bytes(self, k: int, m: int) -> float:
        """Bytes the pacer holds at the peak of a burst: all its packets less the bucket."""
        burst = self.burst_datagrams or 0
        total = burst * self.source_wire_bytes + (burst // k) * m * self.repair_wire_bytes
        return max(0.0, total - self.pacer_burst_bytes)

    def burst_delay(self, k: int, m: int) -> float | None:
        """Seconds the burst's last datagram waits in the pacer (None without a burst)."""
        burst = self.burst_datagrams
        if burst is None:
            return None
        before = burst * self.source_wire_bytes + ((burst - 1) // k) * m * self.repair_wire_bytes
        return max(0.0, before - self.pacer_burst_bytes) / self.rate_bytes

    def burst_source_fits(self) -> bool:
        """Whether the burst's source packets alone fit the pacer's queue (else data is dropped)."""
        burst = self.burst_datagrams or 0
        return burst * self.source_wire_bytes - self.pacer_burst_bytes <= self.queue_limit_bytes

    def burst_fits(self, k: int, m: int) -> bool:
        """Whether a burst and its full blocks' repair fit the queue (else repair is dropped)."""
        return self.burst_queue_bytes(k, m) <= self.queue_limit_bytes


def largest_link_packet(max_datagram_bytes: int, trailer_bytes: int = 0) -> int:
    """UDP payload of the longest packet a daemon sends: a repair packet (header + symbol prefix +
    the longest datagram), longer than a source packet of the same datagram (header 14 < 12 + 5)."""
    return wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + max_datagram_bytes + trailer_bytes


def max_datagram_for_mtu(mtu: int, header_bytes: int, trailer_bytes: int = 0) -> int:
    """The largest fec.max_datagram_bytes whose link packets fit ``mtu`` without IP fragmentation."""
    return mtu - header_bytes - (largest_link_packet(0, trailer_bytes))


def parse_rate(text: str) -> float:
    """'9600', '9.6k', '256k', '2M' (bits per second, SI: k = 1000) → float; BudgetError on junk."""
    raw = str(text).strip()
    scale = {"k": 1e3, "K": 1e3, "m": 1e6, "M": 1e6, "g": 1e9, "G": 1e9}.get(raw[-1:], 1.0)
    number = raw[:-1] if scale != 1.0 else raw
    try:
        value = float(number) * scale
    except ValueError:
        raise BudgetError(f"not a rate in bits per second: {text!r} (e.g. 9600, 9.6k, 256k, 2M)") from None
    if not (math.isfinite(value) and value > 0):
        raise BudgetError(f"a rate must be > 0 bits per second, got {text!r}")
    return value


__all__ = [
    "DEFAULT_MTU",
    "DEFAULT_QUEUE_MS",
    "BudgetError",
    "LinkBudget",
    "largest_link_packet",
    "max_datagram_for_mtu",
    "parse_rate",
]
