"""Sans-IO sliding-window decoder: link packets and ``now`` in, datagrams and drops out.

The receiving half of ``fec.code: sliding`` (RFC 8681).  A source packet is delivered the moment
it arrives; its symbol joins the *decoding window*.  A gap in the source symbol ids (ESI) marks
the missing ones; each repair packet adds one equation over its encoding window to a linear
system over GF(2^8) (:class:`fecproxy.coding.sliding.WindowSystem`), solved incrementally, so a
lost datagram is rebuilt and delivered the moment the equations in hand determine it — usually
at the first repair packet after the loss.

Bounds (README "Bounds"): per session the window spans at most ``max_window`` ESIs (symbols
older than the newest − max_window are forgotten, missing ones given up); the system has at
most as many rows as unknowns, both within the window, so one packet costs at most a
(window × (window + symbol length)) elimination step, and memory per session is at most about
2 × window × (max_datagram + 5) bytes.  A missing datagram is given up when it slides out of
the window, when the sender's windows have moved past it and no equation in hand involves it,
or ``hold_time`` after it was noticed missing.

Sessions and authentication follow the block decoder's rules in a smaller form: with a
:class:`~fecproxy.protocol.auth.Keyring` every packet's tag is checked (replay query, tag,
window update) before anything is parsed; at most MAX_SESSIONS sender sessions are tracked, the
least recently active other than the replied-to one making room; the replied-to session is the
first one seen, replaced once it has been quiet for the hold time by a session that has sent
SESSION_CONFIRM_PACKETS valid packets.

Every drop has a reason (``stats.dropped``); rebuilt symbols are checked against their framing
(length within the symbol, zero padding, RFC 8681 §3.2) before delivery, so a forged equation
without a key is counted as ``inconsistent`` rather than delivered when it breaks the framing.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field

from fecproxy.coding import sliding
from fecproxy.protocol import auth, wire
from fecproxy.protocol.events import (
    JOINED_AFTER_BLOCKS,
    BlockOutcome,
    BlockReport,
    ControlReceived,
    Delivery,
    Dropped,
    DropReason,
    Event,
    SessionStarted,
)
from fecproxy.protocol.replay import ReplayWindow
from fecproxy.protocol.sliding_encoder import MAX_WINDOW

#: How long a missing datagram waits for enough repair (the block decoder's default hold time:
#: a geostationary hop's jitter with room to spare; common practice, no source).
DEFAULT_HOLD_TIME = 0.5
#: The decoding window spans the largest encoding window the sender may use.
DEFAULT_MAX_WINDOW = MAX_WINDOW
#: Sessions tracked at once: the sender, its restarted successor, room for strangers.
MAX_SESSIONS = 4
#: Valid packets before a session may take over the replies (see the block decoder).
SESSION_CONFIRM_PACKETS = 8
#: Given-up ESIs remembered per session, so a very late source packet is still delivered once.
GIVEN_UP_MEMORY = 4 * MAX_WINDOW
#: Packets whose ESIs lie more than a window ahead of the newest one must agree (within a window
#: of each other) this many times before the window jumps there.  Without a key anyone can send
#: one packet with a forged ESI far ahead; moving the window for it would make every genuine
#: packet "behind the window".  A real jump (a long outage, more than a window of packets lost)
#: brings a run of consistent ESIs: 3 costs the first two of them their place in the window
#: (they are still delivered).  Our own rule, no source.
RESYNC_PACKETS = 3
#: ESIs remembered as delivered per session: four windows (≈ 8 KiB of ints), beyond any
#: reordering a link plausibly does.
DELIVERED_MEMORY = 4 * MAX_WINDOW
_HALF = 1 << 31
_ARRIVED, _RECOVERED, _UNRECOVERED = 0, 1, 2


@dataclass(frozen=True)
class SlidingDecoderSettings:
    hold_time: float = DEFAULT_HOLD_TIME
    max_window: int = DEFAULT_MAX_WINDOW
    max_datagram: int = wire.DEFAULT_MAX_DATAGRAM

    def __post_init__(self) -> None:
        if not self.hold_time > 0:
            raise ValueError(f"hold_time must be positive, got {self.hold_time}")
        if not 1 <= self.max_window <= MAX_WINDOW:
            raise ValueError(f"max_window must be 1..{MAX_WINDOW}, got {self.max_window}")
        if not 1 <= self.max_datagram <= wire.MAX_DATAGRAM_LIMIT:
            raise ValueError(f"max_datagram {self.max_datagram} outside 1..{wire.MAX_DATAGRAM_LIMIT}")


@dataclass
class SlidingDecoderStats:
    """The counters the block decoder's ``DecoderStats`` has too: embedded in a BlockDecoder, the
    sliding decoder counts into that one, so metrics and logs read one set of figures."""

    source_received: int = 0
    repair_received: int = 0
    control_received: int = 0
    repair_unneeded: int = 0  # covered no missing datagram
    delivered: int = 0
    lost: int = 0  # source datagrams missing on the link (before recovery), once resolved
    recovered: int = 0
    unrecovered: int = 0
    dropped: dict[str, int] = field(default_factory=dict)


#: Consecutive ESIs reported together as one BlockReport (a *segment*), so the link-loss
#: estimate and the loss reports (which take blocks' arrival masks) see the sliding code's
#: traffic as they see blocks of 16.  16 = the default block size, for comparable segments.
SEGMENT = 16
#: Segments not yet fully resolved kept per session (older ones are reported as they stand).
MAX_OPEN_SEGMENTS = MAX_WINDOW // SEGMENT + 2


class _Segment:
    __slots__ = ("arrived", "lost", "recovered", "unrecovered", "resolved")

    def __init__(self) -> None:
        self.arrived = self.lost = self.recovered = self.unrecovered = self.resolved = 0


class _Stream:
    """One sender session's decoding window."""

    __slots__ = (
        "id",
        "system",
        "highest",
        "missing",
        "given_up",
        "repair_floor",
        "window",
        "last_seen",
        "packets",
        "segments",
        "pending_jump",
        "delivered",
    )

    def __init__(self, session: int, now: float, window: ReplayWindow | None):
        self.id = session
        self.system = sliding.WindowSystem()
        self.highest: int | None = None  # newest ESI seen (unwrapped)
        self.missing: dict[int, float] = {}  # ESI -> when it was noticed missing, oldest first
        self.given_up: OrderedDict[int, None] = OrderedDict()
        self.repair_floor: int | None = None  # newest repair's first ESI: the sender slid past below
        self.window = window
        self.last_seen = now
        self.packets = 0
        self.segments: OrderedDict[int, _Segment] = OrderedDict()  # by ESI // SEGMENT
        self.pending_jump: tuple[int, int] | None = None  # (ESI far ahead, packets agreeing)
        #: ESIs delivered lately (DELIVERED_MEMORY), so that no datagram is delivered twice, even
        #: across a restart of the window or from far outside it.
        self.delivered: OrderedDict[int, None] = OrderedDict()

    def unwrap(self, esi: int) -> int:
        """The 32-bit wire ESI as a position in this stream (serial arithmetic around the newest)."""
        if self.highest is None:
            return esi
        return self.highest + ((esi - self.highest + _HALF) % wire.ESI_MODULUS) - _HALF


