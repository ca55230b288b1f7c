"""Sans-IO block encoder: datagrams and ``now`` in, link packets and the next deadline out.

The sender frames each application datagram as a source packet and returns it at once, so an
undamaged link adds no delay.  The datagram is also copied into the open block as the RFC 6363 §4
source symbol (flow ‖ length ‖ data ‖ padding).  The block closes when it holds k datagrams or when
its flush deadline (arrival of its first datagram + flush interval) passes; closing computes the
repair packets (RFC 5510 §8.2 code with the block's actual k).

A shell that reads datagrams in batches calls ``send_batch``: every block that fills during the
batch is closed at once (numbered, counted), but its repair computation waits until the end of
the call, where all such blocks of one shape are encoded by a single codec call on their symbols
laid side by side.  Each byte position is its own codeword (RFC 5510 §8.2), so the repair bytes
are exactly those of one call per block; only the codec's per-call overhead is shared.  The link
order stays that of ``send`` (a block's repair right after its last source packet): receivers and
tools may count on link packet i of a block-aligned stream being ESI i mod n.

A datagram longer than ``max_datagram`` is refused the same way by ``send`` and ``send_batch``:
counted as an ``oversize`` drop in ``stats.dropped`` and skipped (no packet, no place in the
block), so one bad datagram never costs the rest of a batch and a daemon needs no try/except.

With a :class:`~fecproxy.protocol.auth.Sealer` (a key is configured), every packet the encoder
returns — source, repair and control (``control``) — passes through ``_sealed``, the one place
that protects outgoing packets, so no kind of packet can leave without its tag.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np

from fecproxy.coding.codec import block_code
from fecproxy.protocol import wire
from fecproxy.protocol.auth import Sealer
from fecproxy.protocol.events import DropReason
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
#: Full blocks whose repair ``send_batch`` computes in one codec call, symbols side by side.
#: Measured on this project's 2-core machine with (16, 1208)-byte blocks, k=16, m=4, µs per
#: block: 50–60 alone, 36 for 2, 30 for 4, 25 for 8, 25–29 for 12 to 32: past ~8 blocks the
#: codec's gathered table (≈ 2.5 MB at 8) no longer fits the caches and nothing more is saved,
#: while the deferred blocks' buffers keep growing.
MAX_BLOCKS_PER_ENCODE = 8
#: A bound in bytes too, for wide symbols (jumbo datagrams): 8 blocks of 16 × 1208 bytes, the
#: knee above, is about 155 KB of source symbols per call.
MAX_BYTES_PER_ENCODE = 160 * 1024


@dataclass(frozen=True)
class EncoderSettings:
    """What shapes a block.  Validated here because the encoder trusts it afterwards."""

    block_size: int = DEFAULT_BLOCK_SIZE  # k
    repair: int = DEFAULT_REPAIR  # m
    flush_interval: float = DEFAULT_FLUSH_INTERVAL  # seconds
    max_datagram: int = wire.DEFAULT_MAX_DATAGRAM
    short_block_repair: str = DEFAULT_SHORT_BLOCK_REPAIR

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

    def repair_for(self, k_actual: int) -> int:
        """Repair packets for a block of k_actual datagrams (see fecproxy.protocol.repair_rule)."""
        return repair_count(self.block_size, self.repair, k_actual, self.short_block_repair)


@dataclass
class EncoderStats:
    source_packets: int = 0
    repair_packets: int = 0
    blocks: int = 0
    short_blocks: int = 0
    source_bytes: int = 0  # source packets' bytes on the link, headers included
    datagram_bytes: int = 0  # the application datagrams' own bytes (the adaptation's byte cap)
    repair_bytes: int = 0  # repair packets' bytes on the link, headers included
    dropped: dict[str, int] = field(default_factory=dict)


class _FullBlock:
    """A block closed by ``send_batch`` whose repair symbols are still to be computed."""

    __slots__ = ("storage", "symbols", "sbn", "k", "m", "length", "packets")

    def __init__(self, storage: memoryview, symbols: np.ndarray, sbn: int, k: int, m: int, length: int):
        self.storage, self.symbols, self.sbn, self.k, self.m, self.length = storage, symbols, sbn, k, m, length
        self.packets: list[bytes] = []  # its repair packets, once computed


class BlockEncoder:
    """One direction's encoder.  Not thread-safe; one per link direction."""

    def __init__(self, settings: EncoderSettings, session: int, *, first_sbn: int = 0, sealer: Sealer | None = None):
        if not 0 <= session <= 0xFFFFFFFF:
            raise ValueError(f"session {session} does not fit 32 bits")
        self.session = session
        #: Protects every packet returned (None: no key).  The shell swaps its key on a reload;
        #: the sequence runs on.
        self.sealer = sealer
        self.stats = EncoderStats()
        self._sbn = first_sbn % wire.SBN_MODULUS
        self._settings = settings
        self._pending: EncoderSettings | None = None
        self._allocate(settings)
        self._count = 0  # datagrams in the open block
        self._previous_k = 0  # k of the block before the open one; 0 = none yet (a new session)
        self._symbol_len = 0
        self._deadline: float | None = None
        self._longest = 0  # longest datagram in blocks closed since take_longest_datagram()

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
        width = wire.SYMBOL_PREFIX_BYTES + settings.max_datagram
        width += -width % 8  # whole uint64 words for the codec
        self._width = width
        self._spare: list[tuple[memoryview, np.ndarray]] = []  # zeroed buffers of this shape
        self._storage, self._symbols = self._new_buffer()

    def _new_buffer(self) -> tuple[memoryview, np.ndarray]:
        # One bytearray, seen by the codec as a (k, width) array without a copy: the per-datagram
        # copy is then a plain memoryview slice assignment, not numpy calls on a row.
        if self._spare:
            return self._spare.pop()
        storage = memoryview(bytearray(self._settings.block_size * self._width))
        return storage, np.frombuffer(storage, dtype=np.uint8).reshape(self._settings.block_size, self._width)

    def take_longest_datagram(self) -> int:
        """The longest datagram of the blocks closed since the last call (0 if none): it sizes
        their repair symbols, so the adaptation's byte cap uses it per report interval."""
        longest, self._longest = self._longest, 0
        return longest

    def send(self, datagram: bytes, flow: int, now: float) -> list[bytes]:
        """Frame one application datagram; returns the packets to put on the link now.

        ``flow`` is the packed 24-bit flow id (slot << 8 | generation), trusted as such.
        An oversize datagram returns no packet and is counted in ``stats.dropped``.
        """
        settings = self._settings
        size = len(datagram)
        if size > settings.max_datagram:
            self._count_drop(DropReason.OVERSIZE, 1)
            return []
        index = self._count
        if index == 0:
            self._deadline = now + settings.flush_interval
        start = index * self._width
        storage = self._storage
        storage[start : start + wire.SYMBOL_PREFIX_BYTES] = wire.SYMBOL_PREFIX.pack(flow >> 8, flow & 0xFF, size)
        storage[start + wire.SYMBOL_PREFIX_BYTES : start + wire.SYMBOL_PREFIX_BYTES + size] = datagram
        if size + wire.SYMBOL_PREFIX_BYTES > self._symbol_len:
            self._symbol_len = size + wire.SYMBOL_PREFIX_BYTES
        self._count = index + 1
        full = self._count == settings.block_size
        header = wire.pack_source_header(
            wire.FLAG_END if full else 0,
            self.session,
            (self._sbn << wire.ESI_BITS) | index,
            flow << wire.FLOW_SHIFT | self._previous_k,
        )
        out = [header + datagram]
        self.stats.source_packets += 1
        self.stats.source_bytes += len(out[0])
        self.stats.datagram_bytes += size
        if full:
            out.extend(self._close())
        return self._sealed(out)

    def control(self, body: bytes) -> bytes:
        """A control packet of this session carrying ``body`` (e.g. a loss report), sealed like
        every other packet."""
        return self._sealed([wire.encode_control(self.session, body)])[0]

    def _sealed(self, packets: list[bytes]) -> list[bytes]:
        """The one place outgoing packets are protected (source, repair and control alike)."""
        sealer = self.sealer
        if sealer is None or not packets:
            return packets
        seal = sealer.seal
        return [seal(packet) for packet in packets]

    def send_batch(self, items: Iterable[tuple[bytes, int]], now: float) -> list[bytes]:
        """Frame a batch of ``(datagram, flow)`` that arrived together at ``now``.

        Returns the same packets in the same order as ``send`` called once per datagram (each
        full block's repair packets right after its last source packet), but the repair of all
        the blocks the batch fills is computed together at the end, one codec call per up to
        MAX_BLOCKS_PER_ENCODE blocks.  An oversize datagram is counted as a drop and skipped,
        as in ``send``; the rest of the batch goes on.
        """
        settings = self._settings
        block_size, max_datagram, width = settings.block_size, settings.max_datagram, self._width
        session, pack_source, pack_prefix = self.session, wire.pack_source_header, wire.SYMBOL_PREFIX.pack_into
        prefix, esi_bits, flag_end = wire.SYMBOL_PREFIX_BYTES, wire.ESI_BITS, wire.FLAG_END
        count, sbn, storage, symbol_len = self._count, self._sbn, self._storage, self._symbol_len
        payload_base = sbn << esi_bits  # the block's FEC Payload ID word; its ESI is or-ed in
        previous_k = self._previous_k
        sources: list[bytes] = []
        pieces = [sources]  # source runs, each full block's (still empty) repair list between them
        deferred: list[_FullBlock] = []
        sent = oversize = sent_bytes = 0
        try:
            for datagram, flow in items:
                size = len(datagram)
                if size > max_datagram:
                    oversize += 1
                    continue
                start = count * width + prefix
                pack_prefix(storage, start - prefix, flow >> 8, flow & 0xFF, size)  # slot, generation, length
                storage[start : start + size] = datagram
                if count == 0:
                    self._deadline = now + settings.flush_interval
                if size + prefix > symbol_len:
                    symbol_len = size + prefix
                count += 1
                sent += 1
                sent_bytes += size
                if count < block_size:
                    sources.append(pack_source(0, session, payload_base | (count - 1), flow << 8 | previous_k) + datagram)
                    continue
                sources.append(pack_source(flag_end, session, payload_base | (count - 1), flow << 8 | previous_k) + datagram)
                self._count, self._symbol_len = count, symbol_len
                block = self._set_aside()
                settings = self._settings  # a pending update applies from the next block on
                block_size, max_datagram, width = settings.block_size, settings.max_datagram, self._width
                count, sbn, storage, symbol_len = 0, self._sbn, self._storage, 0
                payload_base = sbn << esi_bits
                previous_k = self._previous_k
                deferred.append(block)
                sources = []
                pieces += (block.packets, sources)
                if len(deferred) == MAX_BLOCKS_PER_ENCODE:
                    self._encode(deferred)
                    deferred = []
        finally:
            # Even if a bad item raises midway, the block state stays true to the buffer: the
            # datagrams copied in are counted (their source packets are lost with the exception,
            # so a receiver sees them as link loss and the repair still matches).
            self._count, self._symbol_len = count, symbol_len
            self.stats.source_packets += sent
            self.stats.source_bytes += sent_bytes + sent * wire.SOURCE_HEADER_BYTES
            self.stats.datagram_bytes += sent_bytes
            if oversize:
                self._count_drop(DropReason.OVERSIZE, oversize)
        if deferred:
            self._encode(deferred)
        if len(pieces) == 1:
            return self._sealed(sources)
        return self._sealed([data for piece in pieces for data in piece])

    def _set_aside(self) -> _FullBlock:
        """Close the full open block without encoding it: it keeps its buffer until encoded."""
        k = self._count
        block = _FullBlock(self._storage, self._symbols, self._sbn, k, self._settings.repair_for(k), self._symbol_len)
        self._storage, self._symbols = self._new_buffer() if self._pending is None else (None, None)
        self._advance(k)
        return block

    def _encode(self, blocks: list[_FullBlock]) -> None:
        """Fill each set-aside block's ``packets`` with its repair packets: one codec call per
        run of blocks of equal (k, m), within MAX_BYTES_PER_ENCODE; then recycle the buffers."""
        # k ≤ MAX_K and ESI = k + j ≤ k + m − 1 ≤ MAX_ESI hold by EncoderSettings' checks, so the
        # header is packed unchecked (what wire.encode_repair does after validating them).
        session, pack_repair, esi_bits = self.session, wire.pack_repair_header, wire.ESI_BITS
        run: list[_FullBlock] = []
        run_bytes = 0
        for position, block in enumerate(blocks):
            run.append(block)
            run_bytes += block.k * block.length
            after = blocks[position + 1] if position + 1 < len(blocks) else None
            if (
                after is not None
                and after.k == block.k
                and after.m == block.m
                and run_bytes + after.k * after.length <= MAX_BYTES_PER_ENCODE
            ):
                continue
            k, m = block.k, block.m
            if m:
                code = block_code(k, k + m)
                if len(run) == 1:
                    parts = [(block, code.encode(block.symbols[:k, : block.length]), 0)]
                else:
                    # Side by side along the symbol axis, each part padded to whole 8-byte words
                    # (the buffers hold zeros there), so the codec needs no copy of its own.
                    widths = [b.length + (-b.length % 8) for b in run]
                    joined = np.empty((k, sum(widths)), dtype=np.uint8)
                    offsets = []
                    offset = 0
                    for b, w in zip(run, widths):
                        joined[:, offset : offset + w] = b.symbols[:k, :w]
                        offsets.append(offset)
                        offset += w
                    repair = code.encode(joined)
                    parts = [(b, repair, o) for b, o in zip(run, offsets)]
                for b, repair, o in parts:
                    end = o + b.length
                    base = b.sbn << esi_bits
                    b.packets.extend(pack_repair(session, base | (k + j), k) + repair[j, o:end].data for j in range(m))
            shape = (self._settings.block_size, self._width)
            for b in run:
                b.symbols[:k, : b.length] = 0  # padding of a later block must be zeros again
                if b.symbols.shape == shape and len(self._spare) < MAX_BLOCKS_PER_ENCODE:
                    self._spare.append((b.storage, b.symbols))
            run, run_bytes = [], 0

    def next_deadline(self) -> float | None:
        """When the open block must be flushed; None when no block is open."""
        return self._deadline

    def on_timer(self, now: float) -> list[bytes]:
        if self._deadline is not None and now >= self._deadline:
            return self._sealed(self._close())
        return []

    def close(self) -> list[bytes]:
        """Shutdown: close the open block now, so its datagrams get their repair packets.

        The encoder stays usable; the next datagram opens a new block.
        """
        return self._sealed(self._close()) if self._count else []

    def _count_drop(self, reason: DropReason, count: int) -> None:
        self.stats.dropped[reason] = self.stats.dropped.get(reason, 0) + count

    def _close(self) -> list[bytes]:
        k = self._count
        m = self._settings.repair_for(k)
        length = self._symbol_len
        out: list[bytes] = []
        if m:
            repair = block_code(k, k + m).encode(self._symbols[:k, :length])
            # Unchecked header, as in _encode: EncoderSettings bounds k and k + m.
            base, session, pack_repair = self._sbn << wire.ESI_BITS, self.session, wire.pack_repair_header
            out = [pack_repair(session, base | (k + j), k) + repair[j].data for j in range(m)]
        self._symbols[:k, :length] = 0  # padding of the next block must be zeros again
        self._advance(k)
        return out

    def _advance(self, k: int) -> None:
        """Count the block just closed (k datagrams) and open the next one."""
        settings = self._settings
        self.stats.repair_packets += settings.repair_for(k)
        self.stats.repair_bytes += settings.repair_for(k) * (wire.REPAIR_HEADER_BYTES + self._symbol_len)
        self.stats.blocks += 1
        if self._symbol_len - wire.SYMBOL_PREFIX_BYTES > self._longest:
            self._longest = self._symbol_len - wire.SYMBOL_PREFIX_BYTES
        if k < settings.block_size:
            self.stats.short_blocks += 1
        self._sbn = (self._sbn + 1) % wire.SBN_MODULUS
        self._previous_k = k
        self._count = 0
        self._symbol_len = 0
        self._deadline = None
        if self._pending is not None:
            self._settings, self._pending = self._pending, None
            self._allocate(self._settings)
