"""Air-rate pacing of one daemon's link output, sans-IO: packets and ``now`` in, packets due out.

A narrow radio carries a few kbit/s to a few Mbit/s.  A sender that writes every packet the
moment it has it, and a block's m repair packets in one go, overflows the modem's small buffer
when an application sends a burst (a camera still): the modem then drops by accident, and no
code rate repairs that.  The pacer holds the link output in *our* queue and lets it out at the
configured air rate, so the modem's buffer stays nearly empty and every drop follows a rule:

* **Token bucket** (RFC 2697 §2: committed information rate and committed burst size).  Tokens
  are bytes on the air (IP + UDP headers counted: the radio carries them too), filled at
  ``rate_bps / 8`` per second up to ``burst_bytes``.  A packet leaves when the bucket holds its
  whole size, and takes that many tokens.  An idle link has a full bucket, so a datagram that
  finds the queue empty leaves at once: pacing costs nothing until the application bursts.
* **Bounded queue**, measured in air time: what waits may take at most ``queue_s`` seconds to send
  at the rate.  When an arrival would exceed that, the rule is
  - *repair before source*: a source packet carries data, a repair packet only protects it;
  - *oldest repair first*: the repair of an older block is the likeliest to arrive too late for
    the decoder's hold anyway;
  - *control is never dropped for queue space* (loss reports, key checks: small and rare): it
    pushes out repair, then the oldest source, and otherwise waits beyond the bound (at most
    :data:`MAX_CONTROL_QUEUED` of them: the memory bound).
  An arriving source packet that still finds no room is dropped (``queue_full``); a queued packet
  pushed out for a newcomer is dropped as ``displaced``.
* **Order**: control first (a report describes *now*), then data in arrival order (the decoder
  expects a block's source packets before its repair).

Every packet offered is, at any moment, exactly one of: sent, queued, or dropped under one
reason — :meth:`Pacer.counters` says so (``offered == sent + queued + dropped``).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Generic, TypeVar


class PacketKind(StrEnum):
    SOURCE = "source"
    REPAIR = "repair"
    CONTROL = "control"


class PacerDrop(StrEnum):
    """Why a packet offered to the pacer never left; each is a labelled counter."""

    QUEUE_FULL = "queue_full"  # it arrived to a queue full of what the rule keeps before it
    DISPLACED = "displaced"  # it was queued, and pushed out for a packet the rule ranks higher
    CONTROL_LIMIT = "control_limit"  # control beyond MAX_CONTROL_QUEUED (memory bound, not queue space)
    SHUTDOWN = "shutdown"  # still queued when the daemon stopped


#: Bytes of IP + UDP header per packet counted against the rate (IPv4: 20, RFC 791 §3.1, + UDP 8,
#: RFC 768).  The shell passes 48 for an IPv6 peer (RFC 8200 §3: 40-byte fixed header).
IPV4_UDP_HEADER_BYTES = 28
IPV6_UDP_HEADER_BYTES = 48
#: Default burst size (RFC 2697's CBS): two full 1500-byte packets.  The bucket must hold the
#: largest packet (else it could never leave), and a small burst keeps what the modem buffers
#: at a couple of packets when the rate matches the air rate.  Common practice, no source.
DEFAULT_BURST_PACKETS = 2
#: Control packets allowed to wait beyond the air-time bound.  Reports go once a second and key
#: checks once a minute, so 64 is over a minute of a link that sends nothing at all: hitting the
#: cap means the rate is far too low for the configuration, and memory stays bounded.
MAX_CONTROL_QUEUED = 64
#: The queue never holds more than 64 MiB of packets whatever rate × queue time says: 5 s of air
#: at 100 Mbit/s, far beyond the narrow links pacing is for; a longer queue is a store, not a
#: pacer, and memory must stay bounded (common practice, no source).
MAX_QUEUE_BYTES = 64 * 1024 * 1024
#: Smallest rate accepted: below 1200 bit/s no radio we know of carries IP (from memory).
MIN_RATE_BPS = 1200.0
#: Dropped entries tolerated inside the deques before a compaction pass: keeps the pass rare on a
#: nearly empty queue.
_COMPACT_FLOOR = 64
#: Bytes of rounding forgiven when a deadline computed in floating point comes back: without it a
#: wake-up at exactly the deadline could find the bucket a few ulps short and spin.
_TOKEN_SLACK = 1e-6

T = TypeVar("T")


class PacerConfigError(ValueError):
    """Pacer settings that cannot describe a link."""


@dataclass
class _Entry(Generic[T]):
    kind: PacketKind
    packet: bytes
    destination: T
    wire_bytes: int  # packet + IP/UDP headers: what it costs on the air
    enqueued_at: float
    gone: bool = False  # sent or dropped; removed lazily from the deques


@dataclass(frozen=True)
class Departure(Generic[T]):
    """A packet the shell must write to the link socket now."""

    packet: bytes
    destination: T
    kind: PacketKind
    waited: float  # seconds it spent in the queue (0 for one that left at once)


@dataclass
class PacerCounters:
    """Totals since start; ``offered[kind] == sent[kind] + queued[kind] + Σ dropped[(kind, reason)]``."""

    offered: dict[PacketKind, int] = field(default_factory=lambda: dict.fromkeys(PacketKind, 0))
    offered_wire_bytes: dict[PacketKind, int] = field(default_factory=lambda: dict.fromkeys(PacketKind, 0))
    sent: dict[PacketKind, int] = field(default_factory=lambda: dict.fromkeys(PacketKind, 0))
    sent_wire_bytes: dict[PacketKind, int] = field(default_factory=lambda: dict.fromkeys(PacketKind, 0))
    dropped: dict[tuple[PacketKind, PacerDrop], int] = field(
        default_factory=lambda: {(k, r): 0 for k in PacketKind for r in PacerDrop}
    )
    queued: dict[PacketKind, int] = field(default_factory=lambda: dict.fromkeys(PacketKind, 0))

    def dropped_of(self, kind: PacketKind) -> int:
        return sum(n for (k, _), n in self.dropped.items() if k is kind)


class Pacer(Generic[T]):
    """Token-bucket pacing with a drop rule; the aioquic contract: feed with :meth:`send`, drain
    with :meth:`datagrams_to_send`, wake at :meth:`next_deadline`."""

    def __init__(
        self,
        rate_bps: float,
        queue_s: float,
        *,
        mtu: int = 1500,
        header_bytes: int = IPV4_UDP_HEADER_BYTES,
        burst_bytes: int | None = None,
        now: float = 0.0,
    ) -> None:
        if not (math.isfinite(rate_bps) and rate_bps >= MIN_RATE_BPS):
            raise PacerConfigError(f"rate must be at least {MIN_RATE_BPS:g} bit/s, got {rate_bps!r}")
        if not (math.isfinite(queue_s) and queue_s > 0):
            raise PacerConfigError(f"queue time must be > 0 seconds, got {queue_s!r}")
        self.rate_bytes = rate_bps / 8.0
        self.header_bytes = header_bytes
        self.burst_bytes = max(burst_bytes or DEFAULT_BURST_PACKETS * mtu, mtu)
        #: The air-time bound in bytes: what the queue may hold of data.
        self.limit_bytes = min(self.rate_bytes * queue_s, float(MAX_QUEUE_BYTES))
        if self.limit_bytes < mtu:
            raise PacerConfigError(
                f"a queue of {queue_s * 1000:g} ms holds less than one {mtu}-byte packet at {rate_bps:g} bit/s "
                f"({air_time(mtu, rate_bps) * 1000:.0f} ms); allow at least that"
            )
        self._tokens = float(self.burst_bytes)
        self._filled_at = now
        self._control: deque[_Entry[T]] = deque()
        self._data: deque[_Entry[T]] = deque()  # source and repair in arrival order
        self._repairs: deque[_Entry[T]] = deque()  # the same repair entries, oldest first
        self._sources: deque[_Entry[T]] = deque()
        self._queued_bytes = 0  # wire bytes of data and control waiting
        self._gone_inside = 0  # dropped entries still inside the deques (removed lazily)
        self.counters = PacerCounters()
        #: Seconds the last departed packet waited: the delay of "the packet now leaving".
        self.last_wait = 0.0

    # -- feeding ---------------------------------------------------------------------------------

    def send(self, packet: bytes, kind: PacketKind, now: float, destination: T) -> None:
        """Offer one link packet for ``destination`` (opaque here: the shell's address); it leaves
        through :meth:`datagrams_to_send` or is counted as dropped."""
        counters = self.counters
        counters.offered[kind] += 1
        entry = _Entry(kind, bytes(packet), destination, len(packet) + self.header_bytes, now)
        counters.offered_wire_bytes[kind] += entry.wire_bytes
        if kind is PacketKind.CONTROL:
            self._make_room(entry.wire_bytes, (self._repairs, self._sources))
            waiting_control = sum(1 for e in self._control if not e.gone)
            if waiting_control >= MAX_CONTROL_QUEUED:
                counters.dropped[(kind, PacerDrop.CONTROL_LIMIT)] += 1
                return
            self._control.append(entry)
        else:
            self._make_room(entry.wire_bytes, (self._repairs,))
            if self._queued_bytes + entry.wire_bytes > self.limit_bytes:
                counters.dropped[(kind, PacerDrop.QUEUE_FULL)] += 1
                return
            self._data.append(entry)
            (self._sources if kind is PacketKind.SOURCE else self._repairs).append(entry)
        self._queued_bytes += entry.wire_bytes
        counters.queued[kind] += 1
        self._trim()

    def _make_room(self, wanted: int, victims: tuple[deque[_Entry[T]], ...]) -> None:
        """Push out queued packets, oldest first from each deque in turn, until ``wanted`` more
        bytes fit under the bound (or nothing of those kinds is left)."""
        for deque_ in victims:
            while self._queued_bytes + wanted > self.limit_bytes and deque_:
                victim = deque_.popleft()
                if victim.gone:
                    continue
                self._drop(victim, PacerDrop.DISPLACED)

    def _drop(self, entry: _Entry[T], reason: PacerDrop) -> None:
        entry.gone = True
        self._gone_inside += 1
        self._queued_bytes -= entry.wire_bytes
        self.counters.queued[entry.kind] -= 1
        self.counters.dropped[(entry.kind, reason)] += 1

    # -- draining --------------------------------------------------------------------------------

    def _refill(self, now: float) -> None:
        if now > self._filled_at:
            self._tokens = min(float(self.burst_bytes), self._tokens + (now - self._filled_at) * self.rate_bytes)
            self._filled_at = now

    def _head(self) -> _Entry[T] | None:
        for deque_ in (self._control, self._data):
            while deque_ and deque_[0].gone:
                deque_.popleft()
                self._gone_inside -= 1
            if deque_:
                return deque_[0]
        return None

    def datagrams_to_send(self, now: float) -> list[Departure[T]]:
        """Every packet the bucket lets out at ``now``, in the order to write them."""
        self._refill(now)
        out: list[Departure[T]] = []
        while (head := self._head()) is not None and self._tokens + _TOKEN_SLACK >= head.wire_bytes:
            self._tokens = max(0.0, self._tokens - head.wire_bytes)
            (self._control if head.kind is PacketKind.CONTROL else self._data).popleft()
            head.gone = True
            self._queued_bytes -= head.wire_bytes
            counters = self.counters
            counters.queued[head.kind] -= 1
            counters.sent[head.kind] += 1
            counters.sent_wire_bytes[head.kind] += head.wire_bytes
            self.last_wait = max(0.0, now - head.enqueued_at)
            out.append(Departure(head.packet, head.destination, head.kind, self.last_wait))
        self._trim()
        return out

    def _trim(self) -> None:
        """Forget sent or dropped entries: at the heads of the kind deques at once, and everywhere
        once dropped entries outnumber the live ones (so memory follows what is queued, not what
        passed through; amortised O(1) per packet)."""
        for deque_ in (self._repairs, self._sources):
            while deque_ and deque_[0].gone:
                deque_.popleft()
        if self._gone_inside > max(_COMPACT_FLOOR, self.queued_packets):
            for name in ("_control", "_data", "_repairs", "_sources"):
                setattr(self, name, deque(e for e in getattr(self, name) if not e.gone))
            self._gone_inside = 0

    def next_deadline(self) -> float | None:
        """When the packet at the head can leave; None with nothing queued."""
        head = self._head()
        if head is None:
            return None
        missing = head.wire_bytes - self._tokens
        return self._filled_at + max(0.0, missing) / self.rate_bytes

    def close(self) -> int:
        """Count everything still queued as dropped (``shutdown``); returns how many."""
        count = 0
        for deque_ in (self._control, self._data):
            for entry in deque_:
                if not entry.gone:
                    self._drop(entry, PacerDrop.SHUTDOWN)
                    count += 1
            deque_.clear()
        self._gone_inside = 0
        self._repairs.clear()
        self._sources.clear()
        return count

    # -- figures ---------------------------------------------------------------------------------

    @property
    def queued_packets(self) -> int:
        return sum(self.counters.queued.values())

    @property
    def queued_bytes(self) -> int:
        """Wire bytes waiting (IP/UDP headers included)."""
        return self._queued_bytes

    def queued_air_time(self) -> float:
        """Seconds the queue takes to drain at the rate: the delay a packet arriving now meets."""
        return self._queued_bytes / self.rate_bytes

    def held_entries(self) -> int:
        """Entries the deques hold, gone ones included (for the memory-bound test)."""
        return len(self._control) + len(self._data) + len(self._repairs) + len(self._sources)


def air_time(packet_bytes: float, rate_bps: float, header_bytes: int = IPV4_UDP_HEADER_BYTES) -> float:
    """Seconds one packet takes on the air at ``rate_bps``, IP/UDP headers counted."""
    return (packet_bytes + header_bytes) * 8.0 / rate_bps


__all__ = [
    "DEFAULT_BURST_PACKETS",
    "IPV4_UDP_HEADER_BYTES",
    "IPV6_UDP_HEADER_BYTES",
    "MAX_CONTROL_QUEUED",
    "MAX_QUEUE_BYTES",
    "MIN_RATE_BPS",
    "Departure",
    "Pacer",
    "PacerConfigError",
    "PacerCounters",
    "PacerDrop",
    "PacketKind",
    "air_time",
]
