"""Wire format: hex vectors (our own format, documented in DEVELOPERS.md) and validation."""

import pytest
from hypothesis import given, strategies as st

from fecproxy.protocol import wire
from fecproxy.protocol.wire import (
    InvalidField,
    OversizePacket,
    RepairPacket,
    SourcePacket,
    TruncatedPacket,
    UnsupportedPacket,
    parse,
)

# Test vectors of our own format; DEVELOPERS.md "Wire format" lists the same bytes.  The SBN (24 bits)
# and ESI (8 bits) are the FEC Payload ID of RFC 6865 §5.1 for m = 8, and the repair packet's k is
# its 16-bit "number of source symbols" field.
SOURCE_VECTOR = bytes.fromhex("10 01 0a0b0c0d 000102 03 05 10") + b"wx"
REPAIR_VECTOR = bytes.fromhex("11 00 0a0b0c0d fffffe 06 0004") + bytes.fromhex("1516177f")


def test_source_vector_encodes_and_parses():
    assert wire.encode_source(0x0A0B0C0D, 0x000102, 3, 5, b"wx", end=True, previous_k=16) == SOURCE_VECTOR
    assert parse(SOURCE_VECTOR, max_datagram=1400) == SourcePacket(0x0A0B0C0D, 0x102, 3, 5, True, b"wx", 16)


def test_repair_vector_encodes_and_parses():
    symbol = bytes.fromhex("1516177f")
    assert wire.encode_repair(0x0A0B0C0D, 0xFFFFFE, 6, 4, symbol) == REPAIR_VECTOR
    assert parse(REPAIR_VECTOR, max_datagram=1400) == RepairPacket(0x0A0B0C0D, 0xFFFFFE, 6, 4, symbol)


def test_header_sizes_are_documented_sizes():
    assert wire.SOURCE_HEADER_BYTES == 12
    assert wire.REPAIR_HEADER_BYTES == 12


@pytest.mark.parametrize(
    "data, error, fragment",
    [
        (b"", TruncatedPacket, "shorter than the 10-byte header"),
        (bytes.fromhex("10 00 00000001 000000"), TruncatedPacket, "shorter than the 10-byte header"),
        (bytes.fromhex("10 00 00000001 000000 00 00"), TruncatedPacket, "no flow id"),
        (bytes.fromhex("20 00 00000001 000000 00 00"), UnsupportedPacket, "version 2"),
        (bytes.fromhex("15 00 00000001 000000 00 00"), UnsupportedPacket, "packet type 5"),
        (bytes.fromhex("10 02 00000001 000000 00 00"), UnsupportedPacket, "flags 0x02"),
        (bytes.fromhex("10 80 00000001 000000 00 00"), UnsupportedPacket, "flags 0x80"),
        (bytes.fromhex("10 00 00000001 000000 ff 00 00"), InvalidField, "source ESI 255"),
        (bytes.fromhex("11 00 00000001 000000 04 0000 000000"), InvalidField, "k=0"),
        (bytes.fromhex("11 00 00000001 000000 04 0100 000000"), InvalidField, "k=256"),
        (bytes.fromhex("11 00 00000001 000000 03 0004 000000"), InvalidField, "repair ESI 3 with k=4"),
        (bytes.fromhex("11 00 00000001 000000 ff 0004 000000"), InvalidField, "repair ESI 255"),
        (bytes.fromhex("11 01 00000001 000000 04 0004 000000"), InvalidField, "repair packet with flags"),
        (bytes.fromhex("11 00 00000001 000000 04 00"), TruncatedPacket, "no k field"),
        (bytes.fromhex("11 00 00000001 000000 04 0004 0000"), TruncatedPacket, "3-byte prefix"),
    ],
)
def test_malformed_packets_raise_typed_errors(data, error, fragment):
    with pytest.raises(error, match=fragment) as info:
        parse(data, max_datagram=1400)
    assert info.value.reason in {"malformed", "unsupported"}


def test_oversize_source_and_repair_are_refused_before_use():
    big_source = wire.encode_source(1, 0, 0, 0, bytes(101))
    with pytest.raises(OversizePacket) as info:
        parse(big_source, max_datagram=100)
    assert info.value.reason == "oversize"
    big_repair = wire.encode_repair(1, 0, 4, 4, bytes(104))
    with pytest.raises(OversizePacket):
        parse(big_repair, max_datagram=100)
    assert parse(wire.encode_repair(1, 0, 4, 4, bytes(103)), max_datagram=100).symbol == bytes(103)


def test_encode_repair_refuses_impossible_indices():
    with pytest.raises(ValueError):
        wire.encode_repair(1, 0, 3, 4, b"abc")


@given(st.binary(max_size=64))
def test_parse_never_raises_anything_but_packet_error(data):
    try:
        parse(data, max_datagram=32)
    except wire.PacketError:
        pass


@given(
    session=st.integers(0, 2**32 - 1),
    sbn=st.integers(0, 2**24 - 1),
    esi=st.integers(0, 254),
    flow=st.integers(0, 255),
    data=st.binary(max_size=50),
    end=st.booleans(),
)
def test_source_round_trip(session, sbn, esi, flow, data, end):
    encoded = wire.encode_source(session, sbn, esi, flow, data, end=end)
    assert parse(encoded, max_datagram=50) == SourcePacket(session, sbn, esi, flow, end, data)
