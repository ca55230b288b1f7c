"""Wire format: hex vectors (our own format, documented in docs/design.md) and validation."""

import pytest
from hypothesis import given
from hypothesis import strategies as st

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

# Test vectors of our own format; docs/design.md "Wire format" lists the same bytes.  The SBN (24 bits)
# and ESI (8 bits) are the FEC Payload ID of RFC 6865 §5.1 for m = 8, and the repair packet's k is
# its 16-bit "number of source symbols" field.  Version 3: the flow id is 24 bits, slot 0x0102 and
# generation 5 here, and the flow sequence number (16 bits) follows the flow word: 7 here.
SOURCE_VECTOR = bytes.fromhex("30 01 0a0b0c0d 000102 03 010205 10 0007") + b"wx"
# The repair packet protects a block of two datagrams, b"wx" on flow 0x010205 and b"abc" on flow
# 0x010206 (k=2, one repair packet, ESI 2), each the first of its flow (sequence 0): its symbol is
# computed with galois below.
REPAIR_SYMBOL = bytes.fromhex("0102000001 0000 4d56a5")
REPAIR_VECTOR = bytes.fromhex("31 00 0a0b0c0d fffffe 02 0002") + REPAIR_SYMBOL
FLOW = 0x0102 << 8 | 5


def test_source_vector_encodes_and_parses():
    assert wire.encode_source(0x0A0B0C0D, 0x000102, 3, FLOW, b"wx", end=True, previous_k=16, seq=7) == SOURCE_VECTOR
    assert parse(SOURCE_VECTOR, max_datagram=1400) == SourcePacket(0x0A0B0C0D, 0x102, 3, FLOW, True, b"wx", 16, 7)


def test_symbol_prefix_is_slot_generation_length_sequence():
    # RFC 6363 §4 / RFC 6865 §4 frame a source symbol as flow id ‖ length (2 bytes, big-endian) ‖
    # data; ours widens the flow id to 3 bytes (slot ‖ generation) and adds the flow sequence
    # number (2 bytes) after the length.
    assert wire.pack_symbol_prefix(FLOW, 0x0304, 0xBEEF) == bytes.fromhex("010205 0304 beef")
    assert wire.unpack_symbol_prefix(bytes.fromhex("010205 0304 beef ff")) == (FLOW, 0x0304, 0xBEEF)
    assert wire.SYMBOL_PREFIX_BYTES == 7


def test_the_encoder_stamps_each_flow_in_the_order_it_took_its_datagrams():
    from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings

    # Two size classes and two lanes: a flow's datagrams spread over four blocks, yet each
    # source packet and each source symbol says its place in the flow.
    encoder = BlockEncoder(EncoderSettings(block_size=4, repair=1, interleave=2, size_classes=(100,)), 1)
    other = 0x000300
    packets = []
    for i in range(12):
        packets += encoder.send(bytes(10 if i % 3 else 500), FLOW, 0.0)
        packets += encoder.send(b"o", other, 0.0)
    sources = [parse(p, max_datagram=1400) for p in packets if p[0] == wire.SOURCE_TYPE_BYTE]
    assert [p.seq for p in sources if p.flow == FLOW] == list(range(12))
    assert [p.seq for p in sources if p.flow == other] == list(range(12))
    # A new generation in the same slot is a new flow: it counts from 0 again.
    again = parse(encoder.send(b"n", FLOW + 1, 0.0)[0], max_datagram=1400)
    assert (again.flow, again.seq) == (FLOW + 1, 0)


def test_encode_source_refuses_a_sequence_number_wider_than_16_bits():
    with pytest.raises(ValueError):
        wire.encode_source(1, 0, 0, 0, b"", seq=1 << 16)


def test_encode_source_refuses_a_flow_id_wider_than_24_bits():
    with pytest.raises(ValueError):
        wire.encode_source(1, 0, 0, 1 << 24, b"")
    with pytest.raises(ValueError):
        wire.encode_source(1, 0, 0, 0, b"", previous_k=256)


def test_repair_vector_encodes_and_parses():
    assert wire.encode_repair(0x0A0B0C0D, 0xFFFFFE, 2, 2, REPAIR_SYMBOL) == REPAIR_VECTOR
    assert parse(REPAIR_VECTOR, max_datagram=1400) == RepairPacket(0x0A0B0C0D, 0xFFFFFE, 2, 2, REPAIR_SYMBOL)


