"""Sans-IO block decoder: link packets and ``now`` in, datagrams to deliver and block reports out.

A source packet is delivered the moment it arrives (no added delay when nothing is lost).  Once
any k packets of a block are in hand, its missing datagrams are rebuilt and delivered, each exactly
once.  A block that can no longer complete is expired after the hold time and reported, so the
shell can count loss on the link (before recovery) apart from loss after it (RFC 6363 §6).
Memory is bounded: at most ``max_open_blocks`` blocks, each holding at most 255 packets of at most
``max_datagram`` + 3 bytes, and a bounded memory of finished block numbers.
"""

from __future__ import annotations

from collections import OrderedDict, deque
from dataclasses import dataclass, field

import numpy as np

from fecproxy.protocol import wire
from fecproxy.coding.codec import BlockCode, block_code

#: How long an incomplete block waits for more packets.  Must exceed the sender's flush interval
#: plus the link's delay spread; 500 ms covers a geostationary hop's jitter with room to spare
#: (common practice, no source).
DEFAULT_HOLD_TIME = 0.5
#: Open blocks kept at once; the oldest is evicted (and counted) beyond this.  256 blocks of
#: k=16 is 4096 datagrams in flight, ~80 ms at 50 000 datagrams/s.
DEFAULT_MAX_OPEN_BLOCKS = 256
#: Finished block numbers remembered, so their late packets are recognised rather than reopened.
FINISHED_MEMORY_FACTOR = 4
#: The fast path reads the common header and the two bytes after it (a source packet's flow id and
#: previous k, or a repair packet's k) in one unpack.
_LEADING_FIELDS = wire.SOURCE_HEADER.unpack_from
_SOURCE_TYPE_BYTE = (wire.VERSION << 4) | wire.PacketType.SOURCE
_REPAIR_TYPE_BYTE = (wire.VERSION << 4) | wire.PacketType.REPAIR
#: Earlier sender sessions remembered, so stragglers from before a restart are dropped as stale.
RETIRED_SESSIONS = 4
#: Packets of a new session needed before it replaces a session that is still sending.  One stray
#: packet with a random session value must not retire the live one (without authentication a
#: determined forger still can; RFC 6363 §9).  A restarted sender is adopted at once when the old
#: session has been quiet for the hold time, or after this many packets otherwise; until then its
#: source datagrams are still delivered, and its packets are replayed into the new session's blocks.
SESSION_CONFIRM_PACKETS = 8


@dataclass(frozen=True)
class DecoderSettings:
    hold_time: float = DEFAULT_HOLD_TIME
    max_open_blocks: int = DEFAULT_MAX_OPEN_BLOCKS
    max_datagram: int = 1400

    def __post_init__(self) -> None:
        if not self.hold_time > 0:
            raise ValueError(f"hold_time must be positive, got {self.hold_time}")
        if not self.max_open_blocks >= 1:
            raise ValueError(f"max_open_blocks must be ≥ 1, got {self.max_open_blocks}")
        if not 1 <= self.max_datagram <= wire.MAX_DATAGRAM_LIMIT:
            raise ValueError(f"max_datagram {self.max_datagram} outside 1..{wire.MAX_DATAGRAM_LIMIT}")


@dataclass(frozen=True, slots=True)
class Delivery:
    """A datagram for the application; ``delay`` is 0 unless it was rebuilt."""

    flow: int
    data: bytes
    recovered: bool = False
    delay: float = 0.0


@dataclass(frozen=True, slots=True)
class BlockReport:
    """How one block fared.  ``lost`` counts source datagrams missing on the link (before
    recovery); ``unrecovered`` those still missing after it.  ``arrived_mask`` bit i is set when
    source datagram i came directly; ``k`` is None when no packet told the block's size, in which
    case the counts cover positions up to the highest one seen."""

    sbn: int
    k: int | None
    outcome: str  # complete | recovered | expired | evicted | superseded
    lost: int
    recovered: int
    unrecovered: int
    arrived_mask: int
    span: int  # source positions the report covers: k, or highest ESI seen + 1


