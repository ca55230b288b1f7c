"""Control packets (type 2) through the protocol core: the encoder builds them, the decoder hands
their body to the shell as ``ControlReceived`` without touching its sender-session state.

The bytes are our own format (docs/design.md "Loss reports (control packets)")."""

from __future__ import annotations

import pytest
from support.decoding import receive_noting_peer

from fecproxy.protocol import wire
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import ControlReceived, Dropped, DropReason
from fecproxy.protocol.loss_report import LossReport, encode_report, parse_report

REPORT = LossReport(
    epoch=0xFFFFFFFF, sequence=1, interval_ms=250, source_received=0, repair_received=0, source_lost=0, unrecovered=0
)


def test_control_packet_bytes():
    encoder = BlockEncoder(EncoderSettings(), 0x0A0B0C0D)
    body = encode_report(REPORT)
    # version 2 | type 2, no flags, session, SBN 0 and ESI 0, then the body.
    assert encoder.control(body) == bytes.fromhex("32 00 0a0b0c0d 000000 00") + body


def test_decoder_hands_control_bodies_on_and_keeps_its_session():
    sender = BlockEncoder(EncoderSettings(block_size=2, repair=1), 0x1111)
    decoder = BlockDecoder()
    for packet in sender.send(b"a", 0, 0.0):
        decoder.receive(packet, None, 0.0)
    assert decoder.session == 0x1111
    report = BlockEncoder(EncoderSettings(), 0x2222).control(encode_report(REPORT))
    events, in_session = receive_noting_peer(decoder, report, 0.1)
    assert events == [ControlReceived(0x2222, encode_report(REPORT))] and not in_session
    assert parse_report(events[0].body) == REPORT
    assert (decoder.sessions, decoder.session, decoder.stats.control_received) == ((0x1111,), 0x1111, 1)
    assert decoder.stats.source_received == 1 and not decoder.stats.dropped


@pytest.mark.parametrize(
    "packet",
    [
        bytes.fromhex("32 01 0a0b0c0d 000000 00") + b"x",  # a flag on a control packet
        bytes.fromhex("32 00 0a0b0c0d 000001 00") + b"x",  # a block number
        bytes.fromhex("32 00 0a0b0c0d 000000 05") + b"x",  # an ESI
    ],
)
def test_control_header_fields_are_checked(packet):
    events, in_session = receive_noting_peer(BlockDecoder(), packet, 0.0)
    assert [type(e) for e in events] == [Dropped] and events[0].reason == DropReason.MALFORMED and not in_session


def test_encoder_counts_what_the_adaptation_needs():
    encoder = BlockEncoder(EncoderSettings(block_size=2, repair=1), 1)
    encoder.send(b"abc", 0, 0.0)
    encoder.send_batch([(b"a" * 10, 0), (b"b", 1)], 0.0)
    assert encoder.stats.datagram_bytes == 14
    assert encoder.stats.source_bytes == 14 + 3 * wire.SOURCE_HEADER_BYTES
    # Blocks closed: [abc, a*10]; the open block [b] is not counted until it closes.
    assert encoder.take_longest_datagram() == 10
    assert encoder.take_longest_datagram() == 0
    encoder.close()
    assert encoder.take_longest_datagram() == 1
