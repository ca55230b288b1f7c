"""Freshness of a keyed peer session across restarts: a challenge with a fresh nonce, answered.

The replay window (:mod:`fecproxy.protocol.replay`) refuses a packet seen before, but it lives in
memory: a restarted side has no window, and a recording of the peer's earlier packets — tagged
with the same pre-shared key — would pass again.  IPsec turns anti-replay off for manually keyed
associations for this very reason (RFC 4303 §3.3.3: a static key's counters do not survive a
restart); keyed protocols get freshness from a new exchange with a nonce drawn by each start
(IKEv2, RFC 7296 §2.10).  We do the same with one round trip over the return path the pair has
anyway (replies, loss reports):

1. A keyed decoder delivers nothing of a peer session it has not *proven*.  On an authentic
   packet of such a session it sends, over its own side's sealed control path, a **challenge**
   naming that session and a 16-byte nonce drawn fresh (``secrets``) — the first time at once,
   again every CHALLENGE_RETRY_S while no answer comes (a lost challenge or answer).
2. The peer answers each authentic challenge with an **echo** of the session and the nonce,
   sealed as every packet of *its own* session, so the echo carries that session's next
   sequence number Q.
3. An authentic echo of the pending nonce proves the session live *now*: its packets with a
   sequence number above Q are delivered (the replay window takes over from there); those at or
   below Q were sent before the echo and may be a recording, and are dropped as ``unproven``.

What is held meanwhile, and what the echo vouches for: the packets of a session awaiting proof
are kept (bounded, MAX_HELD_*), authenticated and already recorded in the session's replay window.
The challenge says for how long U the challenger has been listening (every authentic packet since
went through its replay windows); the answering side names the first sequence number S it sealed
no earlier than U before the challenge reached it (from a short history of its own sequence
numbers, SequenceHistory).  The challenger began listening no later than that moment, so every
packet from S on was sealed after it began and, if it arrived, passed its windows: none of them
can be a recording from before.  So held packets from S on are released and S − 1 becomes the
floor.  A restarted *sender* (its session younger than U) loses nothing; a restarted receiver
under a running sender loses what that sender sealed between the receiver's start and the
moment the challenge arrived, less whatever falls after S — in practice about one round trip.

Why this stops a replay: a recording holds only packets sealed before the nonce existed, so it
holds no echo of it, and the key is needed to make one.  If the recorded session is still live,
its sender answers and vouches only for packets sealed after the challenger began listening.
Limits: it needs the return path (a one-way link delivers nothing in keyed mode); when a side
restarts under a running peer, what the peer sealed before the restart and delivers after it is
lost (at most one round trip's worth); a recording still costs the work of checking its tags;
and all of it holds only while the key file stays secret.  Challenges and echoes are
rate-limited, so a recorded challenge replayed at a side cannot make it send more than
ECHOES_PER_S small packets.  A side that knows its peer's address sends a *hello* at start — a
challenge naming no session ("whichever session you are") — so its peer's session is proven
before the first reply.  If the decoder ever forgets a replay window (more sessions than it
keeps), "listening since" restarts from that moment (and challenges still out get new nonces).

Control bodies (after the 10-byte common header of a control packet, :mod:`wire`)::

    kind (1 B: 3 = challenge, 4 = echo) | flags (1 B: 0x01 ANY = hello) | reserved (2 B, 0)
    | session (4 B) | nonce (16 B) | value (8 B: challenge: U in ms; echo: S)

Pure: ``now`` in, bodies out; the shell seals and sends them.
"""

from __future__ import annotations

import secrets
import struct
from collections import OrderedDict, deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from fecproxy.protocol.events import ChallengeDue, Dropped, DropReason, Event, SessionProven
from fecproxy.protocol.loss_report import KIND_KEY_CHECK
from fecproxy.protocol.wire import CONTROL_HEADER_BYTES, CONTROL_TYPE_BYTE

