"""The decoder's session table and memory budget: which sender sessions are live, their blocks,
and the bounds that keep a flood's worst case small.

The rules (which session is followed, which may be evicted, how the budgets are shared) are
described in :mod:`fecproxy.protocol.decoder`, whose BlockDecoder builds on :class:`SessionTable`.
Every limit here is a named constant with the reason for its default.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field

from fecproxy.protocol import auth, wire
from fecproxy.protocol.events import (
    BlockOutcome,
    BlockReport,
    Dropped,
    DropReason,
    Event,
    HoldTooShort,
    direct_delivery,
)
from fecproxy.protocol.freshness import FreshnessGate
from fecproxy.protocol.loss_ledger import REORDER_TOLERANCE, LossLedger, MisconfigNotice, gap_lost
from fecproxy.protocol.replay import ReplayWindow

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
#: What an open block costs before any packet (the Block object, its dicts, its OrderedDict slot).
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
#: The longest run of skipped block numbers counted as an outage: 16 384 blocks of 16 is over four
#: minutes at 1 000 datagrams/s.  A jump further than that (a damaged or forged block number, with
#: no key) is not counted as loss.  Our own bound.
MAX_GAP_BLOCKS = 16384


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


class Session:
    """One sender session's block state."""

    __slots__ = (
        "id",
        "open",
        "finished",
        "highest",
        "newest",
        "first_sbn",
        "last_seen",
        "packets",
        "window",
        "bytes",
        "last_k",
    )

    def __init__(self, session: int, now: float, window: ReplayWindow | None):
        self.id = session
        self.open: OrderedDict[int, Block] = OrderedDict()
        self.finished: OrderedDict[int, int] = OrderedDict()  # SBN -> mask of datagrams delivered
        self.highest: int | None = None  # the newest block that completed: the window's front
        self.newest: int | None = None  # the newest block seen at all (for loss reports)
        self.first_sbn: int | None = None  # the first block this session showed us
        self.last_seen = now  # its last valid packet
        self.packets = 0  # valid packets so far
        self.window = window  # keyed mode: its replay window
        self.bytes = 0  # held in its open blocks
        self.last_k: int | None = None  # the size of its latest block whose size is known


class Block:
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

    def __init__(self, sbn: int, now: float, owner: Session):
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


