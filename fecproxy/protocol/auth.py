"""Packet protection on a shared medium: a tag on every packet, optional encryption, sans-IO.

Anyone in range of a radio or satellite link can inject packets, and FEC itself gives no security
(RFC 6363 §9).  With a pre-shared key every packet — source, repair and control alike (RFC 6363
§9.2.2, and §9.3 for the FEC payload IDs in the header) — carries a trailer::

    +----------------------+-------------------------+--------------+--------------+-----------+
    | common header (10 B) | body: type fields +     | key id (1 B) | sequence     | tag (16 B)|
    | flags: AUTH [+ ENC]  | payload (ENC: encrypted)|              | (8 B, BE)    |           |
    +----------------------+-------------------------+--------------+--------------+-----------+

* **MAC mode** (default): tag = HMAC-SHA-256(MAC key, every byte before the tag)[:16], i.e. the
  header with the AUTH flag set, the body, the key id and the sequence number.  HMAC-SHA-256
  (RFC 2104, FIPS 180-4) is what RFC 5510 §9 / RFC 6363 §9 name as a group MAC; truncation to
  128 bits is the RFC 4868 HMAC-SHA-256-128 choice and within RFC 2104 §5 (at least half the
  output and at least 80 bits).  Why not keyed BLAKE2: both are in the standard library, but
  HMAC-SHA-256 is the algorithm the FEC RFCs name, has RFC 4231 known answers, is FIPS-approved
  where operators need that, and costs little more: on the development machine (SHA-NI) one
  ``hmac.digest`` call over 1.2 kB took ≈ 2.2 µs against ≈ 1.8 µs for keyed BLAKE2b-128, a small
  share of the ≈ 20 µs the pair spends per datagram; the micro-benchmark in
  ``tests/test_auth.py`` prints both side by side.
* **Encrypted mode** (``auth.encrypt: true``, flag ENC also set): ChaCha20-Poly1305 (RFC 8439)
  from the ``cryptography`` package; the body is encrypted, the header, key id and sequence are
  associated data, and the 16-byte tag is Poly1305's.  Source and repair packets are treated
  exactly alike (RFC 6363 §9.2.1).  ChaCha20-Poly1305 rather than AES-GCM: constant-time and fast
  in software on the ARM boards radio sites often use, which may lack AES instructions.

Key id: one byte derived from the key itself (:mod:`fecproxy.protocol.keys`), so during a key
rollover the receiver tries only the key the packet names (both if the two ids collide).

Sequence number: 64 bits, +1 per packet sent by one sender run, independent of SBN/ESI; the
receiver's :class:`~fecproxy.protocol.replay.ReplayWindow` runs on it.  It starts at
``salt · 2^32`` with a 31-bit random ``salt`` drawn once per sender start.

Nonce rule (encrypted mode): nonce = session (4 bytes, from the header) ‖ sequence (8 bytes),
96 bits as RFC 8439 §2.8 takes them.  RFC 8439 §4 requires that a nonce never repeat under one
key; NIST SP 800-38D §8 states the same for GCM and builds nonces as a fixed field ‖ an invocation
counter.  Here the fixed field is 63 random bits per sender start (the 32-bit random session and
the 31-bit salt) and the counter the low 32 bits of the sequence, so within a run nonces are
distinct by construction (the sequence only grows and never wraps: 2^63 packets of headroom), and
two runs — including the two directions of a pair, which share the key — collide only when both
their random parts are equal: about N²/2^64 for N runs under one key (≈ 5·10⁻⁸ after a million
restarts; a run of more than 2^32 packets uses the next salt value, and counts as two).  A stored
counter would make this certain but needs writable state on every site; a fresh key
(``fecproxy keygen``) resets the count.

The sans-IO contract: :func:`verify` reads only the fixed 10-byte header and the trailer, computes
the tag, and compares it in constant time (``hmac.compare_digest``) before anything else is parsed,
allocated for the packet or changed in any state; it returns the plain packet without the
trailer and with the AUTH/ENC flags cleared, ready for :func:`fecproxy.protocol.wire.parse`.
:func:`open_packet` adds the replay check (query before the tag, update after it).
"""

from __future__ import annotations

import hmac
import struct
from dataclasses import dataclass
from typing import NamedTuple, Protocol

from fecproxy.protocol import keys, wire
from fecproxy.protocol.replay import SEQUENCE_LIMIT, ReplayWindow

#: The AUTH flag of the common header (bit 7).
FLAG_AUTH = wire.FLAG_AUTH
#: Bit 6 says the body is encrypted.  A flag of its own so that a pair with ``encrypt`` set on one
#: side only is told exactly that, not just "bad tag".
FLAG_ENCRYPTED = wire.FLAG_ENCRYPTED
_AUTH_FLAGS = FLAG_AUTH | FLAG_ENCRYPTED

