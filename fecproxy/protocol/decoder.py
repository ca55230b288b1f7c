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

With a key, each session has its own replay window.  A session's window outlives it: the windows
of the last RETIRED_WINDOWS sessions that aged out are kept, so a recorded packet of a session
that ended is still a replay (and a paused sender that resumes keeps its window).  A recording
of a session older than that is accepted as a new session once; the sequence numbers carry no
order across sender starts (their start is random), so nothing in the packet tells it apart.

Memory is bounded: open blocks across all sessions (``max_open_blocks``; the session holding
the most gives up its oldest), bytes held across all sessions (``max_memory_bytes``, the same
rule), the finished-block memory of each session, and MAX_SESSIONS sessions.  Decode work can be
capped (``max_rebuilds_per_s``): a block that could be rebuilt while the cap is reached waits
(still taking source packets) and is counted once as ``decode_limit``.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field

import numpy as np

from fecproxy.coding.codec import BlockCode, block_code
from fecproxy.protocol import auth, wire
from fecproxy.protocol.events import (
    BlockOutcome,
    BlockReport,
    ControlReceived,
    Delivery,
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
from fecproxy.protocol.received_code import ReceivedCode
from fecproxy.protocol.replay import ReplayWindow
from fecproxy.protocol.sliding_decoder import SlidingDecoder, SlidingDecoderSettings

#: How long an incomplete block waits for more packets.  Must exceed the sender's flush interval
#: plus the link's delay spread; 500 ms covers a geostationary hop's jitter with room to spare
#: (common practice, no source).
DEFAULT_HOLD_TIME = 0.5
#: Open blocks kept at once, all sessions together; beyond this the session holding the most
#: gives up its oldest (counted as evicted).  256 blocks of k=16 is 4096 datagrams in flight,
#: ~80 ms at 50 000 datagrams/s.
DEFAULT_MAX_OPEN_BLOCKS = 256
#: Bytes the decoder may hold for its peer: packets of open blocks (payload + PACKET_OVERHEAD_BYTES
#: each).  256 open blocks of k=16, m=4 at 1400 bytes hold ≈ 256 × 20 × 1.5 kB ≈ 7.6 MB: 16 MiB
#: leaves room for that full load while keeping a flood's worst case small (README "Bounds").
DEFAULT_MAX_MEMORY_BYTES = 16 * 1024 * 1024
#: The smallest budget: one block of 255 packets of the largest datagram must fit (~16.7 MB would be
#: the absolute worst; a budget this small only makes sense with small datagrams).
MIN_MEMORY_BYTES = 64 * 1024
#: What one held packet costs beyond its payload: the bytes object's header (33 bytes in
#: CPython), its dict slot and tuple (~100 bytes), rounded up (measured with sys.getsizeof).
PACKET_OVERHEAD_BYTES = 160
#: What an open block costs before any packet (the _Block object, its dicts, its OrderedDict slot).
BLOCK_OVERHEAD_BYTES = 1024
#: No cap on rebuilds by default: on the development machine a k=16 rebuild costs ~50–100 µs, so
#: real traffic never needs a cap; set one where a forger could flood repair packets (no key).
DEFAULT_MAX_REBUILDS_PER_S: float | None = None
#: Finished block numbers remembered per session, so their late packets are recognised rather
#: than reopened.
FINISHED_MEMORY_FACTOR = 4
#: Live sender sessions tracked at once.  One is the normal case, two during a sender restart
#: (the old one's stragglers, the new one); the rest is room for a stranger's sessions without
#: touching the real one.  Each costs its blocks (within the shared budgets) and a replay window.
MAX_SESSIONS = 4
#: Valid packets a session must have sent before it may become the followed session in place
#: of a quiet one, and before it is safe from eviction by a newcomer.  One stray packet with a
#: random session value (a bit flip, a forgery) must never take the replies; a real sender sends
#: this many within its first block.
SESSION_CONFIRM_PACKETS = 8
#: Replay windows of ended sessions kept (keyed mode): ~8 KiB each at the default window.
RETIRED_WINDOWS = 16

#: Authentication failures that mean the two sides' keys or encryption modes differ (not a forgery
#: of ours): each noticed one also has the peer sent a key check (KeyCheckDue).
KEY_FAULT_KINDS = frozenset({"unknown_key", "mode_mismatch"})

#: The fast path peeks a packet's fixed header (14 bytes for source, 12 for repair packets).
_LEADING_BYTES = max(wire.SOURCE_HEADER_BYTES, wire.REPAIR_HEADER_BYTES)


@dataclass(frozen=True)
class DecoderSettings:
    hold_time: float = DEFAULT_HOLD_TIME
    max_open_blocks: int = DEFAULT_MAX_OPEN_BLOCKS
    max_datagram: int = wire.DEFAULT_MAX_DATAGRAM
    max_memory_bytes: int = DEFAULT_MAX_MEMORY_BYTES
    max_rebuilds_per_s: float | None = DEFAULT_MAX_REBUILDS_PER_S

    def __post_init__(self) -> None:
        if not self.hold_time > 0:
            raise ValueError(f"hold_time must be positive, got {self.hold_time}")
        if not self.max_open_blocks >= 1:
            raise ValueError(f"max_open_blocks must be ≥ 1, got {self.max_open_blocks}")
        if not 1 <= self.max_datagram <= wire.MAX_DATAGRAM_LIMIT:
            raise ValueError(f"max_datagram {self.max_datagram} outside 1..{wire.MAX_DATAGRAM_LIMIT}")
        if self.max_memory_bytes < MIN_MEMORY_BYTES:
            raise ValueError(f"max_memory_bytes must be ≥ {MIN_MEMORY_BYTES}, got {self.max_memory_bytes}")
        if self.max_rebuilds_per_s is not None and not self.max_rebuilds_per_s > 0:
            raise ValueError(f"max_rebuilds_per_s must be positive, got {self.max_rebuilds_per_s}")


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


class _Session:
    """One sender session's block state."""

    __slots__ = ("id", "open", "finished", "highest", "newest", "first_sbn", "last_seen", "packets", "window", "bytes")

    def __init__(self, session: int, now: float, window: ReplayWindow | None):
        self.id = session
        self.open: OrderedDict[int, _Block] = OrderedDict()
        self.finished: OrderedDict[int, int] = OrderedDict()  # SBN -> mask of datagrams delivered
        self.highest: int | None = None  # the newest block that completed: the window's front
        self.newest: int | None = None  # the newest block seen at all (for loss reports)
        self.first_sbn: int | None = None  # the first block this session showed us
        self.last_seen = now  # its last valid packet
        self.packets = 0  # valid packets so far
        self.window = window  # keyed mode: its replay window
        self.bytes = 0  # held in its open blocks


class _Block:
    __slots__ = (
        "sbn",
        "first_seen",
        "k",
        "sources",
        "repairs",
        "symbol_len",
        "max_esi",
        "arrived",
        "rebuilt",
        "told_previous",
        "owner",
        "bytes",
        "deferred",
    )

    def __init__(self, sbn: int, now: float, owner: _Session):
        self.sbn = sbn
        self.first_seen = now
        self.k: int | None = None
        self.sources: dict[int, tuple[int, bytes, int]] = {}  # ESI -> (flow, datagram, flow sequence number)
        self.repairs: dict[int, bytes] = {}
        self.symbol_len: int | None = None
        self.max_esi = -1
        self.arrived = 0  # bit i: source i came directly
        self.rebuilt = 0
        self.told_previous = False  # a source packet has told the previous block's k
        self.owner = owner
        self.bytes = 0  # what _hold counted for it
        self.deferred = False  # a rebuild waited for the decode-work cap (counted once)


class BlockDecoder:
    """One direction's decoder.  Feed ``receive``; call ``on_timer`` at ``next_deadline``."""

    def __init__(
        self,
        settings: DecoderSettings = DecoderSettings(),
        keyring: auth.Keyring | None = None,
        *,
        peer: SockAddr | None = None,
        learn_peer: bool = False,
    ):
        self.settings = settings
        self.keyring = keyring  # replaced on a key reload; the sessions' windows stay
        self.stats = DecoderStats()
        self.session: int | None = None  # the followed session
        self._followed: _Session | None = None
        self.received_code = ReceivedCode()  # the followed session's k and m as its repair packets show them
        #: Where the peer is: configured, or (``learn_peer``) the source of the followed session's
        #: latest valid packet.  The shell sends everything for the peer here.
        self.peer = peer
        self.learn_peer = learn_peer
        #: One log line per kind of authentication failure per interval (see Dropped.notice).
        self.auth_notice = auth.FailureNotice()
        self._sessions: dict[int, _Session] = {}
        self._retired_windows: OrderedDict[int, ReplayWindow] = OrderedDict()
        self._open_count = 0  # open blocks, all sessions
        self._bytes = 0  # bytes held, all sessions
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

    def _sliding_settings(self) -> SlidingDecoderSettings:
        return SlidingDecoderSettings(hold_time=self.settings.hold_time, max_datagram=self.settings.max_datagram)

    @property
    def sessions(self) -> tuple[int, ...]:
        """The live sessions, followed one included."""
        return tuple(self._sessions)

    @property
    def held_bytes(self) -> int:
        """Bytes held in open blocks, all sessions (what ``max_memory_bytes`` bounds)."""
        return self._bytes

    @property
    def open_blocks(self) -> int:
        return self._open_count

    # ------------------------------------------------------------------ feeding
    def receive(self, data: bytes, addr: SockAddr | None, now: float) -> list[Event]:
        """Take one link packet that came from ``addr``.  Returns its events, among them what the
        shell must act on besides deliveries: PeerAddressChanged (only from a valid packet of the
        followed session, see "Sender sessions"), KeyCheckDue, PeerCodeSettled."""
        if self.keyring is not None:
            verified = self._authenticate(data, self.keyring, addr, now)
            if not isinstance(verified, auth.Verified):
                return verified
            data = verified.packet
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
                    self.stats.repair_unneeded += 1  # normal: the block completed before its repair came
                    events = []
                    settled = self.received_code.note(sbn, k, payload_id & wire.ESI_MASK)
                    if settled is not None:
                        self._code_settled(settled, events)
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
                while len(self._retired_windows) > RETIRED_WINDOWS:
                    self._retired_windows.popitem(last=False)
        window.commit(sequence)
        self.last_verified = verified
        return verified

    def _receive_general(self, data: bytes, addr: SockAddr | None, now: float) -> list[Event]:
        """``receive`` without its fast path: complete on its own (the fast path only saves the
        parsing of the two commonest packets), so tests can compare the two."""
        try:
            pkt = wire.parse(data, max_datagram=self.settings.max_datagram, sliding=True)
        except wire.PacketError as error:
            return [self._drop(error.reason, str(error))]
        if isinstance(pkt, wire.ControlPacket):
            # A control packet carries its sending side's own session (as every packet it sends,
            # so sealing keeps one replay window and nonce prefix per session), but it is no
            # data: it neither touches the session table nor teaches the shell its peer.
            self.stats.control_received += 1
            return [ControlReceived(pkt.session, pkt.body)]
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
            events.append(SessionStarted(sess.id, previous))
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

    def _add_session(self, session: int, now: float, events: list[Event]) -> _Session | None:
        """A valid packet of a session not in the table: make room if a session may go."""
        hold = self.settings.hold_time
        if len(self._sessions) >= MAX_SESSIONS:
            evictable = [
                s
                for s in self._sessions.values()
                if now - s.last_seen >= hold or (s is not self._followed and s.packets < SESSION_CONFIRM_PACKETS)
            ]
            if not evictable:
                events.append(
                    self._drop(
                        DropReason.SESSION_LIMIT, f"session {session:#010x}: {MAX_SESSIONS} live sessions already"
                    )
                )
                return None
            self._end_session(min(evictable, key=lambda s: s.last_seen), events)
        window = self._retired_windows.pop(session, None) if self.keyring is not None else None
        sess = _Session(session, now, window)
        self._sessions[session] = sess
        return sess

    def _end_session(self, sess: _Session, events: list[Event]) -> None:
        """Forget a session: its open blocks are reported as superseded; its window is kept."""
        for block in list(sess.open.values()):
            events.append(self._finish(block, BlockOutcome.SUPERSEDED))
        del self._sessions[sess.id]
        events += self.sliding.forget(sess.id)
        if sess.window is not None:
            self._retired_windows[sess.id] = sess.window
            while len(self._retired_windows) > RETIRED_WINDOWS:
                self._retired_windows.popitem(last=False)
        if sess is self._followed:
            self._followed = None  # the session stays named in self.session until another is chosen

    def _admit(
        self, sess: _Session, pkt: wire.SourcePacket | wire.RepairPacket, now: float, events: list[Event]
    ) -> None:
        """Add a packet to its block (opening it if new) and finish the block if it can."""
        block = self._block_for(sess, pkt.sbn, now, events)
        if block is None:
            if isinstance(pkt, wire.RepairPacket) and pkt.sbn in sess.finished:
                self.stats.repair_unneeded += 1  # normal: a block complete before its repair arrived
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

    @property
    def highest_sbn(self) -> int | None:
        """The newest source block number seen of the followed session (None before any);
        a loss report carries it."""
        return self._followed.newest if self._followed is not None else None

    def oldest_open_since(self) -> float | None:
        """When the oldest open block (any session) was first seen; None when none is open.  In-order
        delivery reads it after a block is given up: a gap older than this can no longer be filled."""
        firsts = [next(iter(s.open.values())).first_seen for s in self._sessions.values() if s.open]
        return min(firsts) if firsts else None

    def next_deadline(self) -> float | None:
        hold = self.settings.hold_time
        deadlines = [next(iter(s.open.values())).first_seen + hold for s in self._sessions.values() if s.open]
        deadlines += [s.last_seen + hold for s in self._sessions.values() if s is not self._followed and not s.open]
        sliding = self.sliding.next_deadline()
        if sliding is not None:
            deadlines.append(sliding)
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
                events.append(self._finish(block, BlockOutcome.EXPIRED))
            if sess is not self._followed and not sess.open and now - sess.last_seen >= hold:
                self._end_session(sess, events)
        events += self.sliding.on_timer(now)
        return events

    def close(self) -> list[Event]:
        """Shutdown: report every open block as it stands, as expired.

        The decoder stays usable; later packets open new blocks.
        """
        return [
            self._finish(block, BlockOutcome.EXPIRED)
            for sess in list(self._sessions.values())
            for block in list(sess.open.values())
        ] + self.sliding.close()

    # ------------------------------------------------------------------ internals
    def _drop(
        self, reason: DropReason, detail: str, error: Exception | None = None, notice: str | None = None
    ) -> Dropped:
        self.stats.dropped[reason] = self.stats.dropped.get(reason, 0) + 1
        return Dropped(reason, detail, error, notice)

    def _learn_previous_k(self, sess: _Session, sbn: int, k: int, now: float, events: list[Event]) -> None:
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

    def _block_for(
        self, sess: _Session, sbn: int, now: float, events: list[Event], keep: _Block | None = None
    ) -> _Block | None:
        """The open block ``sbn`` of ``sess``, opened if new and within the window (making room
        under both budgets, never by evicting ``keep``); None if finished or too far behind."""
        block = sess.open.get(sbn)
        if block is not None:
            return block
        if sbn in sess.finished:
            return None
        if sess.highest is not None:
            behind = (sess.highest - sbn) % wire.SBN_MODULUS
            if 0 < behind < wire.SBN_MODULUS // 2 and behind > self._window():
                return None
        newest = sess.newest
        if newest is None or 0 < (sbn - newest) % wire.SBN_MODULUS < wire.SBN_MODULUS // 2:
            sess.newest = sbn
        while self._open_count >= self.settings.max_open_blocks:
            if not self._evict_one(keep, events):
                return None
        if not self._make_room(BLOCK_OVERHEAD_BYTES, keep, events):
            return None
        block = _Block(sbn, now, sess)
        if sess.first_sbn is None:
            sess.first_sbn = sbn
        sess.open[sbn] = block
        self._open_count += 1
        self._hold(block, BLOCK_OVERHEAD_BYTES)
        return block

    def _hold(self, block: _Block, size: int) -> None:
        block.bytes += size
        block.owner.bytes += size
        self._bytes += size

    def _evict_one(self, keep: _Block | None, events: list[Event]) -> bool:
        """Evict the oldest open block of the session holding the most bytes (never ``keep``):
        each session's share of the budget is defended against the others.  False if none."""
        for sess in sorted(self._sessions.values(), key=lambda s: s.bytes, reverse=True):
            for block in sess.open.values():
                if block is not keep:
                    events.append(self._finish(block, BlockOutcome.EVICTED))
                    return True
        return False

    def _make_room(self, size: int, keep: _Block | None, events: list[Event]) -> bool:
        """Evict blocks until ``size`` more bytes fit the budget; False if they cannot."""
        budget = self.settings.max_memory_bytes
        while self._bytes + size > budget:
            if not self._evict_one(keep, events):
                return False
        return True

    def _window(self) -> int:
        """How far behind the newest block a never-seen block may still be opened."""
        return self.settings.max_open_blocks * FINISHED_MEMORY_FACTOR

    def _outside_block(
        self, sess: _Session, sbn: int, esi: int, flow: int, data: bytes, seq: int, events: list[Event]
    ) -> None:
        """A source packet whose block is finished or too far behind to open.

        A block that ended without all its datagrams (expired, evicted, superseded) remembers
        which ones it delivered: a late one it never delivered is delivered now rather than
        lost.  That also undoes the harm of a damaged or forged packet that opened a block ahead
        of the real one and expired before the real packets came."""
        delivered = sess.finished.get(sbn)
        if delivered is not None and esi <= wire.MAX_ESI and not delivered >> esi & 1:
            sess.finished[sbn] = delivered | 1 << esi
            self.stats.delivered += 1
            events.append(direct_delivery(flow, data, seq))
            return
        events.append(self._behind(sess, sbn, repair=False))

    def _behind(self, sess: _Session, sbn: int, *, repair: bool) -> Dropped:
        """The drop for a packet whose block is finished or too far behind to open."""
        if sbn in sess.finished and not repair:
            return self._drop(DropReason.LATE, f"source packet for finished block {sbn}")
        return self._drop(DropReason.STALE, f"block {sbn} is behind the window")

    def _add_source_fields(
        self, block: _Block, sbn: int, esi: int, flow: int, end: bool, data: bytes, seq: int, events: list[Event]
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
        events.append(direct_delivery(flow, data, seq))

    def _add_repair(self, block: _Block, pkt: wire.RepairPacket, events: list[Event]) -> None:
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

    def _try_finish(self, block: _Block, now: float, events: list[Event]) -> None:
        k = block.k
        if k is None:
            return
        have = len(block.sources)
        if have >= k:
            events.append(self._finish(block, BlockOutcome.COMPLETE))
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
            events.extend(self._rebuild(block, now))
            events.append(self._finish(block, BlockOutcome.RECOVERED))

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
            flow, data, seq = block.sources[esi]
            size = len(data)
            symbols[row, :prefix] = np.frombuffer(wire.pack_symbol_prefix(flow, size, seq), dtype=np.uint8)
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
            flow, size, seq = wire.unpack_symbol_prefix(symbol[:prefix].tobytes())
            if size + prefix > length:
                events.append(
                    self._drop(DropReason.INCONSISTENT, f"rebuilt datagram {block.sbn}/{esi} claims {size} bytes")
                )
                continue
            data = symbol[prefix : prefix + size].tobytes()
            block.sources[esi] = (flow, data, seq)
            block.rebuilt += 1
            self.stats.delivered += 1
            self.stats.recovered += 1
            events.append(Delivery(flow, data, recovered=True, delay=delay, seq=seq))
        return events

    def _finish(self, block: _Block, outcome: BlockOutcome) -> BlockReport:
        sess = block.owner
        del sess.open[block.sbn]
        self._open_count -= 1
        sess.bytes -= block.bytes
        self._bytes -= block.bytes
        # What the block delivered, for late packets: all of it when complete or recovered (-1
        # has every bit set), else the datagrams that arrived.
        sess.finished[block.sbn] = (
            -1 if outcome is BlockOutcome.COMPLETE or outcome is BlockOutcome.RECOVERED else block.arrived
        )
        while len(sess.finished) > self._window():
            sess.finished.popitem(last=False)
        if outcome is BlockOutcome.COMPLETE or outcome is BlockOutcome.RECOVERED:
            # Only a block that completed moves the window: one packet with a damaged or forged
            # block number (far ahead) must not make every real block look far behind.
            highest = sess.highest
            if highest is None or 0 < (block.sbn - highest) % wire.SBN_MODULUS < wire.SBN_MODULUS // 2:
                sess.highest = block.sbn
        span = block.k if block.k is not None else block.max_esi + 1
        arrived = block.arrived.bit_count()
        lost = span - arrived
        unrecovered = lost - block.rebuilt
        stats = self.stats
        stats.lost += lost
        stats.unrecovered += unrecovered
        stats.blocks[outcome] = stats.blocks.get(outcome, 0) + 1
        return BlockReport(block.sbn, block.k, outcome, lost, block.rebuilt, unrecovered, block.arrived, span)