def test_repair_vector_is_what_the_encoder_sends_and_galois_computes():
    # RFC 5510 §8.2 (GM = V_k⁻¹·V, V[i][j] = α^(i·j), α = 2 over GF(2^8) on 0x11D, §8.1) applied to
    # the source symbols slot ‖ generation ‖ length ‖ sequence ‖ data ‖ zeros; galois as the oracle.
    import galois
    import numpy as np

    from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings

    field = galois.GF(2**8, irreducible_poly=0x11D)
    vandermonde = field.Vandermonde(field.primitive_element, 2, 3)
    generator = np.linalg.inv(vandermonde[:, :2]) @ vandermonde
    sources = field(
        np.array(
            [list(bytes.fromhex("010205 0002 0000") + b"wx\0"), list(bytes.fromhex("010206 0003 0000") + b"abc")],
            dtype=np.uint8,
        )
    )
    assert np.asarray(generator[:, 2:].T @ sources, dtype=np.uint8).tobytes() == REPAIR_SYMBOL
    encoder = BlockEncoder(EncoderSettings(block_size=2, repair=1), 0x0A0B0C0D, first_sbn=0xFFFFFE)
    packets = encoder.send(b"wx", 0x010205, 0.0) + encoder.send(b"abc", 0x010206, 0.0)
    assert packets[2] == REPAIR_VECTOR


def test_header_sizes_are_documented_sizes():
    assert wire.SOURCE_HEADER_BYTES == 16
    assert wire.REPAIR_HEADER_BYTES == 12
    assert wire.VERSION == 3


@pytest.mark.parametrize(
    "data, error, fragment",
    [
        (b"", TruncatedPacket, "shorter than the 10-byte header"),
        (bytes.fromhex("30 00 00000001 000000"), TruncatedPacket, "shorter than the 10-byte header"),
        (bytes.fromhex("30 00 00000001 000000 00 000000 00 00"), TruncatedPacket, "no flow id"),
        (bytes.fromhex("10 00 00000001 000000 00 00 00"), UnsupportedPacket, "version 1"),
        (bytes.fromhex("20 00 00000001 000000 00 000000 00 0000"), UnsupportedPacket, "version 2"),
        (bytes.fromhex("35 00 00000001 000000 00 000000 00 0000"), UnsupportedPacket, "packet type 5"),
        (bytes.fromhex("30 02 00000001 000000 00 000000 00 0000"), UnsupportedPacket, "flags 0x02"),
        (bytes.fromhex("30 80 00000001 000000 00 000000 00 0000"), UnsupportedPacket, "flags 0x80"),
        (bytes.fromhex("30 00 00000001 000000 ff 000000 00 0000 00"), InvalidField, "source ESI 255"),
        (bytes.fromhex("31 00 00000001 000000 04 0000 00000000000000"), InvalidField, "k=0"),
        (bytes.fromhex("31 00 00000001 000000 04 0100 00000000000000"), InvalidField, "k=256"),
        (bytes.fromhex("31 00 00000001 000000 03 0004 00000000000000"), InvalidField, "repair ESI 3 with k=4"),
        (bytes.fromhex("31 00 00000001 000000 ff 0004 00000000000000"), InvalidField, "repair ESI 255"),
        (bytes.fromhex("31 01 00000001 000000 04 0004 00000000000000"), InvalidField, "repair packet with flags"),
        (bytes.fromhex("31 00 00000001 000000 04 00"), TruncatedPacket, "no k field"),
        (bytes.fromhex("31 00 00000001 000000 04 0004 000000000000"), TruncatedPacket, "7-byte prefix"),
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
    big_repair = wire.encode_repair(1, 0, 4, 4, bytes(108))
    with pytest.raises(OversizePacket):
        parse(big_repair, max_datagram=100)
    assert parse(wire.encode_repair(1, 0, 4, 4, bytes(107)), max_datagram=100).symbol == bytes(107)


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
    flow=st.integers(0, 2**24 - 1),
    data=st.binary(max_size=50),
    end=st.booleans(),
    seq=st.integers(0, 2**16 - 1),
)
def test_source_round_trip(session, sbn, esi, flow, data, end, seq):
    previous_k = flow % 256
    encoded = wire.encode_source(session, sbn, esi, flow, data, end=end, previous_k=previous_k, seq=seq)
    assert parse(encoded, max_datagram=50) == SourcePacket(session, sbn, esi, flow, end, data, previous_k, seq)