HEADER_BYTES = wire.COMMON_HEADER.size  # 10
KEY_ID_BYTES = 1
SEQUENCE_BYTES = 8
#: 128 bits: RFC 4868 §2.3 truncates HMAC-SHA-256 to 128 bits for IPsec; Poly1305's tag is 128.
TAG_BYTES = 16
TRAILER_BYTES = KEY_ID_BYTES + SEQUENCE_BYTES + TAG_BYTES  # 25, inside the 32 bytes reserved
#: The shortest protected packet: a bare header and the trailer.
MIN_PROTECTED_BYTES = HEADER_BYTES + TRAILER_BYTES
#: The random salt of a sender start is 31 bits, so the sequence starts below 2^63 and has 2^63
#: packets of headroom before it could wrap.
SALT_BITS = 31
_SEQUENCE = struct.Struct(">Q")
_SESSION = struct.Struct(">I")  # bytes 2..5 of the common header
_TRAILER_HEAD = struct.Struct(">BQ")  # key id, sequence
_FLAG_BYTES = [bytes((value,)) for value in range(256)]


class AuthError(ValueError):
    """A packet that failed authentication; dropped and counted with ``reason``.

    ``kind`` says why, for the log (never for a counter label): ``truncated``, ``no_tag``,
    ``mode_mismatch``, ``unknown_key`` (the peer uses a key we do not have), ``bad_tag``.
    ``key_id`` is the id the packet named, when it got that far.
    """

    reason = "auth"

    def __init__(self, kind: str, detail: str, key_id: int | None = None):
        super().__init__(detail)
        self.kind = kind
        self.key_id = key_id


class ReplayedPacket(ValueError):
    """An authentic packet seen before, or too far behind to tell; counted as ``replay``."""

    reason = "replay"

    def __init__(self, detail: str, sequence: int):
        super().__init__(detail)
        self.sequence = sequence


class SequenceExhausted(RuntimeError):
    """The sender's 64-bit sequence would wrap: it must restart (new salt) before sending more."""


class Aead(Protocol):
    """What encrypted mode uses of ``cryptography``'s ChaCha20Poly1305 (an optional dependency,
    so it is described here rather than imported)."""

    def encrypt(self, nonce: bytes, data: bytes, associated_data: bytes | None, /) -> bytes: ...

    def decrypt(self, nonce: bytes, data: bytes, associated_data: bytes | None, /) -> bytes: ...


def _aead(key: bytes) -> Aead:
    """ChaCha20-Poly1305 from the optional ``cryptography`` package (``fecproxy[crypto]``)."""
    try:
        from cryptography.hazmat.primitives.ciphers.aead import ChaCha20Poly1305
    except ImportError as error:  # the config layer reports this before a daemon starts
        raise RuntimeError("auth.encrypt needs the cryptography package: pip install 'fecproxy[crypto]'") from error
    return ChaCha20Poly1305(key)


@dataclass(frozen=True, eq=False, repr=False)
class PacketKey:
    """Everything derived from one master key for protecting packets."""

    key_id: int
    mac_key: bytes
    aead: Aead | None  # a ChaCha20Poly1305 instance in encrypted mode
    fingerprint: str = ""  # keys.fingerprint: what people compare between the two sides' logs

    @classmethod
    def derive(cls, master: keys.MasterKey, *, encrypt: bool) -> PacketKey:
        aead = _aead(keys.aead_key(master)) if encrypt else None
        return cls(master.key_id, keys.mac_key(master), aead, master.fingerprint)

    def describe(self) -> str:
        """The key id (on the wire) and the fingerprint (to compare with the peer's log)."""
        return f"0x{self.key_id:02x} fingerprint {self.fingerprint}"

    def __repr__(self) -> str:
        return f"PacketKey(key id {self.describe()}, {'encrypted' if self.aead else 'MAC'})"