def _delivery_maker():
    """Delivery(flow, data) for a datagram that came directly, built by filling its slots.

    The generated __init__ of a frozen dataclass sets each field through object.__setattr__:
    measured here, 0.97 µs against 0.51 µs this way, paid once per datagram on the receiver.
    """
    new, set_flow, set_data = object.__new__, Delivery.flow.__set__, Delivery.data.__set__
    set_recovered, set_delay = Delivery.recovered.__set__, Delivery.delay.__set__

    def make(flow: int, data: bytes) -> Delivery:
        delivery = new(Delivery)
        set_flow(delivery, flow)
        set_data(delivery, data)
        set_recovered(delivery, False)
        set_delay(delivery, 0.0)
        return delivery

    return make


_direct_delivery = _delivery_maker()


@dataclass(frozen=True, slots=True)
class Dropped:
    reason: str
    detail: str


@dataclass(frozen=True, slots=True)
class SessionStarted:
    """The peer's sender restarted (or first appeared): state from before is gone."""

    session: int
    previous: int | None


Event = Delivery | BlockReport | Dropped | SessionStarted


@dataclass
class DecoderStats:
    source_received: int = 0
    repair_received: int = 0
    repair_unneeded: int = 0
    delivered: int = 0
    recovered: int = 0
    lost: int = 0
    unrecovered: int = 0
    blocks: dict[str, int] = field(default_factory=dict)
    dropped: dict[str, int] = field(default_factory=dict)


class _Block:
    __slots__ = ("sbn", "first_seen", "k", "sources", "repairs", "symbol_len", "max_esi", "arrived", "rebuilt", "told_previous")

    def __init__(self, sbn: int, now: float):
        self.sbn = sbn
        self.first_seen = now
        self.k: int | None = None
        self.sources: dict[int, tuple[int, bytes]] = {}
        self.repairs: dict[int, bytes] = {}
        self.symbol_len: int | None = None
        self.max_esi = -1
        self.arrived = 0  # bit i: source i came directly
        self.rebuilt = 0
        self.told_previous = False  # a source packet has told the previous block's k


