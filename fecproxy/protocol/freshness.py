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

Why this stops a replay: a recording holds only packets sealed before the nonce existed, so it
holds no echo of it, and the key is needed to make one.  If the recorded session is still live,
its sender answers and the floor Q lies above every recorded packet.  Limits: it needs the return
path (a one-way link delivers nothing in keyed mode); the packets a side sends during the round
trip after the other side restarted are lost (one round trip, ~1 ms on a LAN, ~600 ms over a
geostationary hop); a recording still costs the work of checking its tags; and all of it holds
only while the key file stays secret.  Challenges and echoes are rate-limited, so a recorded
challenge replayed at a side cannot make it send more than ECHOES_PER_S small packets.

Control bodies (after the 10-byte common header of a control packet, :mod:`wire`)::

    kind (1 B: 3 = challenge, 4 = echo) | reserved (3 B, 0) | session (4 B) | nonce (16 B)

Pure: ``now`` in, bodies out; the shell seals and sends them.
"""

from __future__ import annotations

import secrets
import struct
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass

KIND_CHALLENGE = 3
KIND_ECHO = 4
#: kind, 3 reserved bytes, session, nonce.
BODY = struct.Struct(">B3xI16s")
BODY_BYTES = BODY.size  # 24
#: 128 bits: the nonce size RFC 7296 §2.10 requires at least (half the PRF key size, ≥ 128 bits).
NONCE_BYTES = 16
#: A challenge not answered within this time is sent again (same nonce).  Four tries a second
#: keep a restart under a second behind a lost challenge on a lossy link, and stay far below the
#: data rate (common practice, no source).
CHALLENGE_RETRY_S = 0.25
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


def encode(kind: int, session: int, nonce: bytes) -> bytes:
    if kind not in (KIND_CHALLENGE, KIND_ECHO) or len(nonce) != NONCE_BYTES or not 0 <= session <= 0xFFFFFFFF:
        raise ValueError("challenge/echo needs kind 3 or 4, a 32-bit session and a 16-byte nonce")
    return BODY.pack(kind, session, nonce)


def parse(body: bytes) -> Message:
    if len(body) != BODY_BYTES:
        raise FreshnessError(f"challenge/echo body of {len(body)} bytes; expected {BODY_BYTES}")
    if body[1:4] != b"\x00\x00\x00":
        raise FreshnessError("challenge/echo with reserved bytes set")
    kind, session, nonce = BODY.unpack(body)
    if kind not in (KIND_CHALLENGE, KIND_ECHO):
        raise FreshnessError(f"control kind {kind} is not a challenge or an echo")
    return Message(kind, session, nonce)


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
    __slots__ = ("nonce", "sent_at")

    def __init__(self, nonce: bytes) -> None:
        self.nonce = nonce
        self.sent_at: float | None = None


class FreshnessGate:
    """Which peer sessions are proven, from which sequence number on; challenges to send.

    ``admits(session, sequence)`` on every authentic packet (two dict lookups at most);
    ``challenge(session, now)`` for one that is not admitted; ``on_echo`` when an echo arrives.
    """

    def __init__(self, nonce: Callable[[], bytes] = lambda: secrets.token_bytes(NONCE_BYTES)) -> None:
        self._nonce = nonce
        self._proven: OrderedDict[int, int] = OrderedDict()  # session -> floor (echo's sequence)
        self._pending: OrderedDict[int, _Pending] = OrderedDict()
        self._bucket = _Bucket(CHALLENGES_PER_S, BURST)
        self.challenges_sent = 0
        self.proven_count = 0

    def admits(self, session: int, sequence: int) -> bool:
        """True when ``session`` is proven and ``sequence`` was sealed after its echo."""
        floor = self._proven.get(session)
        return floor is not None and sequence > floor

    def is_proven(self, session: int) -> bool:
        return session in self._proven

    def challenge(self, session: int, now: float) -> bytes | None:
        """The challenge body to send for an unproven ``session`` now, or None (one is out and
        not yet due again, or the rate limit is reached)."""
        pending = self._pending.get(session)
        if pending is None:
            pending = self._pending[session] = _Pending(self._nonce())
            while len(self._pending) > MAX_PENDING:
                self._pending.popitem(last=False)
        elif pending.sent_at is not None and now - pending.sent_at < CHALLENGE_RETRY_S:
            return None
        if not self._bucket.take(now):
            return None
        pending.sent_at = now
        self.challenges_sent += 1
        return encode(KIND_CHALLENGE, session, pending.nonce)

    def on_echo(self, session: int, sequence: int, body: bytes) -> bool:
        """An authentic echo in ``session``'s own packet with sequence ``sequence``: True when it
        answers our pending challenge (the session is proven from ``sequence`` on)."""
        try:
            message = parse(body)
        except FreshnessError:
            return False
        pending = self._pending.get(session)
        if message.kind != KIND_ECHO or message.session != session or pending is None:
            return False
        if not secrets.compare_digest(message.nonce, pending.nonce):
            return False
        del self._pending[session]
        self._proven[session] = sequence
        while len(self._proven) > MAX_PROVEN:
            self._proven.popitem(last=False)
        self.proven_count += 1
        return True


class EchoResponder:
    """Answers challenges of the peer: one echo body per authentic challenge, rate-limited."""

    def __init__(self) -> None:
        self._bucket = _Bucket(ECHOES_PER_S, BURST)
        self.echoes_sent = 0

    def answer(self, body: bytes, own_session: int, now: float) -> bytes | None:
        """The echo body for a challenge ``body`` naming ``own_session`` (this side's sender
        session, which will seal the echo), or None: malformed, another session's (a restarted
        side's predecessor: its echo could prove nothing), or over the rate."""
        try:
            message = parse(body)
        except FreshnessError:
            return None
        if message.kind != KIND_CHALLENGE or message.session != own_session or not self._bucket.take(now):
            return None
        self.echoes_sent += 1
        return encode(KIND_ECHO, message.session, message.nonce)