class Keyring:
    """The keys a side accepts: the current one (also used to send) and, during a rollover, the
    previous one.  Both sides must agree on ``encrypt``."""

    def __init__(self, current: keys.MasterKey, previous: keys.MasterKey | None = None, *, encrypt: bool = False):
        self.encrypt = encrypt
        self.current = PacketKey.derive(current, encrypt=encrypt)
        self.previous = None if previous is None else PacketKey.derive(previous, encrypt=encrypt)
        by_id: dict[int, tuple[PacketKey, ...]] = {}
        for key in (self.current, self.previous):
            if key is not None:
                by_id[key.key_id] = by_id.get(key.key_id, ()) + (key,)
        self._by_id = by_id

    def candidates(self, key_id: int) -> tuple[PacketKey, ...]:
        """The keys named by ``key_id``: usually one, two only if both ids collide (1 in 256)."""
        return self._by_id.get(key_id, ())

    @property
    def key_ids(self) -> tuple[int, ...]:
        return tuple(self._by_id)

    def describe(self) -> str:
        """For log lines, the mode first: ``MAC (not encrypted), key 0x0a fingerprint 3f…,
        previous key 0x5c fingerprint 9d…`` or ``encrypted (ChaCha20-Poly1305), key …``."""
        text = "encrypted (ChaCha20-Poly1305)" if self.encrypt else "MAC (not encrypted)"
        text += f", key {self.current.describe()}"
        if self.previous is not None:
            text += f", previous key {self.previous.describe()}"
        return text

    def __repr__(self) -> str:
        return f"Keyring({self.describe()})"


class Verified(NamedTuple):
    """An authentic packet: ``packet`` is the plain packet for ``wire.parse``.

    A named tuple rather than a frozen dataclass: it is built once per packet on the hot path.
    """

    packet: bytes
    key_id: int
    sequence: int
    session: int
    previous_key: bool  # accepted with the previous key: the peer has not rolled over yet


def first_sequence(salt: int) -> int:
    """The sequence a sender start begins at, from a fresh random ``salt`` of SALT_BITS bits
    (the caller draws it: ``secrets.randbits(SALT_BITS)``; this module does no I/O)."""
    if not 0 <= salt < 1 << SALT_BITS:
        raise ValueError(f"salt must be 0..2^{SALT_BITS}−1")
    return salt << 32


def protect(packet: bytes, key: PacketKey, sequence: int) -> bytes:
    """A plain packet -> the same packet with AUTH (and ENC) set, trailer appended."""
    if len(packet) < HEADER_BYTES:
        raise ValueError(f"a packet of {len(packet)} bytes has no {HEADER_BYTES}-byte header")
    if not 0 <= sequence < SEQUENCE_LIMIT:
        raise ValueError(f"sequence {sequence} is outside 0..2^64−1")
    flags = packet[1]
    if flags & _AUTH_FLAGS:
        raise ValueError("the packet is already protected")
    trailer_head = _TRAILER_HEAD.pack(key.key_id, sequence)
    if key.aead is None:
        header = packet[:1] + _FLAG_BYTES[flags | FLAG_AUTH] + packet[2:HEADER_BYTES]
        covered = header + packet[HEADER_BYTES:] + trailer_head
        return covered + hmac.digest(key.mac_key, covered, "sha256")[:TAG_BYTES]
    header = packet[:1] + _FLAG_BYTES[flags | _AUTH_FLAGS] + packet[2:HEADER_BYTES]
    sealed = key.aead.encrypt(packet[2:6] + _SEQUENCE.pack(sequence), packet[HEADER_BYTES:], header + trailer_head)
    return header + sealed[:-TAG_BYTES] + trailer_head + sealed[-TAG_BYTES:]


class Sealer:
    """The sending side of one daemon run: protects every packet with the next sequence number."""

    __slots__ = ("key", "next_sequence")

    def __init__(self, key: PacketKey, salt: int):
        self.key = key
        self.next_sequence = first_sequence(salt)

    def seal(self, packet: bytes) -> bytes:
        sequence = self.next_sequence
        if sequence >= SEQUENCE_LIMIT:
            raise SequenceExhausted("the 64-bit packet sequence is used up; restart the sender")
        self.next_sequence = sequence + 1
        return protect(packet, self.key, sequence)


def peek_trailer(packet: bytes) -> tuple[int, int, int]:
    """(session, key id, sequence) of a protected packet, read from fixed offsets only.

    For choosing the session's replay window before the tag is checked; raises AuthError when the
    packet is too short to hold a header and a trailer.
    """
    size = len(packet)
    if size < MIN_PROTECTED_BYTES:
        raise AuthError(
            "truncated", f"packet of {size} bytes is shorter than a header and a {TRAILER_BYTES}-byte tag trailer"
        )
    key_id, sequence = _TRAILER_HEAD.unpack_from(packet, size - TRAILER_BYTES)
    (session,) = _SESSION.unpack_from(packet, 2)
    return session, key_id, sequence


def _require_tag_flag(packet: bytes) -> None:
    """A plain packet (even one shorter than a trailer) is reported as untagged, not truncated:
    that is what a peer without a key sends."""
    if len(packet) >= HEADER_BYTES and not packet[1] & FLAG_AUTH:
        raise AuthError("no_tag", "packet carries no authentication tag: the peer has no auth.key_file set")


