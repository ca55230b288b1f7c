"""The fecproxy wire format: bytes <-> header fields, validated before anything is trusted.

Every packet on the link starts with a 10-byte common header (all integers big-endian)::

     0                   1                   2                   3
     0 1 2 3 4 5 6 7 8 9 0 1 2 3 4 5 6 7 8 9 0 1 2 3 4 5 6 7 8 9 0 1
    +-------+-------+---------------+-------------------------------+
    |version| type  |     flags     |     session (32 bits) ...     |
    +-------+-------+---------------+-------------------------------+
    |  ... session  |      source block number (SBN, 24 bits)       |
    +---------------+---------------+-------------------------------+
    |  ESI (8 bits) |  ... type-specific fields and payload
    +---------------+

SBN and ESI are the FEC Payload ID of RFC 6865 §5.1 for m = 8 (24 + 8 bits).  Then:

* source (type 0): flow id (24 bits: 16-bit slot ‖ 8-bit generation), the previous block's k
  (8 bits; 0 = none or not known), the flow's sequence number (16 bits), then the application
  datagram exactly as sent.
* repair (type 1): the block's k (16 bits, RFC 6865 §5.1), then one repair symbol.
* control (type 2): the body of a receiver's loss report (:mod:`fecproxy.protocol.loss_report`);
  the header's session is the sending side's own (as on all its packets), its SBN and ESI are 0
  and it has no flags.

Repair symbols cover, per source datagram, the RFC 6363 §4 / RFC 6865 §4 source symbol
"flow id ‖ length (2 bytes) ‖ datagram ‖ zero padding" up to the block's symbol size, with our
flow id widened from the RFCs' one byte to three (slot and generation, so thousands of clients
fit and a recycled slot is told from its previous client) and our flow sequence number (2 bytes)
after the length; those 7 bytes and the padding never travel in source packets, so a rebuilt
datagram gets back its exact length, flow and place in its flow.

The flow sequence number counts each flow's datagrams in the order the sender took them (from 0,
modulo 2^16).  Blocks cannot tell that order: a flow's datagrams spread over size classes and
interleaved blocks, and a rebuilt datagram comes when its block completes.  A receiver that
delivers in order (``delivery.order: in_order``, :mod:`fecproxy.protocol.ordering`) reads it
from source packets and rebuilt symbols alike; it costs 2 bytes per source and per repair packet.

k travels only in repair packets: a block closed early by its flush timer has fewer datagrams than
configured, and that is known only once it is closed.  The END flag on a source packet says "this
is the last datagram of a block filled to its configured k", so a receiver with no loss can close
the block without waiting for repair.  And every source packet tells the k of the block before it:
when a block's last datagrams and all its repair packets are lost, or the block is lost whole, the
next block still tells the receiver how many datagrams went missing, so loss is counted, not
silently under-counted.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from enum import IntEnum
from functools import partial
from typing import Literal, overload

from fecproxy.coding.codec import MAX_ENCODING_SYMBOLS
from fecproxy.protocol.events import DropReason

#: Version 3: a 16-bit flow sequence number in the source header and symbol prefix.  Version 2
#: had none; version 1 had a one-byte flow id.
VERSION = 3
#: The FEC Payload ID word of the common header is ``SBN << ESI_BITS | ESI`` (RFC 6865 §5.1, m = 8).
ESI_BITS = 8
ESI_MASK = (1 << ESI_BITS) - 1
COMMON_HEADER = struct.Struct(">BBII")  # version|type, flags, session, SBN<<8 | ESI
#: Common header + one 32-bit *flow word*: flow id (24 bits) << 8 | previous block's k (8 bits),
#: then the flow sequence number (16 bits).
SOURCE_HEADER = struct.Struct(">BBIIIH")
REPAIR_HEADER = struct.Struct(">BBIIH")  # common + k
SOURCE_HEADER_BYTES = SOURCE_HEADER.size  # 16
REPAIR_HEADER_BYTES = REPAIR_HEADER.size  # 12
#: The flow id is 24 bits: a 16-bit slot (thousands of concurrent clients, where RFC 6363 §4's one
#: byte stops at 256) and an 8-bit generation (a slot's new client is a new conversation).
FLOW_ID_BITS = 24
MAX_FLOW_IDS = 1 << FLOW_ID_BITS
#: The flow id is ``slot << GENERATION_BITS | generation`` (what each part means: protocol.flows).
GENERATION_BITS = 8
GENERATION_MASK = (1 << GENERATION_BITS) - 1
SLOT_BITS = FLOW_ID_BITS - GENERATION_BITS
#: The flow word of a source header is ``flow << FLOW_SHIFT | previous_k``: the previous block's k
#: takes the low byte (k ≤ MAX_K = 255).
FLOW_SHIFT = 8
PREVIOUS_K_MASK = (1 << FLOW_SHIFT) - 1
#: Sequence numbers count each flow's datagrams modulo 2^16 (serial-number arithmetic,
#: RFC 1982): a receiver holds at most a few thousand ahead, far below half the space.
SEQUENCE_BITS = 16
SEQUENCE_MODULUS = 1 << SEQUENCE_BITS
#: Source symbol prefix after RFC 6363 §4 / RFC 6865 §4, flow id widened to 3 bytes, and the flow
#: sequence number: slot (2) ‖ generation (1) ‖ length (2) ‖ sequence (2), all big-endian; packed
#: as (flow >> GENERATION_BITS, flow & GENERATION_MASK, length, seq).
SYMBOL_PREFIX = struct.Struct(">HBHH")
#: The flow id, the 2-byte length and the 2-byte sequence number that precede the datagram (and
#: its zero padding) in a symbol.
SYMBOL_PREFIX_BYTES = SYMBOL_PREFIX.size  # 7
#: Where the length sits in the prefix.
SYMBOL_LENGTH_OFFSET = 3

SBN_MODULUS = 1 << 24
#: RFC 5510 §8.2 for GF(2^8): n ≤ 255 encoding symbols, so ESI ≤ 254 and k ≤ 255.
MAX_K = MAX_ENCODING_SYMBOLS
MAX_ESI = MAX_ENCODING_SYMBOLS - 1
#: The length field is 16 bits; a datagram can't be longer than this in any block.
MAX_DATAGRAM_LIMIT = 0xFFFF - SYMBOL_PREFIX_BYTES
#: Room kept for the authentication trailer: the 32 bytes of a full HMAC-SHA-256 output, which hold
#: auth.TRAILER_BYTES = 25 (key id, sequence, 16-byte tag).  RFC 6363 §9 and RFC 5510 §9 recommend
#: authenticating source and repair packets.
AUTH_TAG_RESERVE_BYTES = 32
#: A repair packet is header (12 bytes) + symbol prefix (flow 3 + length 2, after RFC 6363 §4,
#: + sequence 2) + datagram, and should fit a 1500-byte Ethernet MTU (RFC 894) less 20 bytes of
#: IPv4 header (RFC 791) and 8 of UDP (RFC 768), with 32 bytes kept for the authentication trailer
#: (AUTH_TAG_RESERVE_BYTES): 1500 − 28 − 12 − 7 − 32 = 1421, rounded down to 1400.
DEFAULT_MAX_DATAGRAM = 1400

FLAG_END = 0x01  # source: last datagram of a block filled to its configured k
FLAG_AUTH = 0x80  # an authentication trailer follows (fecproxy.protocol.auth); removed before parse
FLAG_ENCRYPTED = 0x40  # with FLAG_AUTH: the body is encrypted (auth.encrypt)
_KNOWN_FLAGS = FLAG_END


class PacketType(IntEnum):
    SOURCE = 0
    REPAIR = 1
    CONTROL = 2
    SLIDING_SOURCE = 3  # fec.code: sliding (RFC 8681), see "Sliding-window packets" below
    SLIDING_REPAIR = 4


#: The first byte (version and type) of the packets this version sends.
SOURCE_TYPE_BYTE = (VERSION << 4) | PacketType.SOURCE
REPAIR_TYPE_BYTE = (VERSION << 4) | PacketType.REPAIR
CONTROL_TYPE_BYTE = (VERSION << 4) | PacketType.CONTROL
CONTROL_HEADER_BYTES = COMMON_HEADER.size  # 10: a control packet is the common header and its body

# Hot-path packers and peekers: the layout above, for the encoder's and decoder's per-packet work
# (a ``partial`` of a Struct method adds ~30 ns per call, a Python function ~120 ns).  They trust
# their arguments; ``encode_*`` and ``parse`` are the checked forms.

#: ``pack_source_header(flags, session, sbn << ESI_BITS | esi, flow << FLOW_SHIFT | previous_k, seq)``
#: -> 16 bytes.
pack_source_header = partial(SOURCE_HEADER.pack, SOURCE_TYPE_BYTE)
#: ``pack_repair_header(session, sbn << ESI_BITS | esi, k)`` -> 12 bytes (repair has no flags).
pack_repair_header = partial(REPAIR_HEADER.pack, REPAIR_TYPE_BYTE, 0)
#: ``peek_source(data)`` -> (type byte, flags, session, payload id, flow word, seq), unchecked; needs
#: len(data) ≥ SOURCE_HEADER_BYTES.  flow = word >> FLOW_SHIFT, previous k = word & PREVIOUS_K_MASK.
peek_source = SOURCE_HEADER.unpack_from
#: ``peek_repair(data)`` -> (type byte, flags, session, payload id, k), unchecked; needs
#: len(data) ≥ REPAIR_HEADER_BYTES.
peek_repair = REPAIR_HEADER.unpack_from


class PacketError(ValueError):
    """A packet that fails validation; ``reason`` is the drop-counter label."""

    reason = DropReason.MALFORMED


class TruncatedPacket(PacketError):
    pass


class UnsupportedPacket(PacketError):
    """A version, type or flag this build does not speak (a newer peer, or stray traffic)."""

    reason = DropReason.UNSUPPORTED


class InvalidField(PacketError):
    pass


class OversizePacket(PacketError):
    reason = DropReason.OVERSIZE


@dataclass(frozen=True, slots=True)
class SourcePacket:
    session: int
    sbn: int
    esi: int
    flow: int
    end: bool
    data: bytes
    previous_k: int = 0  # k of block sbn − 1, so a block whose repair was all lost still has a size
    seq: int = 0  # the flow's sequence number: its place in the order the sender took the flow's datagrams


@dataclass(frozen=True, slots=True)
class RepairPacket:
    session: int
    sbn: int
    esi: int
    k: int
    symbol: bytes


@dataclass(frozen=True, slots=True)
class ControlPacket:
    session: int
    body: bytes


def encode_source(
    session: int,
    sbn: int,
    esi: int,
    flow: int,
    data: bytes,
    *,
    end: bool = False,
    previous_k: int = 0,
    seq: int = 0,
) -> bytes:
    if not 0 <= flow < MAX_FLOW_IDS or not 0 <= previous_k <= PREVIOUS_K_MASK:
        raise ValueError(f"flow {flow} or previous k {previous_k} outside 24 and 8 bits")
    if not 0 <= seq < SEQUENCE_MODULUS:
        raise ValueError(f"sequence number {seq} outside {SEQUENCE_BITS} bits")
    word = flow << FLOW_SHIFT | previous_k
    return pack_source_header(FLAG_END if end else 0, session, (sbn << ESI_BITS) | esi, word, seq) + data


def pack_symbol_prefix(flow: int, length: int, seq: int) -> bytes:
    """The 7-byte prefix a source datagram has in its symbol: slot ‖ generation ‖ length ‖ sequence."""
    return SYMBOL_PREFIX.pack(flow >> GENERATION_BITS, flow & GENERATION_MASK, length, seq)


def unpack_symbol_prefix(symbol: bytes | bytearray | memoryview) -> tuple[int, int, int]:
    """(flow, length, seq) from the first SYMBOL_PREFIX_BYTES bytes of a symbol."""
    slot, generation, length, seq = SYMBOL_PREFIX.unpack_from(symbol)
    return slot << GENERATION_BITS | generation, length, seq


def encode_repair(session: int, sbn: int, esi: int, k: int, symbol: bytes) -> bytes:
    if not (1 <= k <= MAX_K and k <= esi <= MAX_ESI):
        raise ValueError(f"repair ESI {esi} with k={k} is outside 1 ≤ k ≤ ESI ≤ {MAX_ESI}")
    return pack_repair_header(session, (sbn << ESI_BITS) | esi, k) + symbol


def encode_control(session: int, body: bytes) -> bytes:
    """A control packet: the common header (no flags, SBN and ESI 0) and ``body``."""
    if not 0 <= session <= 0xFFFFFFFF:
        raise ValueError(f"session {session} does not fit 32 bits")
    return COMMON_HEADER.pack(CONTROL_TYPE_BYTE, 0, session, 0) + body


@overload
def parse(packet: bytes, *, max_datagram: int, sliding: Literal[False] = False) -> BlockCodePacket: ...
@overload
def parse(packet: bytes, *, max_datagram: int, sliding: bool) -> Packet: ...
def parse(packet: bytes, *, max_datagram: int, sliding: bool = False) -> Packet:
    """Validate every field, then return the packet; raise a PacketError naming the fault.

    ``max_datagram`` bounds both source payloads and repair symbols (RFC 8681 §7.5: check every
    header-derived size before it sizes anything), so a forged packet cannot inflate a block.
    Sliding-window packets are parsed only for a caller that decodes them (``sliding=True``);
    to any other they are an unsupported type.
    """
    size = len(packet)
    if size < COMMON_HEADER.size:
        raise TruncatedPacket(f"packet of {size} bytes is shorter than the {COMMON_HEADER.size}-byte header")
    version_type, flags, session, sbn_esi = COMMON_HEADER.unpack_from(packet)
    version = version_type >> 4
    if version != VERSION:
        raise UnsupportedPacket(f"version {version} not supported (this build speaks {VERSION})")
    kind = version_type & 0x0F
    if flags & ~_KNOWN_FLAGS:
        raise UnsupportedPacket(f"flags 0x{flags:02x} set bits this version does not define")
    sbn = sbn_esi >> ESI_BITS
    esi = sbn_esi & ESI_MASK
    if kind == PacketType.SOURCE:
        if size < SOURCE_HEADER_BYTES:
            raise TruncatedPacket(f"source packet of {size} bytes has no flow id, previous k and sequence number")
        if esi > MAX_ESI:
            raise InvalidField(f"source ESI {esi} is above {MAX_ESI}")
        payload = size - SOURCE_HEADER_BYTES
        if payload > max_datagram:
            raise OversizePacket(f"source datagram of {payload} bytes exceeds the limit of {max_datagram}")
        word, seq = SOURCE_HEADER.unpack_from(packet)[4:]
        return SourcePacket(
            session,
            sbn,
            esi,
            word >> FLOW_SHIFT,
            bool(flags & FLAG_END),
            bytes(packet[SOURCE_HEADER_BYTES:]),
            word & PREVIOUS_K_MASK,
            seq,
        )
    if kind == PacketType.REPAIR:
        if flags:
            raise InvalidField(f"repair packet with flags 0x{flags:02x}")
        if size < REPAIR_HEADER_BYTES:
            raise TruncatedPacket(f"repair packet of {size} bytes has no k field")
        k = REPAIR_HEADER.unpack_from(packet)[4]
        if not 1 <= k <= MAX_K:
            raise InvalidField(f"repair packet with k={k}; expected 1..{MAX_K}")
        if not k <= esi <= MAX_ESI:
            raise InvalidField(f"repair ESI {esi} with k={k}; expected k ≤ ESI ≤ {MAX_ESI}")
        symbol_size = size - REPAIR_HEADER_BYTES
        if symbol_size < SYMBOL_PREFIX_BYTES:
            raise TruncatedPacket(
                f"repair symbol of {symbol_size} bytes is shorter than its {SYMBOL_PREFIX_BYTES}-byte prefix"
            )
        if symbol_size > max_datagram + SYMBOL_PREFIX_BYTES:
            raise OversizePacket(
                f"repair symbol of {symbol_size} bytes exceeds the limit of {max_datagram + SYMBOL_PREFIX_BYTES}"
            )
        return RepairPacket(session, sbn, esi, k, bytes(packet[REPAIR_HEADER_BYTES:]))
    if kind == PacketType.CONTROL:
        if flags:
            raise InvalidField(f"control packet with flags 0x{flags:02x}")
        if sbn_esi:
            raise InvalidField(f"control packet with SBN {sbn} and ESI {esi}; expected 0")
        return ControlPacket(session, bytes(packet[COMMON_HEADER.size :]))
    if (kind == PacketType.SLIDING_SOURCE or kind == PacketType.SLIDING_REPAIR) and sliding:
        if flags:
            raise InvalidField(f"sliding-window packet with flags 0x{flags:02x}")
        return _parse_sliding(packet, kind, session, sbn_esi, max_datagram)
    raise UnsupportedPacket(f"packet type {kind} is not defined")


# --- Sliding-window packets (fec.code: sliding, RFC 8681) ----------------------------------------
#
# The same 10-byte common header; its 32-bit payload-id word holds a 32-bit source symbol id
# instead of SBN ‖ ESI (RFC 8681 §4.1.2: the source FEC payload ID is a 32-bit ESI):
#
# * sliding source (type 3): common header (word = ESI), flow word (flow id 24 bits ‖ 8 bits 0),
#   the flow sequence number (16 bits), datagram; 16 bytes of header, as a block source packet.
# * sliding repair (type 4): common header (word = FSS_ESI, the first source symbol of the
#   window), repair key (16 bits), DT (4 bits) ‖ NSS (12 bits), repair symbol; 14 bytes of header.
#   Repair key, DT, NSS and FSS_ESI are exactly what RFC 8681 §4.1.3's repair FEC payload ID
#   carries, in our own layout.  The repair symbol covers the window's symbols framed as
#   ``pack_symbol_prefix`` frames them (RFC 8681 §3.2 ADUI: flow ‖ length ‖ datagram ‖ padding).
#
# No flags are defined for them; authentication (auth.py) treats them like every other packet.

SLIDING_SOURCE_TYPE_BYTE = (VERSION << 4) | PacketType.SLIDING_SOURCE
SLIDING_REPAIR_TYPE_BYTE = (VERSION << 4) | PacketType.SLIDING_REPAIR
SLIDING_REPAIR_HEADER = struct.Struct(">BBIIHH")  # common + repair key + DT << 12 | NSS
SLIDING_SOURCE_HEADER_BYTES = SOURCE_HEADER_BYTES  # 16
SLIDING_REPAIR_HEADER_BYTES = SLIDING_REPAIR_HEADER.size  # 14
#: RFC 8681 §4.1.3: NSS is 12 bits and DT 4 bits; source symbol ids are 32 bits (§4.1.2).
NSS_BITS = 12
NSS_MASK = (1 << NSS_BITS) - 1
MAX_DENSITY = 15
ESI_MODULUS = 1 << 32

#: ``pack_sliding_source(session, esi, flow << FLOW_SHIFT, seq)`` -> 16 bytes.
pack_sliding_source = partial(SOURCE_HEADER.pack, SLIDING_SOURCE_TYPE_BYTE, 0)
#: ``pack_sliding_repair(session, first_esi, repair_key, dt << NSS_BITS | nss)`` -> 14 bytes.
pack_sliding_repair = partial(SLIDING_REPAIR_HEADER.pack, SLIDING_REPAIR_TYPE_BYTE, 0)


@dataclass(frozen=True, slots=True)
class SlidingSourcePacket:
    session: int
    esi: int  # 32 bits on the wire: the receiver unwraps it
    flow: int
    data: bytes
    seq: int = 0  # the flow's sequence number, as in SourcePacket


@dataclass(frozen=True, slots=True)
class SlidingRepairPacket:
    session: int
    first_esi: int  # FSS_ESI
    repair_key: int
    dt: int
    nss: int
    symbol: bytes


#: What ``parse`` returns to a block-code caller (``sliding=False``).
BlockCodePacket = SourcePacket | RepairPacket | ControlPacket
#: Every packet ``parse`` returns.
Packet = SourcePacket | RepairPacket | ControlPacket | SlidingSourcePacket | SlidingRepairPacket


def encode_sliding_source(session: int, esi: int, flow: int, data: bytes, seq: int = 0) -> bytes:
    if not 0 <= flow < MAX_FLOW_IDS or not 0 <= seq < SEQUENCE_MODULUS:
        raise ValueError(f"flow {flow} or sequence number {seq} outside 24 and 16 bits")
    return pack_sliding_source(session, esi % ESI_MODULUS, flow << FLOW_SHIFT, seq) + data


def encode_sliding_repair(session: int, first_esi: int, repair_key: int, dt: int, nss: int, symbol: bytes) -> bytes:
    if not (0 <= repair_key <= 0xFFFF and 0 <= dt <= MAX_DENSITY and 1 <= nss <= NSS_MASK):
        raise ValueError(f"repair key {repair_key}, DT {dt} or NSS {nss} outside 16, 4 and 12 bits (NSS ≥ 1)")
    return pack_sliding_repair(session, first_esi % ESI_MODULUS, repair_key, dt << NSS_BITS | nss) + symbol


def _parse_sliding(
    packet: bytes, kind: int, session: int, word: int, max_datagram: int
) -> SlidingSourcePacket | SlidingRepairPacket:
    size = len(packet)
    if kind == PacketType.SLIDING_SOURCE:
        if size < SLIDING_SOURCE_HEADER_BYTES:
            raise TruncatedPacket(f"sliding source packet of {size} bytes has no flow id")
        flow_word, seq = SOURCE_HEADER.unpack_from(packet)[4:]
        if flow_word & PREVIOUS_K_MASK:
            raise InvalidField(f"sliding source packet with reserved bits 0x{flow_word & PREVIOUS_K_MASK:02x} set")
        payload = size - SLIDING_SOURCE_HEADER_BYTES
        if payload > max_datagram:
            raise OversizePacket(f"source datagram of {payload} bytes exceeds the limit of {max_datagram}")
        return SlidingSourcePacket(
            session, word, flow_word >> FLOW_SHIFT, bytes(packet[SLIDING_SOURCE_HEADER_BYTES:]), seq
        )
    if size < SLIDING_REPAIR_HEADER_BYTES:
        raise TruncatedPacket(f"sliding repair packet of {size} bytes has no repair key, DT and NSS")
    repair_key, dt_nss = SLIDING_REPAIR_HEADER.unpack_from(packet)[4:]
    nss = dt_nss & NSS_MASK
    if nss == 0:
        raise InvalidField("sliding repair packet with NSS 0 (an empty encoding window)")
    symbol_size = size - SLIDING_REPAIR_HEADER_BYTES
    if symbol_size < SYMBOL_PREFIX_BYTES:
        raise TruncatedPacket(
            f"repair symbol of {symbol_size} bytes is shorter than its {SYMBOL_PREFIX_BYTES}-byte prefix"
        )
    if symbol_size > max_datagram + SYMBOL_PREFIX_BYTES:
        raise OversizePacket(
            f"repair symbol of {symbol_size} bytes exceeds the limit of {max_datagram + SYMBOL_PREFIX_BYTES}"
        )
    return SlidingRepairPacket(
        session, word, repair_key, dt_nss >> NSS_BITS, nss, bytes(packet[SLIDING_REPAIR_HEADER_BYTES:])
    )