KIND_CHALLENGE = 3
KIND_ECHO = 4
#: kind, flags, 2 reserved bytes, session, nonce, value (challenge: listening for U ms; echo: S).
BODY = struct.Struct(">BB2xI16sQ")
BODY_BYTES = BODY.size  # 32
FLAG_ANY = 0x01  # a hello: a challenge for whichever session the peer is running
VALUE_LIMIT = 1 << 64
#: The answering side's sequence history: one checkpoint per CHECKPOINT_S, HISTORY_CHECKPOINTS
#: kept (plus the session's first).  10 ms × 400 = 4 s back: a challenger that has listened longer
#: than that has been up since before this session's recent packets anyway, or loses at most what
#: was sealed in one checkpoint interval (our own bound, no source).
CHECKPOINT_S = 0.010
HISTORY_CHECKPOINTS = 400
#: 128 bits: the nonce size RFC 7296 §2.10 requires at least (half the PRF key size, ≥ 128 bits).
NONCE_BYTES = 16
#: A challenge not answered within this time is sent again (same nonce).  Four tries a second
#: keep a restart under a second behind a lost challenge on a lossy link, and stay far below the
#: data rate (common practice, no source).
CHALLENGE_RETRY_S = 0.25
#: Held packets of sessions awaiting proof: at most this many per session and this many bytes in
#: all, each at most HOLD_S old when released.  128 packets is 0.13 s at 1 000 datagrams/s, more
#: than a LAN round trip; 1 MiB bounds what recordings can make a side hold (README "Bounds").
MAX_HELD_PACKETS = 128
MAX_HELD_BYTES = 1024 * 1024
#: A held packet older than this is not released (it would be stale for the application, and its
#: block long expired at the peer's pace): one second, the restart promise.
HOLD_S = 1.0
#: Hellos a side sends at start until some peer session is proven (one per CHALLENGE_RETRY_S):
#: two seconds of trying, then challenges follow traffic only.
HELLO_TRIES = 8
#: Sessions awaiting proof at once.  The decoder tracks at most 4 live sessions; a few more let a
#: stranger's authentic recordings not push out the real one (oldest pending goes first).
MAX_PENDING = 8
#: Proven sessions remembered (their floors): the live one, the previous one during a restart,
#: room for a few more.  A forgotten one is challenged again, costing one round trip.
MAX_PROVEN = 16
#: At most this many challenges and this many echoes a second leave one side, in bursts of
#: BURST: enough for a few sessions proving themselves at once, too few to make the pair a
#: reflector (each is one small packet).  Our own bound, no source.
CHALLENGES_PER_S = 20.0
ECHOES_PER_S = 20.0
BURST = 5.0


class FreshnessError(ValueError):
    """A challenge or echo body that fails validation."""

    reason = "malformed"


@dataclass(frozen=True, slots=True)
class Message:
    kind: int
    session: int
    nonce: bytes
    value: int = 0  # challenge: listening for this many ms; echo: first sequence vouched for
    any_session: bool = False  # a hello


def encode(kind: int, session: int, nonce: bytes, value: int = 0, *, any_session: bool = False) -> bytes:
    if kind not in (KIND_CHALLENGE, KIND_ECHO) or len(nonce) != NONCE_BYTES or not 0 <= session <= 0xFFFFFFFF:
        raise ValueError("challenge/echo needs kind 3 or 4, a 32-bit session and a 16-byte nonce")
    return BODY.pack(kind, FLAG_ANY if any_session else 0, session, nonce, min(max(value, 0), VALUE_LIMIT - 1))


def parse(body: bytes) -> Message:
    if len(body) != BODY_BYTES:
        raise FreshnessError(f"challenge/echo body of {len(body)} bytes; expected {BODY_BYTES}")
    if body[2:4] != b"\x00\x00" or body[1] & ~FLAG_ANY:
        raise FreshnessError("challenge/echo with reserved bits set")
    kind, flags, session, nonce, value = BODY.unpack(body)
    if kind not in (KIND_CHALLENGE, KIND_ECHO):
        raise FreshnessError(f"control kind {kind} is not a challenge or an echo")
    if flags and kind != KIND_CHALLENGE:
        raise FreshnessError("only a challenge may name no session")
    return Message(kind, session, nonce, value, bool(flags))


def kind_of(body: bytes) -> int | None:
    """The control kind a body starts with (None for an empty body)."""
    return body[0] if body else None


