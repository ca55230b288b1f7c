"""Sans-IO block encoder: datagrams and ``now`` in, link packets and the next deadline out.

The sender frames each application datagram as a source packet and returns it at once, so an
undamaged link adds no delay.  The datagram is also copied into an open block as the RFC 6363 §4
source symbol (flow ‖ length ‖ data ‖ padding).  A block closes when it holds k datagrams or when
its flush deadline (arrival of its first datagram + flush interval) passes; closing computes the
repair packets (RFC 5510 §8.2 code with the block's actual k).

Several blocks are open at once, one per (size class, lane):

* Size classes (``size_classes``, boundaries in bytes): a datagram goes to the blocks of its class,
  so a 20-byte record is never padded to the length of a 1400-byte image slice (repair symbols are
  as long as the block's longest datagram).
* Interleaving (``interleave`` = D lanes per class): consecutive datagrams of a class go to its D
  open blocks in turn, so a run of up to D·m lost link packets costs each block at most m (the
  property RFC 8627 §1.1.3 and RFC 6683 §2.1 state for parity codes).  Source packets still leave
  at once; only repair waits, and a block spans about D times as many link packets.

Each block has its own SBN (numbers are taken consecutively as blocks open), its own flush
deadline and its own k' when closed early.  "previous k" in a source packet is the k of block
SBN − 1 if that block has closed by the time the packet is sent, else 0 (with one open block at a
time this is always the block before; see docs/design.md "Wire format").

RFC 6363 §8.2 in bytes: unless ``allow_repair_above_source``, a block's repair count is cut so
that its repair symbols (m'·symbol length) do not exceed its source symbols' content (the
unpadded prefix + datagram of each); for a block of equal datagrams this is exactly m ≤ k.  The
blocks so cut are counted (``stats.repair_capped``).

A shell that reads datagrams in batches calls ``send_batch``: every block that fills during the
batch is closed at once (numbered, counted), but its repair computation waits until the end of
the call, where all such blocks of one shape are encoded by a single codec call on their symbols
laid side by side.  Each byte position is its own codeword (RFC 5510 §8.2), so the repair bytes
are exactly those of one call per block; only the codec's per-call overhead is shared.  The link
order stays that of ``send`` (a block's repair right after its last source packet).

The settings, size classes and counters are :mod:`fecproxy.protocol.encoder_settings`.

A datagram longer than ``max_datagram`` is refused the same way by ``send`` and ``send_batch``:
counted as an ``oversize`` drop in ``stats.dropped`` and skipped (no packet, no place in the
block), so one bad datagram never costs the rest of a batch and a daemon needs no try/except.

With a :class:`~fecproxy.protocol.auth.Sealer` (a key is configured), every packet the encoder
returns — source, repair and control (``control``) — passes through ``_sealed``, the one place
that protects outgoing packets, so no kind of packet can leave without its tag.
"""

from __future__ import annotations

from bisect import bisect_left
from collections.abc import Iterable
from typing import Any

import numpy as np

from fecproxy.coding.codec import block_code
from fecproxy.protocol import wire
from fecproxy.protocol.auth import Sealer
from fecproxy.protocol.encoder_settings import (
    DEFAULT_BLOCK_SIZE,
    DEFAULT_FLUSH_INTERVAL,
    DEFAULT_INTERLEAVE,
    DEFAULT_REPAIR,
    DEFAULT_SIZE_CLASSES,
    MAX_INTERLEAVE,
    MAX_SIZE_BOUNDARIES,
    ClassStats,
    EncoderSettings,
    EncoderStats,
    repair_byte_cap,
    size_class_names,
)
from fecproxy.protocol.events import DropReason
from fecproxy.protocol.ordering import MAX_SEQUENCE_FLOWS, FlowSequencer

__all__ = [
    "DEFAULT_BLOCK_SIZE",
    "DEFAULT_FLUSH_INTERVAL",
    "DEFAULT_INTERLEAVE",
    "DEFAULT_REPAIR",
    "DEFAULT_SIZE_CLASSES",
    "MAX_BLOCKS_PER_ENCODE",
    "MAX_BYTES_PER_ENCODE",
    "MAX_INTERLEAVE",
    "MAX_SIZE_BOUNDARIES",
    "BlockEncoder",
    "ClassStats",
    "EncoderSettings",
    "EncoderStats",
    "repair_byte_cap",
    "size_class_names",
]

