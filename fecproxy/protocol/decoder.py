"""Sans-IO block decoder: link packets and ``now`` in, datagrams to deliver and block reports out.

A source packet is delivered the moment it arrives (no added delay when nothing is lost).  Once
any k packets of a block are in hand, its missing datagrams are rebuilt and delivered, each exactly
once.  A block that can no longer complete is expired after the hold time and reported, so the
shell can count loss on the link (before recovery) apart from loss after it (RFC 6363 §6).
Memory is bounded: at most ``max_open_blocks`` blocks, each holding at most 255 packets of at most
``max_datagram`` + 5 bytes, a bounded memory of finished block numbers, and at most
SESSION_CONFIRM_PACKETS − 1 packets of a candidate session.

``receive`` returns the events and whether the packet was a valid packet of the adopted session:
the shell learns its peer's address only from those.

Sender sessions
---------------
Every packet carries the sender's 32-bit session value, new at each sender start.  The decoder
follows one *adopted* session; what a valid packet of session s does depends on the state (A is
the adopted session, C the candidate, "quiet" means A sent no valid packet for ``hold_time``,
"confirmed" means SESSION_CONFIRM_PACKETS − 1 distinct packets of C are held already)::

    state       packet's session   condition      action                              next state
    ----------  -----------------  -------------  ----------------------------------  ----------
    NO_SESSION  any                -              adopt s                             ADOPTED
    ADOPTED     A                  -              admit to its block                  ADOPTED
    ADOPTED     retired            -              drop "stale"                        ADOPTED
    ADOPTED     other              A quiet        adopt s (A retired)                 ADOPTED
    ADOPTED     other              otherwise      hold s's packet as candidate        CANDIDATE
    CANDIDATE   A                  -              admit to its block                  CANDIDATE
    CANDIDATE   retired            -              drop "stale"                        CANDIDATE
    CANDIDATE   C                  A quiet or     adopt C (A retired), replay the     ADOPTED
                                   confirmed      held packets into C's blocks
    CANDIDATE   C                  otherwise      hold (drop "duplicate" if held)     CANDIDATE
    CANDIDATE   other              A quiet        adopt s (A retired, C's packets     ADOPTED
                                                  discarded)
    CANDIDATE   other              otherwise      s replaces C as candidate           CANDIDATE

Adopting a session finishes the old one's open blocks as "superseded" and emits SessionStarted.
A held candidate packet's datagram is delivered at once (it needs no block state) and is not
delivered again when replayed.  A candidate stays until adopted or replaced: packets of A do not
clear it.
"""

from __future__ import annotations

from collections import OrderedDict, deque
from dataclasses import dataclass, field
from enum import Enum

import numpy as np

from fecproxy.coding.codec import BlockCode, block_code
from fecproxy.protocol import wire
from fecproxy.protocol.events import (
    BlockOutcome,
    BlockReport,
    ControlReceived,
    Delivery,
    DropReason,
    Dropped,
    Event,
    SessionStarted,
    direct_delivery,
)
from fecproxy.protocol.received_code import ReceivedCode

#: How long an incomplete block waits for more packets.  Must exceed the sender's flush interval
#: plus the link's delay spread; 500 ms covers a geostationary hop's jitter with room to spare
#: (common practice, no source).
DEFAULT_HOLD_TIME = 0.5
#: Open blocks kept at once; the oldest is evicted (and counted) beyond this.  256 blocks of
#: k=16 is 4096 datagrams in flight, ~80 ms at 50 000 datagrams/s; memory is at most
#: 256 × (k + m) × (max_datagram + 5) bytes, ~7 MiB for k=16, m=4, 1400 bytes.
DEFAULT_MAX_OPEN_BLOCKS = 256
#: Finished block numbers remembered, so their late packets are recognised rather than reopened.
FINISHED_MEMORY_FACTOR = 4
#: Earlier sender sessions remembered, so stragglers from before a restart are dropped as stale.
RETIRED_SESSIONS = 4
#: Packets of a new session needed before it replaces a session that is still sending.  One stray
#: packet with a random session value must not retire the live one (without authentication a
#: determined forger still can; RFC 6363 §9).  A restarted sender is adopted at once when the old
#: session has been quiet for the hold time, or after this many packets otherwise; until then its
#: source datagrams are still delivered, and its packets are replayed into the new session's blocks.
SESSION_CONFIRM_PACKETS = 8

#: The fast path peeks a packet's fixed header (14 bytes for source, 12 for repair packets).
_LEADING_BYTES = max(wire.SOURCE_HEADER_BYTES, wire.REPAIR_HEADER_BYTES)