class _Bucket:
    """Token bucket: ``rate`` per second, ``burst`` deep (RFC 2697 §2's CIR/CBS idea)."""

    __slots__ = ("rate", "burst", "tokens", "at")

    def __init__(self, rate: float, burst: float):
        self.rate, self.burst, self.tokens = rate, burst, burst
        self.at: float | None = None

    def take(self, now: float) -> bool:
        if self.at is not None:
            self.tokens = min(self.burst, self.tokens + (now - self.at) * self.rate)
        self.at = now
        if self.tokens < 1:
            return False
        self.tokens -= 1
        return True


class _Pending:
    __slots__ = ("nonce", "sent_at", "held", "held_bytes")

    def __init__(self, nonce: bytes) -> None:
        self.nonce = nonce
        self.sent_at: float | None = None
        self.held: list[tuple[int, float, bytes, Any]] = []  # (sequence, arrival, plain packet, source)
        self.held_bytes = 0


@dataclass(frozen=True, slots=True)
class Proof:
    """What an echo proved: the session, its floor, the held packets to release now (in arrival
    order) and how many held packets it leaves dropped."""

    session: int
    floor: int
    released: list[tuple[bytes, Any]]  # (plain packet, the address it came from)
    discarded: int
    young: bool  # everything held was vouched for (e.g. a session younger than our listening)


class Screening:
    """What ``FreshnessGate.screen`` decided for one packet: events for the shell (a challenge to
    send, a proof, ``unproven`` drops, counted), whether the packet goes on to the decoder, and
    held packets released by a proof (with their sources)."""

    __slots__ = ("events", "dropped", "passes", "released")

    def __init__(self, dropped: dict[str, int]) -> None:
        self.events: list[Event] = []
        self.dropped = dropped  # the decoder's drop counters
        self.passes = False
        self.released: list[tuple[bytes, Any]] = []

    def drop(self, count: int, detail: str) -> None:
        self.dropped[DropReason.UNPROVEN] = self.dropped.get(DropReason.UNPROVEN, 0) + count
        self.events.append(Dropped(DropReason.UNPROVEN, f"{count} packet(s): {detail}"))


