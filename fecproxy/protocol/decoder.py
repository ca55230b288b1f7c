"""Sans-IO block decoder: link packets and ``now`` in, datagrams to deliver and block reports out.

A source packet is delivered the moment it arrives (no added delay when nothing is lost).  Once
any k packets of a block are in hand, its missing datagrams are rebuilt and delivered, each exactly
once.  A block that can no longer complete is expired after the hold time and reported, so the
shell can count loss on the link (before recovery) apart from loss after it (RFC 6363 §6).
A finished block remembers which datagrams it delivered: a late source packet of a block that
ended incomplete is still delivered if its datagram never was (and dropped as ``late`` if it was).

``receive(data, addr, now)`` also owns the peer's address: configured, or learned from the
source of valid packets of the *followed* session (below) only, told as PeerAddressChanged.

Authentication
--------------
With a :class:`~fecproxy.protocol.auth.Keyring`, the first thing ``receive`` does is check the
packet's tag (:mod:`fecproxy.protocol.auth`): the replay window of the packet's session is
queried, the tag computed (or the body decrypted), and only then the window updated (RFC 4303
§3.4.3).  Nothing beyond the fixed header is parsed, nothing allocated from its fields and no
state changed before the tag passes; failures are dropped as ``auth`` or ``replay``.

Sender sessions
---------------
Every packet carries the sender's 32-bit session value, new at each sender start.  The decoder
keeps a small table of *live* sessions (at most MAX_SESSIONS), each with its own open and finished
blocks, so a packet of one session never disturbs another's blocks:

* a valid packet of a session not in the table adds it at once (its source datagrams are
  delivered at once); when the table is full, the least recently active session that may be
  evicted goes (a session that is quiet — no valid packet for the hold time — or that is not the
  followed one and has sent fewer than SESSION_CONFIRM_PACKETS valid packets); when none may,
  the packet is dropped as ``session_limit``.  A session still sending valid packets is never
  retired by another;
* a session other than the followed one ages out when it has been quiet for the hold time and
  has no open block; its state goes with it;
* the **followed session** is the one whose sender the shell answers (and whose packets' source
  is the peer's address): the first session seen, then, once it has been quiet for the hold time, the
  next *established* session (SESSION_CONFIRM_PACKETS valid packets) to send.  Changing it emits
  SessionStarted.  A stranger's packets of a made-up session therefore never move the peer
  address while the real sender is sending, and a restarted sender takes over within the hold
  time of its predecessor falling silent.

With a key, each session has its own replay window (kept RETIRED_WINDOWS sessions after it
ended), and nothing of it is delivered before it answered a fresh challenge (protocol.freshness).

The session table and the memory budget are :mod:`fecproxy.protocol.session_table` (this class's
base).  Memory is bounded: open blocks across all sessions (``max_open_blocks``; the session holding
the most gives up its oldest), bytes held across all sessions (``max_memory_bytes``, the same
rule), the finished-block memory of each session, and MAX_SESSIONS sessions.  Decode work can be
capped (``max_rebuilds_per_s``): a block that could be rebuilt while the cap is reached waits
(still taking source packets) and is counted once as ``decode_limit``.
"""

from __future__ import annotations

from collections.abc import Iterable

from fecproxy.protocol import auth, wire
from fecproxy.protocol.events import (
    JOINED_AFTER_BLOCKS,
    BlockOutcome,
    ControlReceived,
    Dropped,
    DropReason,
    Event,
    KeyCheckDue,
    PeerAddressChanged,
    PeerCodeSettled,
    SessionStarted,
    SockAddr,
    direct_delivery,
)
from fecproxy.protocol.rebuilds import RebuildQueue, rebuild_one
from fecproxy.protocol.received_code import ReceivedCode
from fecproxy.protocol.replay import ReplayWindow
from fecproxy.protocol.session_table import (
    BLOCK_OVERHEAD_BYTES,
    DEFAULT_HOLD_TIME,
    DEFAULT_MAX_MEMORY_BYTES,
    DEFAULT_MAX_OPEN_BLOCKS,
    DEFAULT_MAX_REBUILDS_PER_S,
    FINISHED_MEMORY_FACTOR,
    MAX_SESSIONS,
    MIN_MEMORY_BYTES,
    PACKET_OVERHEAD_BYTES,
    RETIRED_WINDOWS,
    SESSION_CONFIRM_PACKETS,
    Block,
    DecoderSettings,
    DecoderStats,
    Session,
    SessionTable,
)