class SlidingDecoder:
    """One direction's sliding-window decoder.  Not thread-safe; one per link direction."""

    def __init__(
        self,
        settings: SlidingDecoderSettings = SlidingDecoderSettings(),
        keyring: auth.Keyring | None = None,
        *,
        stats: SlidingDecoderStats | None = None,
    ):
        self.settings = settings
        self.keyring = keyring
        #: Shared with a BlockDecoder that embeds this one (any object with these counters).
        self.stats = stats if stats is not None else SlidingDecoderStats()
        self.reordered = 0  # noticed missing, then arrived directly
        self.late_delivered = 0  # arrived directly after being given up
        self._events: list[Event] = []  # segment reports made while handling a packet
        self._streams: OrderedDict[int, _Stream] = OrderedDict()  # least recently active first
        self._windows: OrderedDict[int, ReplayWindow] = OrderedDict()  # sessions proved, not yet live
        self._primary: _Stream | None = None
        self.session: int | None = None

    # --- the contract ----------------------------------------------------------------------

    def receive(self, data: bytes, now: float) -> tuple[list[Event], bool]:
        """One link packet; returns its events and whether it was a valid packet of the
        replied-to session (the only packets the shell may learn its peer from)."""
        if self.keyring is not None:
            verified = self._authenticate(data)
            if isinstance(verified, Dropped):
                return [verified], False
            data = verified.packet
        try:
            pkt = wire.parse(data, max_datagram=self.settings.max_datagram, sliding=True)
        except wire.PacketError as error:
            return [self._drop(error.reason, str(error))], False
        if isinstance(pkt, wire.ControlPacket):
            self.stats.control_received += 1
            return [ControlReceived(pkt.session, pkt.body)], False
        if not isinstance(pkt, (wire.SlidingSourcePacket, wire.SlidingRepairPacket)):
            detail = "block-code packet; this receiver decodes the sliding-window code"
            return [self._drop(DropReason.UNSUPPORTED, detail)], False
        events: list[Event] = []
        esi = pkt.esi if isinstance(pkt, wire.SlidingSourcePacket) else pkt.first_esi
        stream = self._stream_for(pkt.session, now, events, esi >= JOINED_AFTER_BLOCKS)
        if stream is None:
            return events, False
        if isinstance(pkt, wire.SlidingSourcePacket):
            self.stats.source_received += 1
            self._source(stream, pkt, now, events)
        else:
            self.stats.repair_received += 1
            self._repair(stream, pkt, now, events)
        return self._with_reports(events), stream is self._primary

    def take(self, session: int, pkt: wire.SlidingSourcePacket | wire.SlidingRepairPacket, now: float) -> list[Event]:
        """A parsed, authenticated packet of ``session`` whose session rules the caller (a
        BlockDecoder) already applied: only the window's work.  Counts nothing but what it does."""
        stream = self._streams.get(session)
        if stream is None:
            while len(self._streams) >= MAX_SESSIONS:
                self._end(next(iter(self._streams.values())))
            stream = self._streams[session] = _Stream(session, now, None)
        else:
            self._streams.move_to_end(session)
        stream.last_seen = now
        events: list[Event] = []
        if isinstance(pkt, wire.SlidingSourcePacket):
            self._source(stream, pkt, now, events)
        else:
            self._repair(stream, pkt, now, events)
        return self._with_reports(events)

    def forget(self, session: int) -> list[Event]:
        """The caller ended this session: what it still misses is lost."""
        stream = self._streams.get(session)
        if stream is not None:
            self._end(stream)
        return self._with_reports([])

    def _with_reports(self, events: list[Event]) -> list[Event]:
        if self._events:
            events += self._events
            self._events = []
        return events

    def next_deadline(self) -> float | None:
        """When the oldest missing datagram's hold time ends."""
        hold = self.settings.hold_time
        times = [next(iter(s.missing.values())) + hold for s in self._streams.values() if s.missing]
        return min(times) if times else None

    def on_timer(self, now: float) -> list[Event]:
        limit = now - self.settings.hold_time
        for stream in self._streams.values():
            old = [esi for esi, noticed in stream.missing.items() if noticed <= limit]
            self._give_up(stream, old)
        return self._with_reports([])

    def close(self) -> list[Event]:
        """On shutdown: what is still missing is lost; segments are reported as they stand."""
        for stream in self._streams.values():
            self._give_up(stream, list(stream.missing))
            while stream.segments:
                self._report_segment(stream, *stream.segments.popitem(last=False))
        return self._with_reports([])

    def held_bytes(self) -> int:
        return sum(stream.system.held_bytes() for stream in self._streams.values())

    @property
    def sessions(self) -> tuple[int, ...]:
        return tuple(self._streams)

    # --- packets ---------------------------------------------------------------------------

    def _source(self, stream: _Stream, pkt: wire.SlidingSourcePacket, now: float, events: list[Event]) -> None:
        esi = stream.unwrap(pkt.esi)
        system = stream.system
        if esi in system.known or esi in stream.delivered:
            self._count(DropReason.DUPLICATE)
            events.append(Dropped(DropReason.DUPLICATE, f"source symbol {esi} already held"))
            return
        highest = stream.highest
        if highest is not None and esi >= highest + self.settings.max_window and not self._jump_agreed(stream, esi):
            # Far ahead and not (yet) confirmed: delivered, but it moves nothing (see RESYNC_PACKETS).
            self._delivered(stream, esi, events, Delivery(pkt.flow, pkt.data, seq=pkt.seq, session=stream.id))
            return
        if highest is not None and esi <= highest - self.settings.max_window:
            if esi in stream.given_up:  # given up, never delivered: deliver it now
                del stream.given_up[esi]
                self.late_delivered += 1
                self._delivered(stream, esi, events, Delivery(pkt.flow, pkt.data, seq=pkt.seq, session=stream.id))
                return
            if not self._jump_agreed(stream, esi):
                # Far behind, not yet confirmed: a stray packet may have anchored the window (a
                # forgery that came first); delivered, it moves nothing (see RESYNC_PACKETS).
                self._delivered(stream, esi, events, Delivery(pkt.flow, pkt.data, seq=pkt.seq, session=stream.id))
                return
            self._restart(stream)  # agreed far behind: the window was anchored by a stray packet
        if esi in stream.given_up:  # within the window but given up by time: still deliver it
            del stream.given_up[esi]
            self.late_delivered += 1
        else:
            if stream.missing.pop(esi, None) is not None:
                self.reordered += 1
            self._resolve(stream, esi, _ARRIVED)
        self._advance(stream, esi, now, seen=True)
        self._delivered(stream, esi, events, Delivery(pkt.flow, pkt.data, seq=pkt.seq, session=stream.id))
        adui = wire.pack_symbol_prefix(pkt.flow, len(pkt.data), pkt.seq) + pkt.data
        self._deliver_solved(stream, system.add_known(esi, adui), now, events)

    def _repair(self, stream: _Stream, pkt: wire.SlidingRepairPacket, now: float, events: list[Event]) -> None:
        if pkt.nss > self.settings.max_window:
            self._count(DropReason.OVERSIZE)
            events.append(
                Dropped(DropReason.OVERSIZE, f"repair window of {pkt.nss} symbols exceeds {self.settings.max_window}")
            )
            return
        first = stream.unwrap(pkt.first_esi)
        last = first + pkt.nss - 1
        if stream.highest is not None and last >= stream.highest + self.settings.max_window:
            if not self._jump_agreed(stream, last):
                self._count(DropReason.STALE)
                events.append(Dropped(DropReason.STALE, f"repair window ending at {last} is far ahead of the window"))
                return
        highest = stream.highest
        if highest is not None and first <= highest - self.settings.max_window:
            if not self._jump_agreed(stream, last):
                self._count(DropReason.STALE)
                events.append(Dropped(DropReason.STALE, f"repair window from {first} is behind the decoding window"))
                return
            self._restart(stream)
        self._advance(stream, last, now, seen=False)
        if stream.repair_floor is None or first > stream.repair_floor:
            stream.repair_floor = first
        if not any(first <= esi <= last for esi in stream.missing):
            self.stats.repair_unneeded += 1
            self._settle(stream)
            return
        coefs = sliding.coefficients(pkt.repair_key, pkt.nss, pkt.dt)
        try:
            solved = stream.system.add_equation(first, coefs, pkt.symbol)
        except sliding.InconsistentEquation as error:
            self._count(DropReason.INCONSISTENT)
            events.append(Dropped(DropReason.INCONSISTENT, str(error)))
            return
        self._deliver_solved(stream, solved, now, events)
        self._settle(stream)

    def _delivered(self, stream: _Stream, esi: int, events: list[Event], delivery: Delivery) -> None:
        """Hand a datagram on once: an ESI already delivered is not delivered again."""
        if esi in stream.delivered:
            return
        stream.delivered[esi] = None
        self.stats.delivered += 1
        if len(stream.delivered) > DELIVERED_MEMORY:
            stream.delivered.popitem(last=False)
        events.append(delivery)

    def _restart(self, stream: _Stream) -> None:
        """Packets agree on a place far behind the window: it was anchored by a stray packet (a
        forgery that came first, or a sender restarted without a new session).  Start anew there."""
        self._give_up(stream, list(stream.missing))
        stream.system = sliding.WindowSystem()
        stream.highest = stream.repair_floor = None
        stream.segments.clear()

    def _jump_agreed(self, stream: _Stream, esi: int) -> bool:
        """Another packet far ahead: True once RESYNC_PACKETS of them agree (then the window may go)."""
        pending = stream.pending_jump
        count = pending[1] + 1 if pending is not None and abs(esi - pending[0]) < self.settings.max_window else 1
        if count >= RESYNC_PACKETS:
            stream.pending_jump = None
            return True
        stream.pending_jump = (esi, count)
        return False

    def _advance(self, stream: _Stream, esi: int, now: float, *, seen: bool) -> None:
        """A source packet ``esi`` arrived (``seen``), or a repair window ends at ``esi``: the ESIs
        after the newest up to it (itself too unless seen) are missing from now on; the window
        slides to end at it."""
        highest = stream.highest
        if highest is None:
            stream.highest = esi
            if not seen:
                stream.missing[esi] = now
            return
        if esi <= highest:
            return
        span = self.settings.max_window
        start = max(highest + 1, esi - span + 1)
        skipped = start - (highest + 1)  # gaps wider than the window: lost outright
        if skipped:
            self.stats.lost += skipped
            self.stats.unrecovered += skipped
        missing = stream.missing
        for gap in range(start, esi):
            missing[gap] = now
        if not seen:
            missing[esi] = now
        stream.highest = esi
        floor = esi - span + 1
        self._give_up(stream, [e for e in missing if e < floor])
        stream.system.forget_before(floor)

    def _settle(self, stream: _Stream) -> None:
        """Give up missing ESIs the sender's windows have passed and no equation involves."""
        floor = stream.repair_floor
        if floor is None or not stream.missing:
            return
        candidates = [esi for esi in stream.missing if esi < floor]
        if candidates:
            referenced = stream.system.referenced()
            self._give_up(stream, [esi for esi in candidates if esi not in referenced])

    def _give_up(self, stream: _Stream, esis: list[int]) -> None:
        if not esis:
            return
        for esi in esis:
            del stream.missing[esi]
            stream.given_up[esi] = None
            self._resolve(stream, esi, _UNRECOVERED)
        while len(stream.given_up) > GIVEN_UP_MEMORY:
            stream.given_up.popitem(last=False)
        stream.system.give_up(esis)
        self.stats.lost += len(esis)
        self.stats.unrecovered += len(esis)

    def _deliver_solved(
        self, stream: _Stream, solved: list[tuple[int, bytes]], now: float, events: list[Event]
    ) -> None:
        limit = self.settings.max_datagram
        for esi, symbol in solved:
            noticed = stream.missing.pop(esi, None)
            if noticed is None:
                continue  # not missing (given up meanwhile): nothing to deliver
            end = wire.SYMBOL_PREFIX_BYTES
            flow, length, seq = wire.unpack_symbol_prefix(symbol) if len(symbol) >= end else (0, -1, 0)
            if not 0 <= length <= limit or end + length > len(symbol) or any(symbol[end + length :]):
                self._count(DropReason.INCONSISTENT)
                events.append(Dropped(DropReason.INCONSISTENT, f"rebuilt symbol {esi} fails its framing check"))
                stream.given_up[esi] = None
                self.stats.lost += 1
                self.stats.unrecovered += 1
                self._resolve(stream, esi, _UNRECOVERED)
                continue
            self.stats.lost += 1
            self.stats.recovered += 1
            self._resolve(stream, esi, _RECOVERED)
            self._delivered(
                stream,
                esi,
                events,
                Delivery(
                    flow, symbol[end : end + length], recovered=True, delay=now - noticed, seq=seq, session=stream.id
                ),
            )

    # --- segment reports ---------------------------------------------------------------------

    def _resolve(self, stream: _Stream, esi: int, outcome: int) -> None:
        """One ESI's fate is known: it counts towards its segment's report."""
        key = esi // SEGMENT
        segments = stream.segments
        segment = segments.get(key)
        if segment is None:
            segment = segments[key] = _Segment()
            while len(segments) > MAX_OPEN_SEGMENTS:
                segments.popitem(last=False)  # never completed (e.g. began before we listened)
        if outcome == _ARRIVED:
            segment.arrived |= 1 << (esi % SEGMENT)
        else:
            segment.lost += 1
            if outcome == _RECOVERED:
                segment.recovered += 1
            else:
                segment.unrecovered += 1
        segment.resolved += 1
        if segment.resolved >= SEGMENT:
            del segments[key]
            self._report_segment(stream, key, segment)

    def _report_segment(self, stream: _Stream, key: int, segment: _Segment) -> None:
        """A BlockReport for a fully resolved segment (partial ones tell the estimator nothing
        reliable and are dropped)."""
        if segment.resolved < SEGMENT:
            return
        if not segment.lost:
            outcome = BlockOutcome.COMPLETE
        elif not segment.unrecovered:
            outcome = BlockOutcome.RECOVERED
        else:
            outcome = BlockOutcome.EXPIRED
        self._events.append(
            BlockReport(
                key % wire.SBN_MODULUS,
                SEGMENT,
                outcome,
                segment.lost,
                segment.recovered,
                segment.unrecovered,
                segment.arrived,
                SEGMENT,
            )
        )

    # --- sessions and authentication ---------------------------------------------------------

    def _stream_for(self, session: int, now: float, events: list[Event], joined: bool = False) -> _Stream | None:
        stream = self._streams.get(session)
        if stream is None:
            if len(self._streams) >= MAX_SESSIONS:
                victim = next((s for s in self._streams.values() if s is not self._primary), None)
                if victim is None:
                    self._count(DropReason.SESSION_LIMIT)
                    events.append(Dropped(DropReason.SESSION_LIMIT, f"session {session:#010x}: no slot free"))
                    return None
                self._end(victim)
            stream = _Stream(session, now, self._windows.pop(session, None))
            self._streams[session] = stream
        else:
            self._streams.move_to_end(session)
        stream.packets += 1
        primary = self._primary
        if primary is not stream and (
            primary is None
            or (now - primary.last_seen >= self.settings.hold_time and stream.packets >= SESSION_CONFIRM_PACKETS)
        ):
            previous = self.session
            self._primary, self.session = stream, stream.id
            events.append(SessionStarted(stream.id, previous, joined))
        stream.last_seen = now
        return stream

    def _end(self, stream: _Stream) -> None:
        self._give_up(stream, list(stream.missing))
        del self._streams[stream.id]
        if stream.window is not None:
            self._remember_window(stream.id, stream.window)

    def _remember_window(self, session: int, window: ReplayWindow) -> None:
        self._windows[session] = window
        while len(self._windows) > 16:
            self._windows.popitem(last=False)

    def _authenticate(self, data: bytes) -> auth.Verified | Dropped:
        """Replay query, tag check, window update — auth.open_packet's order, per session."""
        assert self.keyring is not None
        try:
            auth._require_tag_flag(data)
            session, _, sequence = auth.peek_trailer(data)
            live = self._streams.get(session)
            window = live.window if live is not None else self._windows.get(session)
            if window is not None:
                verdict = window.check(sequence)
                if not verdict.accepted:
                    raise auth.ReplayedPacket(f"sequence {sequence} is {verdict.value.replace('_', ' ')}", sequence)
            verified = auth.verify(data, self.keyring)
        except auth.AuthError as error:
            return self._drop(DropReason.AUTH, str(error), error)
        except auth.ReplayedPacket as error:
            return self._drop(DropReason.REPLAY, str(error), error)
        if window is None:
            window = ReplayWindow()
            if live is not None:
                live.window = window
            else:
                self._remember_window(session, window)
        window.commit(sequence)
        return verified

    def _count(self, reason: DropReason) -> None:
        self.stats.dropped[reason] = self.stats.dropped.get(reason, 0) + 1

    def _drop(self, reason: DropReason, detail: str, error: Exception | None = None) -> Dropped:
        self._count(reason)
        return Dropped(reason, detail, error)
