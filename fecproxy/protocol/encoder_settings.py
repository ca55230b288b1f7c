"""What shapes the encoder's blocks and what it counts: its settings (validated once, trusted
after), the size classes a datagram is placed by, and its counters.

Split from :mod:`fecproxy.protocol.encoder`, which re-exports every name here.
"""

from __future__ import annotations

from bisect import bisect_left
from collections.abc import Iterable
from dataclasses import dataclass, field
from functools import cached_property

from fecproxy.protocol import wire
from fecproxy.protocol.repair_rule import DEFAULT_SHORT_BLOCK_REPAIR, SHORT_BLOCK_RULES, repair_count

#: 16 datagrams per block and 4 repair packets (25 % overhead) rides out 4 losses in 20 packets;
#: on an i.i.d. 5 % link that leaves p·P[Binomial(19, 0.05) ≥ 4] ≈ 7e-4 residual loss per
#: datagram (formula from the design notes), while a block of 16 stays short enough to close
#: quickly on busy flows.  Common practice, no source, for the pair itself.
DEFAULT_BLOCK_SIZE = 16
DEFAULT_REPAIR = 4
#: A block that is not full after 20 ms is closed and protected as it is: 20 ms bounds the added
#: recovery delay of sparse traffic at the scale of one voice frame (RFC 3551 §4.5 makes 20 ms
#: the default audio packetisation interval; from memory).
DEFAULT_FLUSH_INTERVAL = 0.020
#: One lane: no interleaving unless asked for, since a lane multiplies the time a block spans.
DEFAULT_INTERLEAVE = 1
#: 16 lanes spread a burst of up to 16·m packets; more would keep 16+ blocks (each a k × symbol
#: buffer, ≈ 22 KB at k = 16 and 1400 bytes) open per class and stretch a block over 16·k link
#: packets, past the receiver's default hold time at modest rates.  Our own bound, no source.
MAX_INTERLEAVE = 16
#: One boundary at 256 bytes: telemetry records, control messages and 20 ms voice frames
#: (160 bytes of G.711 + 12 of RTP header, RFC 3551 §4.5.14; from memory) fall at or below it,
#: bulk data sliced to the path MTU (≈ 1200–1400 bytes) above, so the usual mix is split where it
#: matters while within a class a datagram is padded at most to the class's longest.  Our choice.
DEFAULT_SIZE_CLASSES: tuple[int, ...] = (256,)
#: At most 4 boundaries (5 classes): each class keeps D blocks open and is a label value of the
#: per-class metrics, which must stay a small fixed set (Prometheus naming guide).
MAX_SIZE_BOUNDARIES = 4


def size_class_names(boundaries: Iterable[int]) -> tuple[str, ...]:
    """Label values of the classes the boundaries make: ``le<b>`` for each, ``gt<last>`` above
    (one class, ``all``, without boundaries)."""
    bounds = tuple(boundaries)
    if not bounds:
        return ("all",)
    return tuple(f"le{b}" for b in bounds) + (f"gt{bounds[-1]}",)


