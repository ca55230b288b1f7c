"""The peer's code as the receiver sees it in repair packets (fecproxy.protocol.received_code),
and through a decoder fed by a real encoder."""

from __future__ import annotations

from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.received_code import CODE_WINDOW_BLOCKS, ReceivedCode
from fecproxy.protocol.wire import SBN_MODULUS


def test_unknown_until_a_repair_packet():
    code = ReceivedCode()
    assert (code.k, code.m) == (None, None)


def test_m_is_the_highest_repair_esi_of_the_block_minus_k_plus_one():
    code = ReceivedCode()
    for esi in (16, 19, 17):  # repair ESIs k..k+m-1 (RFC 5052 §9.2: ESIs k.. name repair symbols)
        code.note(sbn=5, k=16, esi=esi)
    assert (code.k, code.m) == (16, 4)


def test_short_blocks_among_full_ones_do_not_flicker_the_figure():
    code = ReceivedCode()
    code.note(1, 16, 19)
    code.note(2, 3, 3)  # a block the peer's flush timer closed with k'=3, m'=1
    assert (code.k, code.m) == (16, 4)
    code.note(3, 16, 17)  # a full block whose last repair packets were lost (or are still coming)
    assert (code.k, code.m) == (16, 4)


def test_a_smaller_code_is_taken_once_the_larger_figure_is_old():
    code = ReceivedCode()
    code.note(1, 16, 19)
    code.note(1 + CODE_WINDOW_BLOCKS + 1, 8, 9)  # the peer lowered k
    assert (code.k, code.m) == (8, 2)
    code.note(1 + 2 * CODE_WINDOW_BLOCKS + 2, 8, 8)  # ... and later m
    assert (code.k, code.m) == (8, 1)


def test_late_blocks_and_wraparound():
    code = ReceivedCode()
    code.note(SBN_MODULUS - 1, 16, 19)
    code.note(SBN_MODULUS - 2, 4, 4)  # older block, late
    assert (code.k, code.m) == (16, 4)
    code.note(0, 16, 20)  # the next block after the wrap, with one more repair packet
    assert (code.k, code.m) == (16, 5)


def test_decoder_reports_the_encoders_code():
    encoder = BlockEncoder(EncoderSettings(block_size=8, repair=3, flush_interval=10.0), session=7)
    decoder = BlockDecoder()
    packets = encoder.send_batch([(bytes([i]) * 20, 0) for i in range(8)], 0.0)
    for packet in packets:
        decoder.receive(packet, None, 0.0)
    assert (decoder.received_code.k, decoder.received_code.m) == (8, 3)


def test_settled_is_the_figure_once_a_later_block_began():
    code = ReceivedCode()
    code.note(1, 16, 16)
    assert code.settled is None  # block 1 may have more repair packets to come
    code.note(1, 16, 19)
    code.note(2, 16, 16)
    assert code.settled == (16, 4) and (code.k, code.m) == (16, 4)
    code.reset()
    assert code.settled is None


def test_the_configured_code_is_the_largest_full_blocks_and_short_blocks_say_so():
    from fecproxy.protocol.received_code import ReceivedCode

    code = ReceivedCode()
    # A peer configured 16/8 at telemetry rate: every block closed short (k'=2, m'=1).
    for sbn in range(5):
        code.note(sbn, 2, 2)
    assert code.configured is None and code.k == 2  # "short blocks only so far"
    code.note_full(5, 16)  # END flag on ESI 15
    for esi in range(16, 24):
        code.note(5, 16, esi)
    assert code.configured == (16, 8)
    for sbn in range(6, 20):  # short blocks again: the configured figure stays
        code.note(sbn, 1, 1)
    assert code.configured == (16, 8)
    code.note_full(20, 16)
    code.note(20, 16, 17)  # a full block whose last repair packets were lost shows m ≥ 2 only
    assert code.configured == (16, 8)