class FreshnessGate:
    """Which peer sessions are proven, from which sequence number on; challenges to send; the
    packets held until then.

    ``admits(session, sequence)`` on every authentic packet (one dict lookup);
    ``challenge(session, now)`` and ``hold(...)`` for one that is not admitted; ``on_echo`` when
    an echo arrives.
    """

    def __init__(self, nonce: Callable[[], bytes] = lambda: secrets.token_bytes(NONCE_BYTES)) -> None:
        self._nonce = nonce
        self._proven: OrderedDict[int, int] = OrderedDict()  # session -> floor (echo's sequence)
        self._pending: OrderedDict[int, _Pending] = OrderedDict()
        self._hello: _Pending | None = None
        self._hellos_left = HELLO_TRIES
        self._bucket = _Bucket(CHALLENGES_PER_S, BURST)
        self._held_bytes = 0
        #: Since when every authentic packet that arrived went through a replay window this side
        #: still has (see the module docstring): set by ``listening``, else the first challenge;
        #: moved to "now" when a window is forgotten.
        self.trusted_since: float | None = None
        self._forgot = False
        self.challenges_sent = 0
        self.proven_count = 0

    def listening(self, now: float) -> None:
        """The shell opened its link socket at ``now``: nothing arrived before."""
        if self.trusted_since is None:
            self.trusted_since = now

    def forget(self, session: int) -> None:
        """The decoder dropped ``session``'s replay window: its proof goes, and "listening since"
        restarts at the next ``now`` (packets sealed before may have passed no window)."""
        self._proven.pop(session, None)
        self._forgot = True
        # Challenges already out told an older "listening since": their answers would vouch for
        # too much.  New ones get new nonces.
        for pending in self._pending.values():
            pending.nonce = self._nonce()
            pending.sent_at = None
        if self._hello is not None:
            self._hello.nonce = self._nonce()

    def admits(self, session: int, sequence: int) -> bool:
        """True when ``session`` is proven and ``sequence`` was sealed after its echo."""
        floor = self._proven.get(session)
        return floor is not None and sequence > floor

    def is_proven(self, session: int) -> bool:
        return session in self._proven

    @property
    def any_proven(self) -> bool:
        return bool(self._proven)

    def _tick(self, now: float) -> None:
        if self.trusted_since is None:
            self.trusted_since = now
        if self._forgot:
            self._forgot = False
            self.trusted_since = now

    def challenge(self, session: int, now: float) -> bytes | None:
        """The challenge body to send for an unproven ``session`` now, or None (one is out and
        not yet due again, or the rate limit is reached)."""
        self._tick(now)
        pending = self._pending.get(session)
        if pending is None:
            pending = self._pending[session] = _Pending(self._nonce())
            while len(self._pending) > MAX_PENDING:
                _, gone = self._pending.popitem(last=False)
                self._held_bytes -= gone.held_bytes
        elif pending.sent_at is not None and now - pending.sent_at < CHALLENGE_RETRY_S:
            return None
        if not self._bucket.take(now):
            return None
        pending.sent_at = now
        self.challenges_sent += 1
        return encode(KIND_CHALLENGE, session, pending.nonce, self._listening_ms(now))

    def hello(self, now: float) -> bytes | None:
        """A hello to send to a known peer address (at start, HELLO_TRIES times at most, until a
        session is proven), or None."""
        self._tick(now)
        if self._proven or self._hellos_left <= 0:
            return None
        hello = self._hello
        if hello is None:
            hello = self._hello = _Pending(self._nonce())
        elif hello.sent_at is not None and now - hello.sent_at < CHALLENGE_RETRY_S:
            return None
        if not self._bucket.take(now):
            return None
        self._hellos_left -= 1
        hello.sent_at = now
        self.challenges_sent += 1
        return encode(KIND_CHALLENGE, 0, hello.nonce, self._listening_ms(now), any_session=True)

    def _listening_ms(self, now: float) -> int:
        """U: how long every authentic packet has passed this side's windows, rounded down."""
        since = self.trusted_since if self.trusted_since is not None else now
        return max(0, int((now - since) * 1000))

    def hello_deadline(self) -> float | None:
        """When the next hello is due (None: no more)."""
        hello = self._hello
        if self._proven or self._hellos_left <= 0 or hello is None or hello.sent_at is None:
            return None
        return hello.sent_at + CHALLENGE_RETRY_S

    def hold(self, session: int, sequence: int, packet: bytes, source: Any, now: float) -> int:
        """Keep an authentic packet of a session awaiting proof (``challenge`` made its entry);
        returns how many held packets (this one included) were dropped to stay in bounds."""
        pending = self._pending.get(session)
        if pending is None:
            return 1
        dropped = 0
        size = len(packet)
        while pending.held and (len(pending.held) >= MAX_HELD_PACKETS or self._held_bytes + size > MAX_HELD_BYTES):
            _, _, old, _ = pending.held.pop(0)
            pending.held_bytes -= len(old)
            self._held_bytes -= len(old)
            dropped += 1
        if self._held_bytes + size > MAX_HELD_BYTES:
            return dropped + 1
        pending.held.append((sequence, now, packet, source))
        pending.held_bytes += size
        self._held_bytes += size
        return dropped

    def screen(
        self, session: int, sequence: int, packet: bytes, source: Any, now: float, dropped: dict[str, int]
    ) -> Screening:
        """An authentic packet (``packet`` plain) that ``admits`` refused: what the decoder does
        with it.  An echo may prove its session (releasing what was held); a challenge or key
        check passes on (answering one proves nothing and costs one small packet) and makes us
        challenge its session too; anything else is held until the session is proven, or
        dropped as ``unproven`` if it was sealed before the proof (counted in ``dropped``)."""
        screening = Screening(dropped)
        if len(packet) > CONTROL_HEADER_BYTES and packet[0] == CONTROL_TYPE_BYTE:
            body = packet[CONTROL_HEADER_BYTES:]
            kind = kind_of(body)
            if kind == KIND_ECHO:
                proof = self.on_echo(session, sequence, body, now)
                if proof is None:
                    screening.drop(1, f"echo of session {session:#010x} answers no challenge")
                    return screening
                screening.events.append(SessionProven(session, proof.floor, proof.young, len(proof.released)))
                if proof.discarded:
                    screening.drop(proof.discarded, "held, sealed before the proof")
                screening.released = proof.released
                return screening
            if kind == KIND_CHALLENGE or kind == KIND_KEY_CHECK:
                screening.passes = True
                if session in self._proven:
                    return screening
        elif session in self._proven:
            screening.drop(1, f"session {session:#010x}: sequence {sequence} sealed before its echo")
            return screening
        challenge = self.challenge(session, now)
        if challenge is not None:
            screening.events.append(ChallengeDue(session, challenge, source))
        if not screening.passes:
            overflow = self.hold(session, sequence, packet, source, now)
            if overflow:
                screening.drop(overflow, f"session {session:#010x} not yet proven")
        return screening

    def on_echo(self, session: int, sequence: int, body: bytes, now: float) -> Proof | None:
        """An authentic echo in ``session``'s own packet with sequence ``sequence``: the proof
        when it answers our pending challenge (or hello), else None."""
        self._tick(now)
        try:
            message = parse(body)
        except FreshnessError:
            return None
        if message.kind != KIND_ECHO or message.session != session:
            return None
        pending = self._pending.get(session)
        if pending is not None and secrets.compare_digest(message.nonce, pending.nonce):
            pass
        elif self._hello is not None and secrets.compare_digest(message.nonce, self._hello.nonce):
            self._hello = None
        else:
            return None
        if pending is not None:
            del self._pending[session]
            self._held_bytes -= pending.held_bytes
        while len(self._proven) >= MAX_PROVEN:
            self._proven.popitem(last=False)
        self.proven_count += 1
        held = pending.held if pending is not None else []
        floor = min(sequence, message.value - 1)
        self._proven[session] = floor
        released = [
            (packet, source) for seq, arrival, packet, source in held if now - arrival <= HOLD_S and seq > floor
        ]
        return Proof(session, floor, released, len(held) - len(released), all(entry[0] > floor for entry in held))