@dataclass(frozen=True)
class EncoderSettings:
    """What shapes a block.  Validated here because the encoder trusts it afterwards."""

    block_size: int = DEFAULT_BLOCK_SIZE  # k
    repair: int = DEFAULT_REPAIR  # m
    flush_interval: float = DEFAULT_FLUSH_INTERVAL  # seconds
    max_datagram: int = wire.DEFAULT_MAX_DATAGRAM
    short_block_repair: str = DEFAULT_SHORT_BLOCK_REPAIR
    interleave: int = DEFAULT_INTERLEAVE  # D: open blocks per size class, fed in turn
    size_classes: tuple[int, ...] = DEFAULT_SIZE_CLASSES  # boundaries in bytes, increasing
    allow_repair_above_source: bool = False  # RFC 6363 §8.2 in bytes is enforced unless set

    def __post_init__(self) -> None:
        if not 1 <= self.block_size <= wire.MAX_K:
            raise ValueError(f"block_size {self.block_size} outside 1..{wire.MAX_K}")
        if not 0 <= self.repair <= wire.MAX_ESI + 1 - self.block_size:
            raise ValueError(f"repair {self.repair} with block_size {self.block_size} exceeds n ≤ {wire.MAX_ESI + 1}")
        if not self.flush_interval > 0:
            raise ValueError(f"flush_interval must be positive, got {self.flush_interval}")
        if not 1 <= self.max_datagram <= wire.MAX_DATAGRAM_LIMIT:
            raise ValueError(f"max_datagram {self.max_datagram} outside 1..{wire.MAX_DATAGRAM_LIMIT}")
        if self.short_block_repair not in SHORT_BLOCK_RULES:
            raise ValueError(f"short_block_repair {self.short_block_repair!r} not one of {SHORT_BLOCK_RULES}")
        if not 1 <= self.interleave <= MAX_INTERLEAVE:
            raise ValueError(f"interleave {self.interleave} outside 1..{MAX_INTERLEAVE}")
        bounds = tuple(self.size_classes)
        object.__setattr__(self, "size_classes", bounds)
        if len(bounds) > MAX_SIZE_BOUNDARIES:
            raise ValueError(f"size_classes has {len(bounds)} boundaries; at most {MAX_SIZE_BOUNDARIES}")
        if any(not isinstance(b, int) or b < 1 for b in bounds) or any(
            a >= b for a, b in zip(bounds, bounds[1:], strict=False)
        ):
            raise ValueError(f"size_classes {list(bounds)} must be increasing positive byte counts")

    def repair_for(self, k_actual: int) -> int:
        """Repair packets for a block of k_actual datagrams (see fecproxy.protocol.repair_rule),
        before the RFC 6363 §8.2 byte cap, which depends on the block's datagrams."""
        return repair_count(self.block_size, self.repair, k_actual, self.short_block_repair)

    @cached_property
    def class_names(self) -> tuple[str, ...]:
        return size_class_names(self.size_classes)

    def class_of(self, size: int) -> int:
        """Index of the size class of a datagram of ``size`` bytes."""
        return bisect_left(self.size_classes, size)

    def class_max_datagram(self, index: int) -> int:
        """The longest datagram a block of class ``index`` can hold."""
        bounds = self.size_classes
        return min(bounds[index], self.max_datagram) if index < len(bounds) else self.max_datagram


def repair_byte_cap(m: int, content_bytes: int, symbol_len: int) -> int:
    """RFC 6363 §8.2 in bytes: the largest m' ≤ m with m'·symbol_len ≤ content_bytes, where
    content_bytes is the block's source symbols unpadded (Σ prefix + datagram)."""
    return min(m, content_bytes // symbol_len) if symbol_len else 0


@dataclass
class ClassStats:
    """What one size class cost on the link (headers included)."""

    source_packets: int = 0
    repair_packets: int = 0
    source_bytes: int = 0
    repair_bytes: int = 0
    blocks: int = 0


@dataclass
class EncoderStats:
    source_packets: int = 0
    repair_packets: int = 0
    blocks: int = 0
    short_blocks: int = 0
    source_bytes: int = 0  # source packets' bytes on the link, headers included
    datagram_bytes: int = 0  # the application datagrams' own bytes (the adaptation's byte cap)
    repair_bytes: int = 0  # repair packets' bytes on the link, headers included
    repair_capped: int = 0  # blocks whose repair count the RFC 6363 §8.2 byte rule cut
    dropped: dict[str, int] = field(default_factory=dict)
    classes: dict[str, ClassStats] = field(default_factory=dict)  # by size-class name

    def for_class(self, name: str) -> ClassStats:
        stats = self.classes.get(name)
        if stats is None:
            stats = self.classes[name] = ClassStats()
        return stats