def verify(packet: bytes, keyring: Keyring) -> Verified:
    """Check a packet's tag (and decrypt it); return the plain packet or raise AuthError."""
    _require_tag_flag(packet)
    session, key_id, sequence = peek_trailer(packet)
    flags = packet[1]
    encrypted = bool(flags & FLAG_ENCRYPTED)
    if encrypted != keyring.encrypt:
        peer, here = ("encrypts", "does not") if encrypted else ("does not encrypt", "does")
        raise AuthError(
            "mode_mismatch",
            f"the peer {peer} (auth.encrypt) but this side {here}: set auth.encrypt alike on both sides (or the "
            f"packet is forged)",
            key_id,
        )
    candidates = keyring.candidates(key_id)
    if not candidates:
        ours = ", ".join(key.describe() for key in (keyring.current, keyring.previous) if key is not None)
        raise AuthError(
            "unknown_key",
            f"packet made with key id 0x{key_id:02x}, this side has {ours}: the two sides have different key files "
            f"(or the packet is forged)",
            key_id,
        )
    tag_start = len(packet) - TAG_BYTES
    tag = packet[tag_start:]
    for key in candidates:
        if key.aead is None:
            expected = hmac.digest(key.mac_key, memoryview(packet)[:tag_start], "sha256")
            if hmac.compare_digest(expected[:TAG_BYTES], tag):
                plain = packet[:1] + _FLAG_BYTES[flags & ~_AUTH_FLAGS] + packet[2 : tag_start - _TRAILER_HEAD.size]
                return Verified(plain, key_id, sequence, session, key is not keyring.current)
        else:
            body = _decrypt(key.aead, packet, sequence)
            if body is not None:
                plain = packet[:1] + _FLAG_BYTES[flags & ~_AUTH_FLAGS] + packet[2:HEADER_BYTES] + body
                return Verified(plain, key_id, sequence, session, key is not keyring.current)
    raise AuthError(
        "bad_tag",
        f"tag check failed for key id 0x{key_id:02x}: forged or damaged packet, or a different key with the same id "
        f"(this side's has fingerprint {', '.join(key.fingerprint for key in candidates)}: compare it with the peer's)",
        key_id,
    )


def _decrypt(aead: Aead, packet: bytes, sequence: int) -> bytes | None:
    from cryptography.exceptions import InvalidTag

    nonce = packet[2:6] + _SEQUENCE.pack(sequence)
    associated = packet[:HEADER_BYTES] + packet[-TRAILER_BYTES:-TAG_BYTES]
    sealed = packet[HEADER_BYTES:-TRAILER_BYTES] + packet[-TAG_BYTES:]
    try:
        return aead.decrypt(nonce, sealed, associated)
    except InvalidTag:
        return None


def open_packet(packet: bytes, keyring: Keyring, window: ReplayWindow) -> Verified:
    """Replay query, tag check, then window update — RFC 4303 §3.4.3's order.

    ``window`` is the replay window of the packet's session (the caller picks it by the header's
    session field, e.g. from :func:`peek_trailer`).  Raises AuthError or ReplayedPacket.
    """
    _require_tag_flag(packet)
    _, _, sequence = peek_trailer(packet)
    verdict = window.check(sequence)
    if not verdict.accepted:
        raise ReplayedPacket(
            f"sequence {sequence} is {verdict.value.replace('_', ' ')} (highest {window.highest})", sequence
        )
    verified = verify(packet, keyring)
    window.commit(sequence)
    return verified


#: Seconds between two log lines about authentication failures of the same kind.  A peer with
#: the wrong key sends hundreds of packets a second; one line a minute says it without flooding
#: the journal, and the ``auth`` counter carries the rate.
FAILURE_LOG_INTERVAL_S = 60.0


class FailureNotice:
    """Rate-limits the log of authentication failures: one line per kind per interval.

    ``note(error, now)`` returns the line to log, or None while the kind was logged less than
    ``interval`` seconds ago; the line says how many were suppressed since.  Pure: ``now`` in.
    """

    def __init__(self, interval: float = FAILURE_LOG_INTERVAL_S):
        self.interval = interval
        self._last: dict[str, float] = {}
        self._suppressed: dict[str, int] = {}

    def note(self, error: AuthError, now: float) -> str | None:
        last = self._last.get(error.kind)
        if last is not None and now - last < self.interval:
            self._suppressed[error.kind] = self._suppressed.get(error.kind, 0) + 1
            return None
        self._last[error.kind] = now
        suppressed = self._suppressed.pop(error.kind, 0)
        more = f" ({suppressed} more since the last report)" if suppressed else ""
        return f"authentication failed: {error}{more}"