#: Full blocks whose repair ``send_batch`` computes in one codec call, symbols side by side.
#: Measured on this project's 2-core machine with (16, 1208)-byte blocks, k=16, m=4, µs per
#: block: 50–60 alone, 36 for 2, 30 for 4, 25 for 8, 25–29 for 12 to 32: past ~8 blocks the
#: codec's gathered table (≈ 2.5 MB at 8) no longer fits the caches and nothing more is saved,
#: while the deferred blocks' buffers keep growing.
MAX_BLOCKS_PER_ENCODE = 8
#: A bound in bytes too, for wide symbols (jumbo datagrams): 8 blocks of 16 × 1208 bytes, the
#: knee above, is about 155 KB of source symbols per call.
MAX_BYTES_PER_ENCODE = 160 * 1024


class _Block:
    """An open block, then (closed by ``send_batch``) one whose repair is still to be computed."""

    __slots__ = (
        "storage",
        "symbols",
        "width",
        "sbn",
        "base",
        "key",
        "class_name",
        "settings",
        "count",
        "symbol_len",
        "content",
        "deadline",
        "previous_k",
        "k",
        "m",
        "length",
        "packets",
        "group",
        "lane",
        "limit",
    )

    def __init__(
        self,
        storage: memoryview,
        symbols: np.ndarray,
        sbn: int,
        key: int,
        class_name: str,
        settings: EncoderSettings,
        deadline: float,
        previous_k: int,
    ):
        self.storage, self.symbols, self.width = storage, symbols, symbols.shape[1]
        self.sbn, self.base, self.key, self.class_name = sbn, sbn << wire.ESI_BITS, key, class_name
        self.settings = settings
        self.limit = settings.block_size  # k: the block closes full at this many datagrams
        self.count = 0  # datagrams in the block
        self.symbol_len = 0  # prefix + longest datagram so far
        self.content = 0  # Σ prefix + datagram: the RFC 6363 §8.2 byte budget for repair
        self.deadline = deadline
        self.previous_k = previous_k  # k of block SBN − 1 once that has closed, else 0
        self.k = self.m = self.length = 0  # set when the block closes
        self.packets: list[bytes] = []  # its repair packets, once computed
        self.group: _Group | None = None
        self.lane = 0