__all__ = [
    "BLOCK_OVERHEAD_BYTES",
    "DEFAULT_HOLD_TIME",
    "DEFAULT_MAX_MEMORY_BYTES",
    "DEFAULT_MAX_OPEN_BLOCKS",
    "DEFAULT_MAX_REBUILDS_PER_S",
    "FINISHED_MEMORY_FACTOR",
    "KEY_FAULT_KINDS",
    "MAX_SESSIONS",
    "MIN_MEMORY_BYTES",
    "PACKET_OVERHEAD_BYTES",
    "RETIRED_WINDOWS",
    "SESSION_CONFIRM_PACKETS",
    "BlockDecoder",
    "DecoderSettings",
    "DecoderStats",
]
from fecproxy.protocol.sliding_decoder import SlidingDecoder, SlidingDecoderSettings


def _how_far_in(pkt: object) -> int:
    """How far into its session a packet is: its block number, or (sliding code) its ESI."""
    for name in ("sbn", "esi", "first_esi"):
        if hasattr(pkt, name):
            return int(getattr(pkt, name))
    return 0


#: Authentication failures that mean the two sides' keys or encryption modes differ (not a forgery
#: of ours): each noticed one also has the peer sent a key check (KeyCheckDue).
KEY_FAULT_KINDS = frozenset({"unknown_key", "mode_mismatch"})

#: Settings of a decoder made without any (frozen, so one instance serves all).
DEFAULT_SETTINGS = DecoderSettings()

#: The fast path peeks a packet's fixed header (14 bytes for source, 12 for repair packets).
_LEADING_BYTES = max(wire.SOURCE_HEADER_BYTES, wire.REPAIR_HEADER_BYTES)