class BlockDecoder:
    """One direction's decoder.  Feed ``receive``; call ``on_timer`` at ``next_deadline``."""

    def __init__(self, settings: DecoderSettings = DecoderSettings()):
        self.settings = settings
        self.stats = DecoderStats()
        self.session: int | None = None
        self._retired: deque[int] = deque(maxlen=RETIRED_SESSIONS)
        self._open: OrderedDict[int, _Block] = OrderedDict()
        self._finished: OrderedDict[int, None] = OrderedDict()
        self._highest: int | None = None
        self._first_sbn: int | None = None  # the first block this session showed us
        self._last_seen = float("-inf")  # when the adopted session last sent a valid packet
        self._candidate: int | None = None
        self._candidate_packets: list[wire.SourcePacket | wire.RepairPacket] = []
        #: Whether the last packet received belonged to the adopted session (the shell learns its
        #: peer address only from those).
        self.in_session = False

    # ------------------------------------------------------------------ feeding
    def receive(self, data: bytes, now: float) -> list[Event]:
        # Fast path for the two packets a clean link brings: a source packet of the current
        # session, and a repair packet of a block already complete.  Same checks, same order
        # and same outcome as wire.parse + the general path below, minus the packet object;
        # anything else (another session, a bad field) falls through to the general path.
        size = len(data)
        if size >= wire.SOURCE_HEADER_BYTES:
            version_type, flags, session, sbn_esi, flow, previous_k = _LEADING_FIELDS(data)
            if session == self.session:
                self._last_seen = now
                self.in_session = True
                esi = sbn_esi & 0xFF
                sbn = sbn_esi >> 8
                if version_type == _SOURCE_TYPE_BYTE:
                    if not flags & ~wire.FLAG_END and esi <= wire.MAX_ESI and size - wire.SOURCE_HEADER_BYTES <= self.settings.max_datagram:
                        self.stats.source_received += 1
                        events: list[Event] = []
                        block = self._open.get(sbn)
                        if block is None:
                            block = self._block_for(sbn, now, events)
                            if block is None:
                                events.append(self._behind(sbn, repair=False))
                                return events
                        if previous_k and not block.told_previous:
                            block.told_previous = True
                            self._learn_previous_k(sbn, previous_k, now, events)
                        self._add_source_fields(block, sbn, esi, flow, bool(flags), bytes(data[wire.SOURCE_HEADER_BYTES:]), events)
                        self._try_finish(block, now, events)
                        return events
                elif version_type == _REPAIR_TYPE_BYTE and not flags and size >= wire.REPAIR_HEADER_BYTES:
                    k = (flow << 8) | data[wire.COMMON_HEADER.size + 1]
                    symbol_size = size - wire.REPAIR_HEADER_BYTES
                    if (
                        1 <= k <= esi <= wire.MAX_ESI
                        and wire.SYMBOL_PREFIX_BYTES <= symbol_size <= self.settings.max_datagram + wire.SYMBOL_PREFIX_BYTES
                        and sbn not in self._open
                        and sbn in self._finished
                    ):
                        self.stats.repair_received += 1
                        self.stats.repair_unneeded += 1  # normal: the block completed before its repair came
                        return []
        try:
            pkt = wire.parse(data, max_datagram=self.settings.max_datagram)
        except wire.PacketError as error:
            return [self._drop(error.reason, str(error))]
        if isinstance(pkt, wire.ControlPacket):
            return [self._drop("unsupported", "control packets are not handled by this version")]
        events: list[Event] = []
        self.in_session = False
        if pkt.session != self.session:
            if pkt.session in self._retired:
                return [self._drop("stale", f"packet from retired session {pkt.session:#010x}")]
            if not self._may_adopt(pkt, now):
                return self._hold_candidate(pkt)
            replay = self._candidate_packets if self._candidate == pkt.session else []
            self._candidate, self._candidate_packets = None, []
            events.extend(self._start_session(pkt.session))
            for earlier in replay:
                self._admit(earlier, now, events, replayed=True)
        self.in_session = True
        self._last_seen = now
        if isinstance(pkt, wire.SourcePacket):
            self.stats.source_received += 1
        else:
            self.stats.repair_received += 1
        self._admit(pkt, now, events)
        return events

    def _may_adopt(self, pkt: wire.SourcePacket | wire.RepairPacket, now: float) -> bool:
        """A new session replaces the adopted one if that one is quiet, or once it is confirmed."""
        if self.session is None or now - self._last_seen >= self.settings.hold_time:
            return True
        return self._candidate == pkt.session and len(self._candidate_packets) + 1 >= SESSION_CONFIRM_PACKETS

    def _hold_candidate(self, pkt: wire.SourcePacket | wire.RepairPacket) -> list[Event]:
        """A packet of a not-yet-adopted session: deliver its datagram (it needs no block state),
        keep the packet to replay if the session is adopted."""
        if self._candidate != pkt.session:
            self._candidate, self._candidate_packets = pkt.session, []
        if any(held.sbn == pkt.sbn and held.esi == pkt.esi for held in self._candidate_packets):
            return [self._drop("duplicate", f"packet {pkt.sbn}/{pkt.esi} of a new session seen before")]
        self._candidate_packets.append(pkt)
        if isinstance(pkt, wire.RepairPacket):
            self.stats.repair_received += 1
            return []
        self.stats.source_received += 1
        self.stats.delivered += 1
        return [Delivery(pkt.flow, pkt.data)]

    def _admit(self, pkt: wire.SourcePacket | wire.RepairPacket, now: float, events: list[Event], *, replayed: bool = False) -> None:
        """Add a packet to its block (opening it if new) and finish the block if it can."""
        block = self._block_for(pkt.sbn, now, events)
        if block is None:
            if isinstance(pkt, wire.RepairPacket) and pkt.sbn in self._finished:
                self.stats.repair_unneeded += 1  # normal: a block complete before its repair arrived
            elif not replayed:
                events.append(self._behind(pkt.sbn, repair=isinstance(pkt, wire.RepairPacket)))
            return
        if isinstance(pkt, wire.SourcePacket) and pkt.previous_k and not block.told_previous:
            block.told_previous = True
            self._learn_previous_k(pkt.sbn, pkt.previous_k, now, events)
        if isinstance(pkt, wire.SourcePacket):
            if replayed:
                # Delivered while its session was a candidate: record it, don't deliver it again.
                added: list[Event] = []
                self._add_source_fields(block, pkt.sbn, pkt.esi, pkt.flow, pkt.end, pkt.data, added)
                for event in added:
                    if type(event) is Delivery:
                        self.stats.delivered -= 1
                    else:
                        events.append(event)
            else:
                self._add_source_fields(block, pkt.sbn, pkt.esi, pkt.flow, pkt.end, pkt.data, events)
        else:
            self._add_repair(block, pkt, events)
        self._try_finish(block, now, events)

    def next_deadline(self) -> float | None:
        if not self._open:
            return None
        oldest = next(iter(self._open.values()))
        return oldest.first_seen + self.settings.hold_time

    def on_timer(self, now: float) -> list[Event]:
        """Expire blocks whose hold time has passed; they can no longer be completed in time."""
        events: list[Event] = []
        hold = self.settings.hold_time
        while self._open:
            block = next(iter(self._open.values()))
            if block.first_seen + hold > now:
                break
            events.append(self._finish(block, "expired"))
        return events

    def close(self) -> list[Event]:
        """Report every open block as it stands (shutdown)."""
        return [self._finish(block, "expired") for block in list(self._open.values())]

    # ------------------------------------------------------------------ internals
    def _drop(self, reason: str, detail: str) -> Dropped:
        self.stats.dropped[reason] = self.stats.dropped.get(reason, 0) + 1
        return Dropped(reason, detail)

    def _learn_previous_k(self, sbn: int, k: int, now: float, events: list[Event]) -> None:
        """A source packet of a newly seen block told the size of the block before it.

        That block may still be open without a known k (its tail and all its repair packets
        were lost): now it knows how many datagrams it lost.  Or it was never seen at all (lost
        whole): it is opened empty with that size, so it expires as counted loss unless its
        packets still come.  Blocks before the first one this session showed are left alone —
        they were sent before this receiver was listening.
        """
        previous = (sbn - 1) % wire.SBN_MODULUS
        block = self._open.get(previous)
        if block is not None:
            if block.k is None and k > block.max_esi:
                block.k = k
                self._try_finish(block, now, events)
            return
        if previous in self._finished or self._first_sbn is None:
            return
        after_first = (previous - self._first_sbn) % wire.SBN_MODULUS
        if not 0 < after_first < wire.SBN_MODULUS // 2:
            return
        block = self._block_for(previous, now, events)
        if block is not None:
            block.k = k

    def _start_session(self, session: int) -> list[Event]:
        events: list[Event] = [self._finish(block, "superseded") for block in list(self._open.values())]
        previous = self.session
        if previous is not None:
            self._retired.append(previous)
        self.session = session
        self._finished.clear()
        self._highest = None
        self._first_sbn = None
        events.append(SessionStarted(session, previous))
        return events

    def _block_for(self, sbn: int, now: float, events: list[Event]) -> _Block | None:
        block = self._open.get(sbn)
        if block is not None:
            return block
        if sbn in self._finished:
            return None
        if self._highest is not None:
            behind = (self._highest - sbn) % wire.SBN_MODULUS
            if 0 < behind < wire.SBN_MODULUS // 2:
                if behind > self._window():
                    return None
            else:
                self._highest = sbn
        else:
            self._highest = sbn
        while len(self._open) >= self.settings.max_open_blocks:
            events.append(self._finish(next(iter(self._open.values())), "evicted"))
        block = _Block(sbn, now)
        if self._first_sbn is None:
            self._first_sbn = sbn
        self._open[sbn] = block
        return block

    def _window(self) -> int:
        """How far behind the newest block a never-seen block may still be opened."""
        return self.settings.max_open_blocks * FINISHED_MEMORY_FACTOR

    def _behind(self, sbn: int, *, repair: bool) -> Dropped:
        """The drop for a packet whose block is finished or too far behind to open."""
        if sbn in self._finished and not repair:
            return self._drop("late", f"source packet for finished block {sbn}")
        return self._drop("stale", f"block {sbn} is behind the window")

    def _add_source_fields(
        self, block: _Block, sbn: int, esi: int, flow: int, end: bool, data: bytes, events: list[Event]
    ) -> None:
        """Hold and deliver one source datagram (fields given singly: the fast path has no packet)."""
        k = block.k
        if esi in block.sources:
            events.append(self._drop("duplicate", f"source {sbn}/{esi} seen before"))
            return
        if k is not None and esi >= k:
            events.append(self._drop("inconsistent", f"source ESI {esi} but block {sbn} has k={k}"))
            return
        if block.symbol_len is not None and len(data) + wire.SYMBOL_PREFIX_BYTES > block.symbol_len:
            events.append(self._drop("inconsistent", f"source {sbn}/{esi} longer than the block's symbols"))
            return
        if end:
            if k is not None and k != esi + 1:
                events.append(self._drop("inconsistent", f"END at ESI {esi} but block {sbn} has k={k}"))
                return
            if esi < block.max_esi:
                events.append(self._drop("inconsistent", f"END at ESI {esi} below ESI {block.max_esi} seen"))
                return
            block.k = esi + 1
        block.sources[esi] = (flow, data)
        block.arrived |= 1 << esi
        if esi > block.max_esi:
            block.max_esi = esi
        self.stats.delivered += 1
        events.append(_direct_delivery(flow, data))

    def _add_repair(self, block: _Block, pkt: wire.RepairPacket, events: list[Event]) -> None:
        if pkt.esi in block.repairs:
            events.append(self._drop("duplicate", f"repair {pkt.sbn}/{pkt.esi} seen before"))
            return
        if block.k is not None and block.k != pkt.k:
            events.append(self._drop("inconsistent", f"repair says k={pkt.k}, block {pkt.sbn} has k={block.k}"))
            return
        if block.max_esi >= pkt.k:
            events.append(self._drop("inconsistent", f"repair says k={pkt.k} but source ESI {block.max_esi} was seen"))
            return
        size = len(pkt.symbol)
        if block.symbol_len is not None and block.symbol_len != size:
            events.append(self._drop("inconsistent", f"repair symbol of {size} bytes, block uses {block.symbol_len}"))
            return
        longest = max((len(data) for _, data in block.sources.values()), default=0)
        if longest + wire.SYMBOL_PREFIX_BYTES > size:
            events.append(self._drop("inconsistent", f"repair symbol of {size} bytes shorter than a source datagram"))
            return
        block.k = pkt.k
        block.symbol_len = size
        block.repairs[pkt.esi] = pkt.symbol

    def _try_finish(self, block: _Block, now: float, events: list[Event]) -> None:
        k = block.k
        if k is None:
            return
        have = len(block.sources)
        if have >= k:
            events.append(self._finish(block, "complete"))
        elif have + len(block.repairs) >= k:
            events.extend(self._rebuild(block, now))
            events.append(self._finish(block, "recovered"))

    def _rebuild(self, block: _Block, now: float) -> list[Event]:
        k = block.k
        length = block.symbol_len
        assert k is not None and length is not None
        missing_count = k - len(block.sources)
        repair_indices = sorted(block.repairs)[:missing_count]
        indices = sorted(block.sources) + repair_indices
        symbols = np.zeros((len(indices), length), dtype=np.uint8)
        row = 0
        for esi in sorted(block.sources):
            flow, data = block.sources[esi]
            size = len(data)
            symbols[row, 0] = flow
            symbols[row, 1] = size >> 8
            symbols[row, 2] = size & 0xFF
            symbols[row, 3 : 3 + size] = np.frombuffer(data, dtype=np.uint8)
            row += 1
        for esi in repair_indices:
            symbols[row] = np.frombuffer(block.repairs[esi], dtype=np.uint8)
            row += 1
        # Column j of the generator depends only on k and j: one code per k serves every block of
        # that k, and its cache of loss-pattern inverses is shared across them.
        code: BlockCode = block_code(k, wire.MAX_ESI + 1)
        rebuilt = code.recover(dict(zip(indices, symbols)))
        delay = now - block.first_seen
        events: list[Event] = []
        for esi in sorted(rebuilt):
            symbol = rebuilt[esi]
            size = (int(symbol[1]) << 8) | int(symbol[2])
            if size + wire.SYMBOL_PREFIX_BYTES > length:
                events.append(self._drop("inconsistent", f"rebuilt datagram {block.sbn}/{esi} claims {size} bytes"))
                continue
            data = symbol[3 : 3 + size].tobytes()
            block.sources[esi] = (int(symbol[0]), data)
            block.rebuilt += 1
            self.stats.delivered += 1
            self.stats.recovered += 1
            events.append(Delivery(int(symbol[0]), data, recovered=True, delay=delay))
        return events

    def _finish(self, block: _Block, outcome: str) -> BlockReport:
        del self._open[block.sbn]
        self._finished[block.sbn] = None
        while len(self._finished) > self._window():
            self._finished.popitem(last=False)
        span = block.k if block.k is not None else block.max_esi + 1
        arrived = block.arrived.bit_count()
        lost = span - arrived
        unrecovered = lost - block.rebuilt
        stats = self.stats
        stats.lost += lost
        stats.unrecovered += unrecovered
        stats.blocks[outcome] = stats.blocks.get(outcome, 0) + 1
        return BlockReport(block.sbn, block.k, outcome, lost, block.rebuilt, unrecovered, block.arrived, span)