class SessionTable:
    """The decoder's live sender sessions, their open and finished blocks, and the bounds on them
    (open blocks, bytes held, sessions, retired replay windows).  The base of BlockDecoder: the
    fields live on the one object, so the per-packet path pays no extra lookup for the split."""

    def __init__(self, settings: DecoderSettings, keyring: auth.Keyring | None):
        self.settings = settings
        self.keyring = keyring  # replaced on a key reload; the sessions' windows stay
        self.stats = DecoderStats()
        self.session: int | None = None  # the followed session
        self._followed: Session | None = None
        self._sessions: dict[int, Session] = {}
        self._retired_windows: OrderedDict[int, ReplayWindow] = OrderedDict()
        self.freshness = FreshnessGate()  # keyed: peer sessions proven live (protocol.freshness)
        self.ledger = LossLedger()  # losses final only after reordering had its time
        self.misconfig = MisconfigNotice()  # rate-limits the warnings of a pair set up wrong
        self._open_count = 0  # open blocks, all sessions
        self._bytes = 0  # bytes held, all sessions

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

    def _session_ended(self, session: int, events: list[Event]) -> None:
        """A session left the table: the state kept beside it elsewhere goes too (a hook)."""

    def _outside_block(
        self, sess: Session, sbn: int, esi: int, flow: int, data: bytes, seq: int, events: list[Event]
    ) -> None:
        """A source packet whose block is finished or too far behind to open.

        A block that ended without all its datagrams (expired, evicted, superseded) remembers
        which ones it delivered: a late one it never delivered is delivered now rather than
        lost.  That also undoes the harm of a damaged or forged packet that opened a block ahead
        of the real one and expired before the real packets came."""
        delivered = sess.finished.get(sbn)
        self.ledger.late_source(sess.id, sbn, esi)  # it came after all: late, not lost
        if delivered is not None and esi <= wire.MAX_ESI and not delivered >> esi & 1:
            sess.finished[sbn] = delivered | 1 << esi
            self.stats.delivered += 1
            events.append(direct_delivery(flow, data, seq, sess.id))
            return
        events.append(self._behind(sess, sbn, repair=False))

    def _behind(self, sess: Session, sbn: int, *, repair: bool) -> Dropped:
        """The drop for a packet whose block is finished or too far behind to open."""
        if sbn in sess.finished and not repair:
            return self._drop(DropReason.LATE, f"source packet for finished block {sbn}")
        return self._drop(DropReason.STALE, f"block {sbn} is behind the window")

    def _add_session(self, session: int, now: float, events: list[Event]) -> Session | None:
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
        sess = Session(session, now, window)
        self._sessions[session] = sess
        return sess

    def _end_session(self, sess: Session, events: list[Event]) -> None:
        """Forget a session: its open blocks are reported as superseded; its window is kept."""
        for block in list(sess.open.values()):
            self._finish_into(block, BlockOutcome.SUPERSEDED, events)
        del self._sessions[sess.id]
        self._session_ended(sess.id, events)
        if sess.window is not None:
            self._retired_windows[sess.id] = sess.window
            self._trim_retired_windows()
        if sess is self._followed:
            self._followed = None  # the session stays named in self.session until another is chosen

    def _trim_retired_windows(self) -> None:
        """Keep RETIRED_WINDOWS ended sessions' windows; the freshness gate forgets each session
        whose window goes (proven fresh without its window, its old packets could pass again)."""
        while len(self._retired_windows) > RETIRED_WINDOWS:
            session, _ = self._retired_windows.popitem(last=False)
            self.freshness.forget(session)

    def _block_for(
        self, sess: Session, sbn: int, now: float, events: list[Event], keep: Block | None = None
    ) -> Block | None:
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
        ahead = (sbn - newest) % wire.SBN_MODULUS if newest is not None else 1
        if 0 < ahead < wire.SBN_MODULUS // 2:
            sess.newest = sbn
            if 1 < ahead <= MAX_GAP_BLOCKS and newest is not None and sess.last_k:
                # Blocks newest+1 .. sbn−1 never showed a packet (an outage, or still to come).
                due = now + REORDER_TOLERANCE * self.settings.hold_time
                self.ledger.note_gap(sess.id, (newest + 1) % wire.SBN_MODULUS, ahead - 1, sess.last_k, due)
        else:
            self.ledger.claim(sess.id, sbn, wire.SBN_MODULUS)
        while self._open_count >= self.settings.max_open_blocks:
            if not self._evict_one(keep, events):
                return None
        if not self._make_room(BLOCK_OVERHEAD_BYTES, keep, events):
            return None
        block = Block(sbn, now, sess)
        if sess.first_sbn is None:
            sess.first_sbn = sbn
        sess.open[sbn] = block
        self._open_count += 1
        self._hold(block, BLOCK_OVERHEAD_BYTES)
        return block

    def _hold(self, block: Block, size: int) -> None:
        block.bytes += size
        block.owner.bytes += size
        self._bytes += size

    def _evict_one(self, keep: Block | None, events: list[Event]) -> bool:
        """Evict the oldest open block of the session holding the most bytes (never ``keep``):
        each session's share of the budget is defended against the others.  False if none."""
        for sess in sorted(self._sessions.values(), key=lambda s: s.bytes, reverse=True):
            for block in sess.open.values():
                if block is not keep:
                    self._finish_into(block, BlockOutcome.EVICTED, events)
                    return True
        return False

    def _make_room(self, size: int, keep: Block | None, events: list[Event]) -> bool:
        """Evict blocks until ``size`` more bytes fit the budget; False if they cannot."""
        budget = self.settings.max_memory_bytes
        while self._bytes + size > budget:
            if not self._evict_one(keep, events):
                return False
        return True

    def _window(self) -> int:
        """How far behind the newest block a never-seen block may still be opened."""
        return self.settings.max_open_blocks * FINISHED_MEMORY_FACTOR

    def _drop(
        self, reason: DropReason, detail: str, error: Exception | None = None, notice: str | None = None
    ) -> Dropped:
        self.stats.dropped[reason] = self.stats.dropped.get(reason, 0) + 1
        return Dropped(reason, detail, error, notice)

    def _repair_for_finished(self, sess: Session, sbn: int, now: float, events: list[Event]) -> None:
        """A repair packet of a finished block.  Normal when the block completed first; when it
        had been given up (its hold time passed) the peer flushes later than ``hold_ms``: every
        such block loses its protection, so say so (rate-limited) with the value to set."""
        self.stats.repair_unneeded += 1
        if sess.finished.get(sbn) == -1:
            return
        hold = self.settings.hold_time
        started = self.ledger.started(sess.id, sbn)
        if started is not None and self.misconfig.note("hold", now) is not None:
            events.append(HoldTooShort(hold, now - started))

    def _settle_losses(self, now: float | None) -> list[Event]:
        """Count the losses that became final (protocol.loss_ledger); None: all (shutdown)."""
        blocks, gaps = self.ledger.settle(now)
        events: list[Event] = []
        stats = self.stats
        for pending in blocks:
            report = pending.report
            stats.lost += pending.lost
            stats.unrecovered += pending.unrecovered
            events.append(
                BlockReport(
                    report.sbn,
                    report.k,
                    report.outcome,
                    pending.lost,
                    pending.recovered,
                    pending.unrecovered,
                    pending.arrived,
                    report.span,
                )
            )
        for gap in gaps:
            lost = gap_lost(gap)
            stats.lost += lost
            stats.unrecovered += lost
        return events

    def _finish_into(self, block: Block, outcome: BlockOutcome, events: list[Event]) -> None:
        report = self._finish(block, outcome)
        if report is not None:
            events.append(report)

    def _finish(self, block: Block, outcome: BlockOutcome) -> BlockReport | None:
        """Finish ``block``: its report, or None while its loss is not final (loss_ledger)."""
        report, deferred = self._close_block(block, outcome)
        return None if deferred else report

    def _close_block(self, block: Block, outcome: BlockOutcome) -> tuple[BlockReport, bool]:
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
        if block.k is not None:
            sess.last_k = block.k
        arrived = block.arrived.bit_count()
        lost = span - arrived
        unrecovered = lost - block.rebuilt
        stats = self.stats
        stats.blocks[outcome] = stats.blocks.get(outcome, 0) + 1
        if outcome is BlockOutcome.EXPIRED or outcome is BlockOutcome.EVICTED:
            self.ledger.given_up(sess.id, block.sbn, block.first_seen)
        report = BlockReport(block.sbn, block.k, outcome, lost, block.rebuilt, unrecovered, block.arrived, span)
        if lost and outcome is not BlockOutcome.SUPERSEDED:
            # Not final yet: its missing packets may still come (protocol.loss_ledger).
            delivered = (1 << span) - 1 if outcome is BlockOutcome.RECOVERED else block.arrived
            due = block.first_seen + REORDER_TOLERANCE * self.settings.hold_time
            for early in self.ledger.defer(sess.id, report, delivered, due):
                stats.lost += early.lost
                stats.unrecovered += early.unrecovered
            return report, True
        stats.lost += lost
        stats.unrecovered += unrecovered
        return report, False