class BlockDecoder(SessionTable):
    """One direction's decoder.  Feed ``receive``; call ``on_timer`` at ``next_deadline``."""

    def __init__(
        self,
        settings: DecoderSettings = DEFAULT_SETTINGS,
        keyring: auth.Keyring | None = None,
        *,
        peer: SockAddr | None = None,
        learn_peer: bool = False,
    ):
        super().__init__(settings, keyring)
        self.received_code = ReceivedCode()  # the followed session's k and m as its repair packets show them
        #: Where the peer is: configured, or (``learn_peer``) the source of the followed session's
        #: latest valid packet.  The shell sends everything for the peer here.
        self.peer = peer
        self.learn_peer = learn_peer
        #: One log line per kind of authentication failure per interval (see Dropped.notice).
        self.auth_notice = auth.FailureNotice()
        self._tokens = 0.0  # decode-work bucket (rebuilds)
        self._tokens_at: float | None = None
        #: The latest packet's authentication result: the key id and whether the previous key
        #: was used (for the shell's rollover notice); None when unkeyed or not authentic.
        self.last_verified: auth.Verified | None = None
        self._code_told: tuple[int, int] | None = None  # the peer's code last told (PeerCodeSettled)
        #: A peer with ``fec.code: sliding`` sends sliding-window packets: their windows live here,
        #: per session of this table (sessions, keys and the peer address are ruled above), and
        #: count into this decoder's stats.
        self.sliding = SlidingDecoder(self._sliding_settings(), stats=self.stats)  # type: ignore[arg-type]
        self.rebuilds = RebuildQueue(self.stats, self.ledger)  # blocks decodable within the current batch
        self._batching = False

    def _session_ended(self, session: int, events: list[Event]) -> None:
        events += self.sliding.forget(session)  # its sliding windows go with it

    def _sliding_settings(self) -> SlidingDecoderSettings:
        return SlidingDecoderSettings(hold_time=self.settings.hold_time, max_datagram=self.settings.max_datagram)

    # ------------------------------------------------------------------ feeding
    def receive_batch(self, items: Iterable[tuple[bytes, SockAddr | None]], now: float) -> list[Event]:
        """``receive`` for each (packet, source address) of one socket read, in order, with the
        blocks that become decodable rebuilt together at the end (one ``recover_many`` per shape,
        see :mod:`fecproxy.protocol.rebuilds`).  The events are those ``receive`` would have given
        packet by packet, in the same order."""
        events: list[Event] = []
        receive = self.receive
        self._batching = True
        try:
            for data, addr in items:
                events += receive(data, addr, now)
        finally:
            self._batching = False
            if self.rebuilds:
                events = self.rebuilds.flush(events, self._drop)
        return events

    def receive(self, data: bytes, addr: SockAddr | None, now: float) -> list[Event]:
        """Take one link packet that came from ``addr``.  Returns its events, among them what the
        shell must act on besides deliveries: PeerAddressChanged (only from a valid packet of the
        followed session, see "Sender sessions"), KeyCheckDue, PeerCodeSettled."""
        if self.keyring is not None:
            verified = self._authenticate(data, self.keyring, addr, now)
            if not isinstance(verified, auth.Verified):
                return verified
            data = verified.packet
            if not self.freshness.admits(verified.session, verified.sequence):
                early = self.freshness.screen(verified.session, verified.sequence, data, addr, now, self.stats.dropped)
                for packet, source in early.released:
                    early.events += self._receive_general(packet, source, now)
                return early.events + self._receive_general(data, addr, now) if early.passes else early.events
        # Fast path for the two packets a clean link brings: a source packet of the followed
        # session, and such a repair packet of a block already finished.  The same checks in the
        # same order as wire.parse + _receive_general, with the same outcome, minus the packet
        # object (tests/test_decoder_paths.py compares the two); anything else (another session,
        # a bad field, a repair packet still needed) takes the general path.
        size = len(data)
        followed = self._followed
        if size >= _LEADING_BYTES and followed is not None:
            type_byte = data[0]
            if type_byte == wire.SOURCE_TYPE_BYTE:
                _, flags, session, payload_id, flow_word, seq = wire.peek_source(data)
                if (
                    session == followed.id
                    and not flags & ~wire.FLAG_END
                    and payload_id & wire.ESI_MASK <= wire.MAX_ESI
                    and size - wire.SOURCE_HEADER_BYTES <= self.settings.max_datagram
                ):
                    followed.last_seen = now
                    followed.packets += 1
                    self.stats.source_received += 1
                    sbn, esi = payload_id >> wire.ESI_BITS, payload_id & wire.ESI_MASK
                    events: list[Event] = []
                    block = followed.open.get(sbn)
                    if block is None:
                        block = self._block_for(followed, sbn, now, events)
                        if block is None:
                            self._outside_block(
                                followed,
                                sbn,
                                esi,
                                flow_word >> wire.FLOW_SHIFT,
                                bytes(data[wire.SOURCE_HEADER_BYTES :]),
                                seq,
                                events,
                            )
                            if self.learn_peer and addr != self.peer:
                                self._peer_seen(addr, events)
                            return events
                    if flags:  # END: the last of a block filled to the peer's configured k
                        self.received_code.note_full(sbn, esi + 1)
                    previous_k = flow_word & wire.PREVIOUS_K_MASK
                    if previous_k and not block.told_previous:
                        block.told_previous = True
                        self._learn_previous_k(followed, sbn, previous_k, now, events)
                    self._add_source_fields(
                        block,
                        sbn,
                        esi,
                        flow_word >> wire.FLOW_SHIFT,
                        bool(flags),
                        bytes(data[wire.SOURCE_HEADER_BYTES :]),
                        seq,
                        events,
                    )
                    self._try_finish(block, now, events)
                    if self.learn_peer and addr != self.peer:
                        self._peer_seen(addr, events)
                    return events
            elif type_byte == wire.REPAIR_TYPE_BYTE:
                _, flags, session, payload_id, k = wire.peek_repair(data)
                symbol_size = size - wire.REPAIR_HEADER_BYTES
                sbn = payload_id >> wire.ESI_BITS
                if (
                    session == followed.id
                    and not flags
                    and 1 <= k <= payload_id & wire.ESI_MASK <= wire.MAX_ESI
                    and wire.SYMBOL_PREFIX_BYTES <= symbol_size <= self.settings.max_datagram + wire.SYMBOL_PREFIX_BYTES
                    and sbn not in followed.open
                    and sbn in followed.finished
                ):
                    followed.last_seen = now
                    followed.packets += 1
                    self.stats.repair_received += 1
                    events = []
                    # The code first, then the finished block: the order _receive_general keeps.
                    settled = self.received_code.note(sbn, k, payload_id & wire.ESI_MASK)
                    if settled is not None:
                        self._code_settled(settled, events)
                    self._repair_for_finished(followed, sbn, now, events)
                    if self.learn_peer and addr != self.peer:
                        self._peer_seen(addr, events)
                    return events
        return self._receive_general(data, addr, now)

    def _peer_seen(self, addr: SockAddr | None, events: list[Event]) -> None:
        """A packet of the followed session came from ``addr``, not the peer's known address:
        it becomes the peer's if the packet dropped nothing (a stranger replaying or forging one
        of the session's packets from elsewhere makes at least a duplicate or a bad field)."""
        if addr is None:
            return
        if self._batching and self.rebuilds:
            # A rebuild this packet made possible may drop a datagram, which must keep the
            # address from being learned (as packet by packet): rebuild those blocks now.
            events[:] = self.rebuilds.flush(events, self._drop, within=True)
        for event in events:
            if type(event) is Dropped:
                return
        previous, self.peer = self.peer, addr
        events.append(PeerAddressChanged(addr, previous))

    def _code_settled(self, settled: tuple[int, int], events: list[Event]) -> None:
        k, m = settled
        configured = self.received_code.configured
        events.append(PeerCodeSettled(k, m, first=self._code_told is None, configured=configured))
        self._code_told = settled

    def _authenticate(
        self, data: bytes, keyring: auth.Keyring, addr: SockAddr | None, now: float
    ) -> auth.Verified | list[Event]:
        """Replay query, tag check, window update (auth.open_packet's order), with the window of
        the packet's session: a live one's, a retired one's, or none yet for a new session."""
        self.last_verified = None
        try:
            auth._require_tag_flag(data)
            session, _, sequence = auth.peek_trailer(data)
            live = self._sessions.get(session)
            window = live.window if live is not None else self._retired_windows.get(session)
            if window is not None:
                verdict = window.check(sequence)
                if not verdict.accepted:
                    raise auth.ReplayedPacket(
                        f"sequence {sequence} is {verdict.value.replace('_', ' ')} (highest {window.highest})", sequence
                    )
            verified = auth.verify(data, keyring)
        except auth.AuthError as error:
            notice = self.auth_notice.note(error, now)
            events: list[Event] = [self._drop(DropReason.AUTH, str(error), error, notice)]
            if notice is not None and error.kind in KEY_FAULT_KINDS:
                destination = self.peer or addr
                if destination is not None:
                    events.append(KeyCheckDue(destination))
            return events
        except auth.ReplayedPacket as error:
            return [self._drop(DropReason.REPLAY, str(error), error)]
        if window is None:
            window = ReplayWindow()  # made only now that the packet proved authentic
            if live is not None:
                live.window = window
            else:  # a new session: _add_session takes it from here
                self._retired_windows[session] = window
                self._trim_retired_windows()
        window.commit(sequence)
        self.last_verified = verified
        return verified

    def _receive_general(self, data: bytes, addr: SockAddr | None, now: float) -> list[Event]:
        """``receive`` without its fast path: complete on its own (the fast path only saves the
        parsing of the two commonest packets), so tests can compare the two."""
        try:
            pkt = wire.parse(data, max_datagram=self.settings.max_datagram, sliding=True)
        except wire.PacketError as error:
            notice = self.misconfig.note(error.reason, now) if error.reason == DropReason.OVERSIZE else None
            return [self._drop(error.reason, str(error), None, notice)]
        if isinstance(pkt, wire.ControlPacket):
            # A control packet carries its sending side's own session (as every packet it sends,
            # so sealing keeps one replay window and nonce prefix per session), but it is no
            # data: it neither touches the session table nor teaches the shell its peer.
            self.stats.control_received += 1
            return [ControlReceived(pkt.session, pkt.body, addr)]
        events: list[Event] = []
        sess = self._sessions.get(pkt.session)
        if sess is None:
            sess = self._add_session(pkt.session, now, events)
            if sess is None:
                return events
        sess.last_seen = now
        sess.packets += 1
        followed = self._followed
        if followed is not sess and (
            followed is None
            or (now - followed.last_seen >= self.settings.hold_time and sess.packets >= SESSION_CONFIRM_PACKETS)
        ):
            previous = self.session
            self._followed, self.session = sess, sess.id
            self.received_code.reset()
            self._code_told = None
            events.append(SessionStarted(sess.id, previous, _how_far_in(pkt) >= JOINED_AFTER_BLOCKS))
        if isinstance(pkt, (wire.SourcePacket, wire.SlidingSourcePacket)):
            self.stats.source_received += 1
        else:
            self.stats.repair_received += 1
            if sess is self._followed and isinstance(pkt, wire.RepairPacket):  # the followed session's code
                settled = self.received_code.note(pkt.sbn, pkt.k, pkt.esi)
                if settled is not None:
                    self._code_settled(settled, events)
        if isinstance(pkt, (wire.SlidingSourcePacket, wire.SlidingRepairPacket)):
            sliding = self.sliding
            if sliding.settings.hold_time != self.settings.hold_time or (
                sliding.settings.max_datagram != self.settings.max_datagram
            ):
                sliding.settings = self._sliding_settings()  # a reload changed them
            events += sliding.take(sess.id, pkt, now)
        else:
            self._admit(sess, pkt, now, events)
        if sess is self._followed and self.learn_peer and addr != self.peer:
            self._peer_seen(addr, events)
        return events

    def _admit(
        self, sess: Session, pkt: wire.SourcePacket | wire.RepairPacket, now: float, events: list[Event]
    ) -> None:
        """Add a packet to its block (opening it if new) and finish the block if it can."""
        block = self._block_for(sess, pkt.sbn, now, events)
        if block is None:
            if isinstance(pkt, wire.RepairPacket) and pkt.sbn in sess.finished:
                self._repair_for_finished(sess, pkt.sbn, now, events)
            elif isinstance(pkt, wire.SourcePacket):
                self._outside_block(sess, pkt.sbn, pkt.esi, pkt.flow, pkt.data, pkt.seq, events)
            else:
                events.append(self._behind(sess, pkt.sbn, repair=True))
            return
        if isinstance(pkt, wire.SourcePacket):
            if pkt.end and sess is self._followed:  # END: the last of a block filled to the configured k
                self.received_code.note_full(pkt.sbn, pkt.esi + 1)
            if pkt.previous_k and not block.told_previous:
                block.told_previous = True
                self._learn_previous_k(sess, pkt.sbn, pkt.previous_k, now, events)
            self._add_source_fields(block, pkt.sbn, pkt.esi, pkt.flow, pkt.end, pkt.data, pkt.seq, events)
        else:
            self._add_repair(block, pkt, events)
        self._try_finish(block, now, events)

    def next_deadline(self) -> float | None:
        hold = self.settings.hold_time
        deadlines = [next(iter(s.open.values())).first_seen + hold for s in self._sessions.values() if s.open]
        deadlines += [s.last_seen + hold for s in self._sessions.values() if s is not self._followed and not s.open]
        deadlines += [t for t in (self.sliding.next_deadline(), self.ledger.next_due()) if t is not None]
        return min(deadlines) if deadlines else None

    def on_timer(self, now: float) -> list[Event]:
        """Expire blocks whose hold time has passed (they can no longer be completed in time), and
        forget sessions other than the followed one that have been quiet for the hold time."""
        events: list[Event] = []
        hold = self.settings.hold_time
        for sess in list(self._sessions.values()):
            while sess.open:
                block = next(iter(sess.open.values()))
                if block.first_seen + hold > now:
                    break
                self._finish_into(block, BlockOutcome.EXPIRED, events)
            if sess is not self._followed and not sess.open and now - sess.last_seen >= hold:
                self._end_session(sess, events)
        return events + self._settle_losses(now) + self.sliding.on_timer(now)

    def close(self) -> list[Event]:
        """Shutdown: report every open block as it stands, as expired.

        The decoder stays usable; later packets open new blocks.
        """
        events: list[Event] = []
        for block in [block for sess in list(self._sessions.values()) for block in list(sess.open.values())]:
            self._finish_into(block, BlockOutcome.EXPIRED, events)
        return events + self._settle_losses(None) + self.sliding.close()

    # ------------------------------------------------------------------ internals
    def _learn_previous_k(self, sess: Session, sbn: int, k: int, now: float, events: list[Event]) -> None:
        """A source packet of a newly seen block told the size of the block before it.

        That block may still be open without a known k (its tail and all its repair packets
        were lost): now it knows how many datagrams it lost.  Or it was never seen at all (lost
        whole): it is opened empty with that size, so it expires as counted loss unless its
        packets still come.  Blocks before the first one this session showed are left alone —
        they were sent before this receiver was listening.
        """
        previous = (sbn - 1) % wire.SBN_MODULUS
        block = sess.open.get(previous)
        if block is not None:
            if block.k is None and k > block.max_esi:
                block.k = k
                self._try_finish(block, now, events)
            return
        if previous in sess.finished or sess.first_sbn is None:
            return
        after_first = (previous - sess.first_sbn) % wire.SBN_MODULUS
        if not 0 < after_first < wire.SBN_MODULUS // 2:
            return
        block = self._block_for(sess, previous, now, events, keep=sess.open.get(sbn))
        if block is not None:
            block.k = k

    def _add_source_fields(
        self, block: Block, sbn: int, esi: int, flow: int, end: bool, data: bytes, seq: int, events: list[Event]
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
        cost = len(data) + PACKET_OVERHEAD_BYTES
        if self._bytes + cost > self.settings.max_memory_bytes and not self._make_room(cost, block, events):
            events.append(self._drop(DropReason.MEMORY_LIMIT, f"source {sbn}/{esi}: over max_memory_bytes"))
            return
        block.bytes += cost  # _hold, inlined: once per datagram
        block.owner.bytes += cost
        self._bytes += cost
        block.sources[esi] = (flow, data, seq)
        block.arrived |= 1 << esi
        if esi > block.max_esi:
            block.max_esi = esi
        self.stats.delivered += 1
        events.append(direct_delivery(flow, data, seq, block.owner.id))

    def _add_repair(self, block: Block, pkt: wire.RepairPacket, events: list[Event]) -> None:
        if pkt.esi in block.repairs:
            events.append(self._drop(DropReason.DUPLICATE, f"repair {pkt.sbn}/{pkt.esi} seen before"))
            return
        if block.k is not None and block.k != pkt.k:
            events.append(
                self._drop(DropReason.INCONSISTENT, f"repair says k={pkt.k}, block {pkt.sbn} has k={block.k}")
            )
            return
        if block.max_esi >= pkt.k:
            events.append(
                self._drop(DropReason.INCONSISTENT, f"repair says k={pkt.k} but source ESI {block.max_esi} was seen")
            )
            return
        size = len(pkt.symbol)
        if block.symbol_len is not None and block.symbol_len != size:
            events.append(
                self._drop(DropReason.INCONSISTENT, f"repair symbol of {size} bytes, block uses {block.symbol_len}")
            )
            return
        longest = max((len(source[1]) for source in block.sources.values()), default=0)
        if longest + wire.SYMBOL_PREFIX_BYTES > size:
            events.append(
                self._drop(DropReason.INCONSISTENT, f"repair symbol of {size} bytes shorter than a source datagram")
            )
            return
        cost = size + PACKET_OVERHEAD_BYTES
        if self._bytes + cost > self.settings.max_memory_bytes and not self._make_room(cost, block, events):
            events.append(self._drop(DropReason.MEMORY_LIMIT, f"repair {pkt.sbn}/{pkt.esi}: over max_memory_bytes"))
            return
        self._hold(block, cost)
        block.k = pkt.k
        block.symbol_len = size
        block.repairs[pkt.esi] = pkt.symbol

    def _try_finish(self, block: Block, now: float, events: list[Event]) -> None:
        k = block.k
        if k is None:
            return
        have = len(block.sources)
        if have >= k:
            self._finish_into(block, BlockOutcome.COMPLETE, events)
        elif have + len(block.repairs) >= k:
            if not self._may_rebuild(now):
                if not block.deferred:
                    block.deferred = True
                    events.append(
                        self._drop(
                            DropReason.DECODE_LIMIT, f"block {block.sbn}: rebuild waits, over max_rebuilds_per_s"
                        )
                    )
                return
            if not self._batching:
                events += rebuild_one(block, now, self.stats, self._drop)
                self._finish_into(block, BlockOutcome.RECOVERED, events)
                return
            # In a batch the block finishes now (its late packets are judged as any finished
            # block's) and its arithmetic waits for the batch's one recover_many per shape.
            block.rebuilt = k - have  # all of them, unless the flush finds one inconsistent
            report, deferred = self._close_block(block, BlockOutcome.RECOVERED)
            self.rebuilds.add(block, now, report, deferred)
            events.append(report)  # where its deliveries go; a deferred report goes with them

    def _may_rebuild(self, now: float) -> bool:
        """Token bucket of ``max_rebuilds_per_s``, one second deep; takes a token if it can."""
        rate = self.settings.max_rebuilds_per_s
        if rate is None:
            return True
        if self._tokens_at is None:
            self._tokens = rate
        else:
            self._tokens = min(rate, self._tokens + (now - self._tokens_at) * rate)
        self._tokens_at = now
        if self._tokens < 1:
            return False
        self._tokens -= 1
        return True