class SessionState(Enum):
    """Where the decoder stands with the sender's sessions (transition table in the module doc)."""

    NO_SESSION = "no_session"  # no valid packet yet
    ADOPTED = "adopted"  # following one session
    CANDIDATE = "candidate"  # following one session, holding another's packets until confirmed


@dataclass(frozen=True)
class DecoderSettings:
    hold_time: float = DEFAULT_HOLD_TIME
    max_open_blocks: int = DEFAULT_MAX_OPEN_BLOCKS
    max_datagram: int = wire.DEFAULT_MAX_DATAGRAM

    def __post_init__(self) -> None:
        if not self.hold_time > 0:
            raise ValueError(f"hold_time must be positive, got {self.hold_time}")
        if not self.max_open_blocks >= 1:
            raise ValueError(f"max_open_blocks must be ≥ 1, got {self.max_open_blocks}")
        if not 1 <= self.max_datagram <= wire.MAX_DATAGRAM_LIMIT:
            raise ValueError(f"max_datagram {self.max_datagram} outside 1..{wire.MAX_DATAGRAM_LIMIT}")


@dataclass
class DecoderStats:
    source_received: int = 0
    repair_received: int = 0
    control_received: int = 0  # well-formed control packets handed on (ControlReceived)
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
        self.received_code = ReceivedCode()  # the peer's k and m as its repair packets show them
        self.state = SessionState.NO_SESSION
        self.session: int | None = None  # the adopted session
        self._retired: deque[int] = deque(maxlen=RETIRED_SESSIONS)
        self._open: OrderedDict[int, _Block] = OrderedDict()
        self._finished: OrderedDict[int, None] = OrderedDict()
        self._highest: int | None = None
        self._first_sbn: int | None = None  # the first block this session showed us
        self._last_seen = float("-inf")  # when the adopted session last sent a valid packet
        self._candidate: int | None = None
        self._candidate_packets: list[wire.SourcePacket | wire.RepairPacket] = []

    # ------------------------------------------------------------------ feeding
    def receive(self, data: bytes, now: float) -> tuple[list[Event], bool]:
        """Take one link packet.  Returns its events, and True when it was a valid packet of the
        adopted session (possibly adopted by this very packet): the only packets whose source
        address the shell may take as its peer's."""
        # Fast path for the two packets a clean link brings: a source packet of the adopted
        # session, and such a repair packet of a block already finished.  The same checks in the
        # same order as wire.parse + _receive_general, with the same outcome, minus the packet
        # object (tests/test_decoder_paths.py compares the two); anything else (another session,
        # a bad field, a repair packet still needed) takes the general path.
        size = len(data)
        if size >= _LEADING_BYTES:
            type_byte = data[0]
            if type_byte == wire.SOURCE_TYPE_BYTE:
                _, flags, session, payload_id, flow_word = wire.peek_source(data)
                if (
                    session == self.session
                    and not flags & ~wire.FLAG_END
                    and payload_id & wire.ESI_MASK <= wire.MAX_ESI
                    and size - wire.SOURCE_HEADER_BYTES <= self.settings.max_datagram
                ):
                    self._last_seen = now
                    self.stats.source_received += 1
                    sbn, esi = payload_id >> wire.ESI_BITS, payload_id & wire.ESI_MASK
                    events: list[Event] = []
                    block = self._open.get(sbn)
                    if block is None:
                        block = self._block_for(sbn, now, events)
                        if block is None:
                            events.append(self._behind(sbn, repair=False))
                            return events, True
                    previous_k = flow_word & wire.PREVIOUS_K_MASK
                    if previous_k and not block.told_previous:
                        block.told_previous = True
                        self._learn_previous_k(sbn, previous_k, now, events)
                    self._add_source_fields(
                        block, sbn, esi, flow_word >> wire.FLOW_SHIFT, bool(flags), bytes(data[wire.SOURCE_HEADER_BYTES:]), events
                    )
                    self._try_finish(block, now, events)
                    return events, True
            elif type_byte == wire.REPAIR_TYPE_BYTE:
                _, flags, session, payload_id, k = wire.peek_repair(data)
                symbol_size = size - wire.REPAIR_HEADER_BYTES
                sbn = payload_id >> wire.ESI_BITS
                if (
                    session == self.session
                    and not flags
                    and 1 <= k <= payload_id & wire.ESI_MASK <= wire.MAX_ESI
                    and wire.SYMBOL_PREFIX_BYTES <= symbol_size <= self.settings.max_datagram + wire.SYMBOL_PREFIX_BYTES
                    and sbn not in self._open
                    and sbn in self._finished
                ):
                    self._last_seen = now
                    self.stats.repair_received += 1
                    self.stats.repair_unneeded += 1  # normal: the block completed before its repair came
                    self.received_code.note(sbn, k, payload_id & wire.ESI_MASK)
                    return [], True
        return self._receive_general(data, now)

    def _receive_general(self, data: bytes, now: float) -> tuple[list[Event], bool]:
        """``receive`` without its fast path: complete on its own (the fast path only saves the
        parsing of the two commonest packets), so tests can compare the two."""
        try:
            pkt = wire.parse(data, max_datagram=self.settings.max_datagram)
        except wire.PacketError as error:
            return [self._drop(error.reason, str(error))], False
        if isinstance(pkt, wire.ControlPacket):
            # Not a packet of the peer's sender session: its session is ours (the one reported
            # on), so it neither touches the session state nor teaches the shell its peer.
            self.stats.control_received += 1
            return [ControlReceived(pkt.session, pkt.body)], False
        events: list[Event] = []
        if pkt.session != self.session:
            if pkt.session in self._retired:
                return [self._drop(DropReason.STALE, f"packet from retired session {pkt.session:#010x}")], False
            if not self._may_adopt(pkt, now):
                return self._hold_candidate(pkt), False
            replay = self._candidate_packets if self._candidate == pkt.session else []
            self._candidate, self._candidate_packets = None, []
            events.extend(self._start_session(pkt.session))
            for earlier in replay:
                self._admit(earlier, now, events, replayed=True)
        self._last_seen = now
        if isinstance(pkt, wire.SourcePacket):
            self.stats.source_received += 1
        else:
            self.stats.repair_received += 1
            self.received_code.note(pkt.sbn, pkt.k, pkt.esi)
        self._admit(pkt, now, events)
        return events, True

    def _may_adopt(self, pkt: wire.SourcePacket | wire.RepairPacket, now: float) -> bool:
        """Whether a packet of another session adopts it (the "condition" column of the table)."""
        state = self.state
        if state is SessionState.NO_SESSION or now - self._last_seen >= self.settings.hold_time:
            return True  # nothing adopted yet, or the adopted session is quiet
        return (
            state is SessionState.CANDIDATE
            and self._candidate == pkt.session
            and len(self._candidate_packets) + 1 >= SESSION_CONFIRM_PACKETS
        )

    def _hold_candidate(self, pkt: wire.SourcePacket | wire.RepairPacket) -> list[Event]:
        """A packet of a not-yet-adopted session: deliver its datagram (it needs no block state),
        keep the packet to replay if the session is adopted."""
        if self._candidate != pkt.session:
            self._candidate, self._candidate_packets = pkt.session, []
            self.state = SessionState.CANDIDATE
        if any(held.sbn == pkt.sbn and held.esi == pkt.esi for held in self._candidate_packets):
            return [self._drop(DropReason.DUPLICATE, f"packet {pkt.sbn}/{pkt.esi} of a new session seen before")]
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

    @property
    def highest_sbn(self) -> int | None:
        """The newest source block number seen of the adopted session (None before any);
        a loss report carries it."""
        return self._highest

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
            events.append(self._finish(block, BlockOutcome.EXPIRED))
        return events

    def close(self) -> list[Event]:
        """Shutdown: report every open block as it stands, as expired.

        The decoder stays usable; later packets open new blocks.
        """
        return [self._finish(block, BlockOutcome.EXPIRED) for block in list(self._open.values())]

    # ------------------------------------------------------------------ internals
    def _drop(self, reason: DropReason, detail: str) -> Dropped:
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
        if previous in self._finished:
            return
        after_first = (previous - self._first_sbn) % wire.SBN_MODULUS
        if not 0 < after_first < wire.SBN_MODULUS // 2:
            return
        block = self._block_for(previous, now, events)
        if block is not None:
            block.k = k

    def _start_session(self, session: int) -> list[Event]:
        events: list[Event] = [self._finish(block, BlockOutcome.SUPERSEDED) for block in list(self._open.values())]
        previous = self.session
        if previous is not None:
            self._retired.append(previous)
        self.session = session
        self.state = SessionState.ADOPTED
        self._finished.clear()
        self._highest = None
        self._first_sbn = None
        self.received_code.reset()
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
            events.append(self._finish(next(iter(self._open.values())), BlockOutcome.EVICTED))
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
            return self._drop(DropReason.LATE, f"source packet for finished block {sbn}")
        return self._drop(DropReason.STALE, f"block {sbn} is behind the window")

    def _add_source_fields(
        self, block: _Block, sbn: int, esi: int, flow: int, end: bool, data: bytes, events: list[Event]
    ) -> None:
        """Hold and deliver one source datagram (fields given singly: the fast path has no packet)."""
        k = block.k
        if esi in block.sources:
            events.append(self._drop(DropReason.DUPLICATE, f"source {sbn}/{esi} seen before"))
            return
        if k is not None and esi >= k:
            events.append(self._drop(DropReason.INCONSISTENT, f"source ESI {esi} but block {sbn} has k={k}"))
            return
        if block.symbol_len is not None and len(data) + wire.SYMBOL_PREFIX_BYTES > block.symbol_len:
            events.append(self._drop(DropReason.INCONSISTENT, f"source {sbn}/{esi} longer than the block's symbols"))
            return
        if end:
            if k is not None and k != esi + 1:
                events.append(self._drop(DropReason.INCONSISTENT, f"END at ESI {esi} but block {sbn} has k={k}"))
                return
            if esi < block.max_esi:
                events.append(self._drop(DropReason.INCONSISTENT, f"END at ESI {esi} below ESI {block.max_esi} seen"))
                return
            block.k = esi + 1
        block.sources[esi] = (flow, data)
        block.arrived |= 1 << esi
        if esi > block.max_esi:
            block.max_esi = esi
        self.stats.delivered += 1
        events.append(direct_delivery(flow, data))

    def _add_repair(self, block: _Block, pkt: wire.RepairPacket, events: list[Event]) -> None:
        if pkt.esi in block.repairs:
            events.append(self._drop(DropReason.DUPLICATE, f"repair {pkt.sbn}/{pkt.esi} seen before"))
            return
        if block.k is not None and block.k != pkt.k:
            events.append(self._drop(DropReason.INCONSISTENT, f"repair says k={pkt.k}, block {pkt.sbn} has k={block.k}"))
            return
        if block.max_esi >= pkt.k:
            events.append(self._drop(DropReason.INCONSISTENT, f"repair says k={pkt.k} but source ESI {block.max_esi} was seen"))
            return
        size = len(pkt.symbol)
        if block.symbol_len is not None and block.symbol_len != size:
            events.append(self._drop(DropReason.INCONSISTENT, f"repair symbol of {size} bytes, block uses {block.symbol_len}"))
            return
        longest = max((len(data) for _, data in block.sources.values()), default=0)
        if longest + wire.SYMBOL_PREFIX_BYTES > size:
            events.append(self._drop(DropReason.INCONSISTENT, f"repair symbol of {size} bytes shorter than a source datagram"))
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
            events.append(self._finish(block, BlockOutcome.COMPLETE))
        elif have + len(block.repairs) >= k:
            events.extend(self._rebuild(block, now))
            events.append(self._finish(block, BlockOutcome.RECOVERED))

    def _rebuild(self, block: _Block, now: float) -> list[Event]:
        k = block.k
        length = block.symbol_len
        assert k is not None and length is not None
        missing_count = k - len(block.sources)
        repair_indices = sorted(block.repairs)[:missing_count]
        indices = sorted(block.sources) + repair_indices
        symbols = np.zeros((len(indices), length), dtype=np.uint8)
        row = 0
        prefix = wire.SYMBOL_PREFIX_BYTES
        for esi in sorted(block.sources):
            flow, data = block.sources[esi]
            size = len(data)
            symbols[row, :prefix] = np.frombuffer(wire.pack_symbol_prefix(flow, size), dtype=np.uint8)
            symbols[row, prefix : prefix + size] = np.frombuffer(data, dtype=np.uint8)
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
            flow, size = wire.unpack_symbol_prefix(symbol[:prefix].tobytes())
            if size + prefix > length:
                events.append(self._drop(DropReason.INCONSISTENT, f"rebuilt datagram {block.sbn}/{esi} claims {size} bytes"))
                continue
            data = symbol[prefix : prefix + size].tobytes()
            block.sources[esi] = (flow, data)
            block.rebuilt += 1
            self.stats.delivered += 1
            self.stats.recovered += 1
            events.append(Delivery(flow, data, recovered=True, delay=delay))
        return events

    def _finish(self, block: _Block, outcome: BlockOutcome) -> BlockReport:
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