class _Group:
    """Blocks of one size class opened across its lanes in one round.  Their repair packets are
    held until the last of them closes, then sent interleaved (repair j of each block in SBN order,
    then j + 1): a block's repair packets then sit D link packets apart, as its source packets do,
    so a burst of up to D·m packets costs each block at most m, repair included."""

    __slots__ = ("blocks", "lanes", "open", "released")

    def __init__(self) -> None:
        self.blocks: list[_Block] = []
        self.lanes: set[int] = set()
        self.open = 0  # members not yet closed
        self.released = False

    def interleaved(self) -> list[bytes]:
        lists = [block.packets for block in self.blocks if block.packets]
        if len(lists) <= 1:
            return lists[0] if lists else []
        longest = max(len(packets) for packets in lists)
        return [packets[j] for j in range(longest) for packets in lists if j < len(packets)]


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
        self._next_sbn = first_sbn % wire.SBN_MODULUS
        self._settings = settings
        self._open: dict[int, _Block] = {}  # by key = class · MAX_INTERLEAVE + lane, blocks still fed
        self._by_sbn: dict[int, _Block] = {}  # every open block, also those a new layout no longer feeds
        self._lanes: dict[int, int] = {}  # per class: the lane of its next datagram
        self._sequences = FlowSequencer()  # each flow's datagrams numbered in the order taken
        self._carry: tuple[int, int] | None = None  # (SBN, k) of a closed block whose successor is not open yet
        self._spare: dict[tuple[int, int], list[tuple[memoryview, np.ndarray]]] = {}  # zeroed buffers by shape
        self._groups: dict[int, _Group] = {}  # per class: the round its lanes are joining
        self._longest = 0  # longest datagram in blocks closed since take_longest_datagram()
        self._newest: _Block | None = None  # the block opened last

    @property
    def settings(self) -> EncoderSettings:
        """The shape of the blocks being sent now: the newest open block's settings, or those the
        next block will take when none is open (an update applies from the next block)."""
        newest = self._newest
        if newest is not None and self._by_sbn.get(newest.sbn) is newest:
            return newest.settings
        return self._settings

    @property
    def next_settings(self) -> EncoderSettings:
        """The settings the next block takes (after :meth:`update`, while an open block keeps its
        own): what a reload applies, so what its log line must show."""
        return self._settings

    @property
    def sbn(self) -> int:
        """Number of the oldest open block, or of the next block when none is open."""
        return next(iter(self._by_sbn)) if self._by_sbn else self._next_sbn

    def update(self, settings: EncoderSettings) -> None:
        """New settings apply from the next block; open blocks keep the shape they started with.

        If the size classes or the interleave depth change, the open blocks get no more
        datagrams and close at their flush deadline.  A block too narrow for a datagram (a larger
        max datagram) is closed early before it."""
        old, self._settings = self._settings, settings
        if (old.size_classes, old.interleave) != (settings.size_classes, settings.interleave):
            self._open.clear()
            self._lanes.clear()
            self._groups.clear()

    def _buffer(self, rows: int, width: int) -> tuple[memoryview, np.ndarray]:
        # One bytearray, seen by the codec as a (k, width) array without a copy: the per-datagram
        # copy is then a plain memoryview slice assignment, not numpy calls on a row.
        spare = self._spare.get((rows, width))
        if spare:
            return spare.pop()
        storage = memoryview(bytearray(rows * width))
        return storage, np.frombuffer(storage, dtype=np.uint8).reshape(rows, width)

    def _open_block(self, key: int, index: int, now: float, lane: int = 0) -> _Block:
        settings = self._settings
        width = wire.SYMBOL_PREFIX_BYTES + settings.class_max_datagram(index)
        width += -width % 8  # whole uint64 words for the codec
        storage, symbols = self._buffer(settings.block_size, width)
        sbn = self._next_sbn
        self._next_sbn = (sbn + 1) % wire.SBN_MODULUS
        carry = self._carry
        previous_k = carry[1] if carry is not None and (carry[0] + 1) % wire.SBN_MODULUS == sbn else 0
        self._carry = None
        block = _Block(
            storage, symbols, sbn, key, settings.class_names[index], settings, now + settings.flush_interval, previous_k
        )
        self._open[key] = block
        self._by_sbn[sbn] = block
        self._newest = block
        block.lane = lane
        if settings.interleave == 1:
            return block  # no rounds: each block's repair goes out as it closes
        # A lane joins its class's current round unless it already has a block there or the
        # round's first block has closed (which bounds how long a round's repair waits: at most
        # the first block's flush deadline plus one flush interval).
        group = self._groups.get(index)
        if group is None or not group.blocks or lane in group.lanes or group.blocks[0].k:
            group = self._groups[index] = _Group()
        group.blocks.append(block)
        group.lanes.add(lane)
        group.open += 1
        block.group = group
        return block

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

    def take_longest_datagram(self) -> int:
        """The longest datagram of the blocks closed since the last call (0 if none): it sizes
        their repair symbols, so the adaptation's byte cap uses it per report interval."""
        longest, self._longest = self._longest, 0
        return longest

    def send(self, datagram: bytes, flow: int, now: float) -> list[bytes]:
        """Frame one application datagram; returns the packets to put on the link now.

        ``flow`` is the packed 24-bit flow id (wire: slot << GENERATION_BITS | generation), trusted as such.
        An oversize datagram returns no packet and is counted in ``stats.dropped``.
        """
        return self.send_batch(((datagram, flow),), now)

    def send_batch(self, items: Iterable[tuple[bytes, int]], now: float) -> list[bytes]:
        """Frame a batch of ``(datagram, flow)`` that arrived together at ``now``.

        Returns the same packets in the same order as ``send`` called once per datagram (each
        full block's repair packets right after its last source packet), but the repair of all
        the blocks the batch fills is computed together at the end, one codec call per up to
        MAX_BLOCKS_PER_ENCODE blocks.  An oversize datagram is counted as a drop and skipped,
        as in ``send``; the rest of the batch goes on.
        """
        settings = self._settings
        max_datagram, depth, bounds = settings.max_datagram, settings.interleave, settings.size_classes
        single_bound = bounds[0] if len(bounds) == 1 else None
        session, pack_source, pack_prefix = self.session, wire.pack_source_header, wire.SYMBOL_PREFIX.pack_into
        prefix, flag_end = wire.SYMBOL_PREFIX_BYTES, wire.FLAG_END
        generation_bits, generation_mask, flow_shift = wire.GENERATION_BITS, wire.GENERATION_MASK, wire.FLOW_SHIFT
        blocks, lanes, sequences = self._open, self._lanes, self._sequences.counts
        sources: list[bytes] = []
        #: Source runs, each full block's (still empty) repair list, or its interleaving group, between them.
        pieces: list[list[bytes] | _Group] = [sources]
        deferred: list[_Block] = []
        classes = len(bounds) + 1
        sent_count, sent_size = [0] * classes, [0] * classes  # per class: datagrams, their bytes
        oversize = 0
        # The current block's fields live in locals while datagrams go to it (with one class and
        # D = 1, every datagram of a batch): written back before another block is touched.
        cur: _Block | None = None
        cur_key = -1
        count = width = symbol_len = content = limit = base = previous_k = 0
        storage: Any = None  # the current block's memoryview (None until a block is current)
        try:
            for datagram, flow in items:
                size = len(datagram)
                if size > max_datagram:
                    oversize += 1
                    continue
                if single_bound is not None:
                    index = 0 if size <= single_bound else 1
                else:
                    index = bisect_left(bounds, size)
                if depth == 1:
                    key = index * MAX_INTERLEAVE
                    lane = 0
                else:
                    lane = lanes.get(index, 0)
                    lanes[index] = (lane + 1) % depth
                    key = index * MAX_INTERLEAVE + lane
                symbol = size + prefix
                if key != cur_key or symbol > width:
                    if cur is not None:
                        cur.count, cur.symbol_len, cur.content = count, symbol_len, content
                    block = blocks.get(key)
                    if block is None:
                        block = self._open_block(key, index, now, lane)
                    elif symbol > block.width:  # opened before max_datagram grew: close it early
                        del blocks[key]
                        deferred.append(block)
                        if self._retire(block):
                            sources = []
                            pieces += (block.group or block.packets, sources)
                        block = self._open_block(key, index, now, lane)
                    cur, cur_key = block, key
                    count, width, storage, symbol_len = block.count, block.width, block.storage, block.symbol_len
                    content, limit, base, previous_k = block.content, block.limit, block.base, block.previous_k
                seq = sequences.pop(flow, -1)  # FlowSequencer.next, inlined: once per datagram
                if seq < 0:
                    seq = 0
                    if len(sequences) >= MAX_SEQUENCE_FLOWS:
                        del sequences[next(iter(sequences))]
                sequences[flow] = (seq + 1) & 0xFFFF
                start = count * width + prefix
                pack_prefix(storage, start - prefix, flow >> generation_bits, flow & generation_mask, size, seq)
                storage[start : start + size] = datagram
                if symbol > symbol_len:
                    symbol_len = symbol
                content += symbol
                count += 1
                sent_count[index] += 1
                sent_size[index] += size
                if count < limit:
                    sources.append(
                        pack_source(0, session, base | (count - 1), flow << flow_shift | previous_k, seq) + datagram
                    )
                    continue
                word = flow << flow_shift | previous_k
                sources.append(pack_source(flag_end, session, base | (count - 1), word, seq) + datagram)
                assert cur is not None  # set when the datagram's block became current (once per block here)
                cur.count, cur.symbol_len, cur.content = count, symbol_len, content
                del blocks[key]
                deferred.append(cur)
                if self._retire(cur):
                    sources = []
                    pieces += (cur.group or cur.packets, sources)
                cur, cur_key, width = None, -1, 0
                if len(deferred) >= MAX_BLOCKS_PER_ENCODE:
                    self._encode(deferred)
                    deferred = []
        finally:
            # Even if a bad item raises midway, the block state stays true to the buffers: the
            # datagrams copied in are counted (their source packets are lost with the exception,
            # so a receiver sees them as link loss and the repair still matches).
            if cur is not None:
                cur.count, cur.symbol_len, cur.content = count, symbol_len, content
            stats, names, header = self.stats, settings.class_names, wire.SOURCE_HEADER_BYTES
            for index, sent, sent_bytes in zip(range(classes), sent_count, sent_size, strict=True):
                if not sent:
                    continue
                stats.source_packets += sent
                stats.source_bytes += sent_bytes + sent * header
                stats.datagram_bytes += sent_bytes
                per_class = stats.for_class(names[index])
                per_class.source_packets += sent
                per_class.source_bytes += sent_bytes + sent * header
            if oversize:
                self._count_drop(DropReason.OVERSIZE, oversize)
        if deferred:
            self._encode(deferred)
        if len(pieces) == 1:
            return self._sealed(sources)
        out: list[bytes] = []
        for piece in pieces:
            out += piece.interleaved() if isinstance(piece, _Group) else piece
        return self._sealed(out)

    def _retire(self, block: _Block) -> bool:
        """Close a block's books (k, m after the §8.2 byte cap, counters, previous k for its
        successor); its repair is computed by the caller, from its buffer.  True when this was
        the last open block of its round: the round's repair packets are due now."""
        k = block.count
        settings = block.settings
        m = settings.repair_for(k)
        length = block.symbol_len
        stats = self.stats
        if not settings.allow_repair_above_source:
            capped = repair_byte_cap(m, block.content, length)
            if capped < m:
                m = capped
                stats.repair_capped += 1
        block.k, block.m, block.length = k, m, length
        repair_bytes = m * (wire.REPAIR_HEADER_BYTES + length)
        stats.repair_packets += m
        stats.repair_bytes += repair_bytes
        stats.blocks += 1
        if length - wire.SYMBOL_PREFIX_BYTES > self._longest:
            self._longest = length - wire.SYMBOL_PREFIX_BYTES
        if k < settings.block_size:
            stats.short_blocks += 1
        per_class = stats.for_class(block.class_name)
        per_class.repair_packets += m
        per_class.repair_bytes += repair_bytes
        per_class.blocks += 1
        del self._by_sbn[block.sbn]
        successor_sbn = (block.sbn + 1) % wire.SBN_MODULUS
        successor = self._by_sbn.get(successor_sbn)
        if successor is not None:
            successor.previous_k = k  # its packets from now on tell the receiver this block's k
        elif successor_sbn == self._next_sbn:
            self._carry = (block.sbn, k)
        group = block.group
        if group is None:
            return True
        group.open -= 1
        if group.open:
            return False
        group.released = True
        return True

    def _encode(self, blocks: list[_Block]) -> None:
        """Fill each set-aside block's ``packets`` with its repair packets: one codec call per
        run of blocks of equal (k, m), within MAX_BYTES_PER_ENCODE; then recycle the buffers."""
        # k ≤ MAX_K and ESI = k + j ≤ k + m − 1 ≤ MAX_ESI hold by EncoderSettings' checks, so the
        # header is packed unchecked (what wire.encode_repair does after validating them).
        session, pack_repair = self.session, wire.pack_repair_header
        run: list[_Block] = []
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
                    for b, w in zip(run, widths, strict=True):
                        joined[:, offset : offset + w] = b.symbols[:k, :w]
                        offsets.append(offset)
                        offset += w
                    repair = code.encode(joined)
                    parts = [(b, repair, o) for b, o in zip(run, offsets, strict=True)]
                for b, repair, o in parts:
                    end = o + b.length
                    base = b.base
                    b.packets.extend(pack_repair(session, base | (k + j), k) + repair[j, o:end].data for j in range(m))
            for b in run:
                self._recycle(b)
            run, run_bytes = [], 0

    def _recycle(self, block: _Block) -> None:
        block.symbols[: block.k, : block.length] = 0  # padding of a later block must be zeros again
        spare = self._spare.setdefault(block.symbols.shape, [])
        if len(spare) < MAX_BLOCKS_PER_ENCODE:
            spare.append((block.storage, block.symbols))

    def next_deadline(self) -> float | None:
        """When the next open block must be flushed; None when no block is open."""
        if not self._by_sbn:
            return None
        return min(block.deadline for block in self._by_sbn.values())

    def on_timer(self, now: float) -> list[bytes]:
        """Close every block whose flush deadline has passed, oldest SBN first."""
        return self._sealed(self._close_all([block for block in self._by_sbn.values() if block.deadline <= now]))

    def close(self) -> list[bytes]:
        """Shutdown: close every open block now, so its datagrams get their repair packets.

        The encoder stays usable; the next datagram opens a new block.
        """
        return self._sealed(self._close_all(list(self._by_sbn.values())))

    def _count_drop(self, reason: DropReason, count: int) -> None:
        self.stats.dropped[reason] = self.stats.dropped.get(reason, 0) + count

    def _abandon(self, block: _Block) -> None:
        """Forget an empty block: no packet of it went out, so there is nothing to send."""
        del self._by_sbn[block.sbn]
        group = block.group
        if group is not None:
            group.blocks.remove(block)
            group.lanes.discard(block.lane)
            group.open -= 1
        self._recycle(block)

    def _close_all(self, blocks: list[_Block]) -> list[bytes]:
        """Close these blocks early; returns the repair packets of the rounds this completes."""
        out: list[bytes] = []
        for block in blocks:
            if self._open.get(block.key) is block:
                del self._open[block.key]
            if not block.count:  # opened by a batch item that then raised (a caller bug): nothing to protect
                self._abandon(block)
                continue
            done = self._retire(block)
            self._encode([block])
            if done:
                out += block.group.interleaved() if block.group is not None else block.packets
        return out
