"""Sans-IO block encoder: datagrams and ``now`` in, link packets and the next deadline out.

The sender frames each application datagram as a source packet and returns it at once, so an
undamaged link adds no delay.  The datagram is also copied into the open block as the RFC 6363 §4
source symbol (flow ‖ length ‖ data ‖ padding).  The block closes when it holds k datagrams or when
its flush deadline (arrival of its first datagram + flush interval) passes; closing computes the
repair packets (RFC 5510 §8.2 code with the block's actual k).
"""

from __future__ import annotations

import struct
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from . import packet
from .codec import BlockCode
from .repair_rule import SHORT_BLOCK_RULES, repair_count

#: RFC 6363 §4 / RFC 6865 §4 source symbol prefix: flow id (1 byte) ‖ length (2 bytes, big-endian).
_SYMBOL_PREFIX = struct.Struct(">BH")


class DatagramTooLarge(ValueError):
    """The application sent more than max_datagram bytes; the caller counts it as a drop."""

    reason = "oversize"


@dataclass(frozen=True)
class EncoderSettings:
    """What shapes a block.  Validated here because the encoder trusts it afterwards."""

    block_size: int = 16  # k
    repair: int = 4  # m
    flush_interval: float = 0.020  # seconds
    max_datagram: int = 1400
    short_block_repair: str = "proportional"

    def __post_init__(self) -> None:
        if not 1 <= self.block_size <= packet.MAX_K:
            raise ValueError(f"block_size {self.block_size} outside 1..{packet.MAX_K}")
        if not 0 <= self.repair <= packet.MAX_ESI + 1 - self.block_size:
            raise ValueError(f"repair {self.repair} with block_size {self.block_size} exceeds n ≤ 255")
        if not self.flush_interval > 0:
            raise ValueError(f"flush_interval must be positive, got {self.flush_interval}")
        if not 1 <= self.max_datagram <= packet.MAX_DATAGRAM_LIMIT:
            raise ValueError(f"max_datagram {self.max_datagram} outside 1..{packet.MAX_DATAGRAM_LIMIT}")
        if self.short_block_repair not in SHORT_BLOCK_RULES:
            raise ValueError(f"short_block_repair {self.short_block_repair!r} not one of {SHORT_BLOCK_RULES}")

    def repair_for(self, k_actual: int) -> int:
        """Repair packets for a block of k_actual datagrams (see fecproxy.repair_rule)."""
        return repair_count(self.block_size, self.repair, k_actual, self.short_block_repair)


@dataclass
class EncoderStats:
    source_packets: int = 0
    repair_packets: int = 0
    blocks: int = 0
    short_blocks: int = 0
    dropped: dict[str, int] = field(default_factory=dict)


@lru_cache(maxsize=512)
def _code(k: int, n: int) -> BlockCode:
    return BlockCode(k, n)


class BlockEncoder:
    """One direction's encoder.  Not thread-safe; one per link direction."""

    def __init__(self, settings: EncoderSettings, session: int, *, first_sbn: int = 0):
        if not 0 <= session <= 0xFFFFFFFF:
            raise ValueError(f"session {session} does not fit 32 bits")
        self.session = session
        self.stats = EncoderStats()
        self._sbn = first_sbn % packet.SBN_MODULUS
        self._settings = settings
        self._pending: EncoderSettings | None = None
        self._allocate(settings)
        self._count = 0  # datagrams in the open block
        self._symbol_len = 0
        self._deadline: float | None = None

    @property
    def settings(self) -> EncoderSettings:
        return self._settings

    @property
    def sbn(self) -> int:
        """Number of the open (or next) source block."""
        return self._sbn

    def update(self, settings: EncoderSettings) -> None:
        """New k/m/flush apply from the next block; the open one keeps the shape it started with."""
        if self._count == 0:
            self._settings = settings
            self._allocate(settings)
        else:
            self._pending = settings

    def _allocate(self, settings: EncoderSettings) -> None:
        width = packet.SYMBOL_PREFIX_BYTES + settings.max_datagram
        width += -width % 8  # whole uint64 words for the codec
        # One bytearray, seen by the codec as a (k, width) array without a copy: the per-datagram
        # copy is then a plain memoryview slice assignment, not numpy calls on a row.
        self._storage = memoryview(bytearray(settings.block_size * width))
        self._width = width
        self._symbols = np.frombuffer(self._storage, dtype=np.uint8).reshape(settings.block_size, width)

    def send(self, datagram: bytes, flow: int, now: float) -> list[bytes]:
        """Frame one application datagram; returns the packets to put on the link now."""
        settings = self._settings
        size = len(datagram)
        if size > settings.max_datagram:
            self.stats.dropped["oversize"] = self.stats.dropped.get("oversize", 0) + 1
            raise DatagramTooLarge(f"datagram of {size} bytes exceeds max_datagram {settings.max_datagram}")
        index = self._count
        if index == 0:
            self._deadline = now + settings.flush_interval
        start = index * self._width
        storage = self._storage
        storage[start : start + packet.SYMBOL_PREFIX_BYTES] = _SYMBOL_PREFIX.pack(flow, size)
        storage[start + packet.SYMBOL_PREFIX_BYTES : start + packet.SYMBOL_PREFIX_BYTES + size] = datagram
        if size + packet.SYMBOL_PREFIX_BYTES > self._symbol_len:
            self._symbol_len = size + packet.SYMBOL_PREFIX_BYTES
        self._count = index + 1
        full = self._count == settings.block_size
        out = [packet.encode_source(self.session, self._sbn, index, flow, bytes(datagram), end=full)]
        self.stats.source_packets += 1
        if full:
            out.extend(self._close())
        return out

    def next_deadline(self) -> float | None:
        """When the open block must be flushed; None when no block is open."""
        return self._deadline

    def on_timer(self, now: float) -> list[bytes]:
        if self._deadline is not None and now >= self._deadline:
            return self._close()
        return []

    def flush(self) -> list[bytes]:
        """Close the open block now (shutdown): its datagrams get their repair packets."""
        return self._close() if self._count else []

    def _close(self) -> list[bytes]:
        k = self._count
        settings = self._settings
        m = settings.repair_for(k)
        length = self._symbol_len
        out: list[bytes] = []
        if m:
            repair = _code(k, k + m).encode(self._symbols[:k, :length])
            sbn, session = self._sbn, self.session
            out = [packet.encode_repair(session, sbn, k + j, k, repair[j].tobytes()) for j in range(m)]
        self._symbols[:k, :length] = 0  # padding of the next block must be zeros again
        self.stats.repair_packets += m
        self.stats.blocks += 1
        if k < settings.block_size:
            self.stats.short_blocks += 1
        self._sbn = (self._sbn + 1) % packet.SBN_MODULUS
        self._count = 0
        self._symbol_len = 0
        self._deadline = None
        if self._pending is not None:
            self._settings, self._pending = self._pending, None
            self._allocate(self._settings)
        return out