class SequenceHistory:
    """The answering side's record of which sequence number it sealed when: the session's first,
    then one checkpoint per CHECKPOINT_S (HISTORY_CHECKPOINTS kept).  ``note`` costs a compare
    when no checkpoint is due, so the shell may call it per batch sent."""

    __slots__ = ("_first", "_marks", "_last")

    def __init__(self, now: float, first_sequence: int) -> None:
        self._first = (now, first_sequence)
        self._marks: deque[tuple[float, int]] = deque(maxlen=HISTORY_CHECKPOINTS)
        self._last = now

    def note(self, now: float, next_sequence: int) -> None:
        """``next_sequence`` is the number the next packet sealed from ``now`` on gets."""
        if now - self._last >= CHECKPOINT_S:
            self._last = now
            self._marks.append((now, next_sequence))

    def first_since(self, moment: float, next_sequence: int) -> int:
        """The lowest sequence number known to be sealed at or after ``moment`` (the next one
        if nothing recorded is that recent)."""
        start, first = self._first
        if start >= moment:
            return first
        for time, sequence in self._marks:
            if time >= moment:
                return sequence
        return next_sequence


class EchoResponder:
    """Answers challenges of the peer: one echo body per authentic challenge, rate-limited."""

    def __init__(self) -> None:
        self._bucket = _Bucket(ECHOES_PER_S, BURST)
        self.echoes_sent = 0

    def answer(
        self, body: bytes, own_session: int, history: SequenceHistory, next_sequence: int, now: float
    ) -> bytes | None:
        """The echo body for a challenge ``body`` naming ``own_session`` (this side's sender
        session, which will seal the echo as ``next_sequence``) or naming none (a hello), or
        None: malformed, another session's (a restarted side's predecessor: its echo could prove
        nothing), or over the rate.  It vouches for what was sealed since the challenger began
        listening (see the module docstring)."""
        try:
            message = parse(body)
        except FreshnessError:
            return None
        if message.kind != KIND_CHALLENGE or not (message.any_session or message.session == own_session):
            return None
        if not self._bucket.take(now):
            return None
        self.echoes_sent += 1
        vouched = history.first_since(now - message.value / 1000, next_sequence)
        return encode(KIND_ECHO, own_session, message.nonce, vouched)
