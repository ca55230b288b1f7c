"""Loss counted by what never came (protocol.loss_ledger), sans-IO with a fake clock: a source
packet overtaken by its block's repair is late, not lost; a run of whole blocks lost in an outage
is counted from the block numbers and the peer's block size."""

from __future__ import annotations

import random

import pytest

from fecproxy.protocol import wire
from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import BlockReport, Delivery, Dropped, HoldTooShort
from fecproxy.protocol.loss_ledger import REORDER_TOLERANCE

HOLD = 0.5
SETTLED = REORDER_TOLERANCE * HOLD + 0.01  # after this, every loss is final


def stream(count: int, k: int = 16, m: int = 4, seed: int = 1) -> tuple[list[bytes], list[bytes]]:
    """(datagrams, link packets) of ``count`` datagrams in full blocks, in link order."""
    rng = random.Random(seed)
    encoder = BlockEncoder(EncoderSettings(block_size=k, repair=m), session=7)
    datagrams, packets = [], []
    for i in range(count):
        data = rng.randbytes(rng.randint(1, 60))
        datagrams.append(data)
        packets += encoder.send(data, 1, i * 1e-3)
    return datagrams, packets + encoder.close()


def run(decoder: BlockDecoder, packets: list[bytes], start: float = 0.0, step: float = 1e-3) -> list:
    events = []
    for i, packet in enumerate(packets):
        events += decoder.receive(packet, None, start + i * step)
    return events


def test_a_reordering_loss_free_link_counts_no_loss_though_repair_overtakes_sources():
    datagrams, packets = stream(160)
    # Every block's repair packets overtake its last two source packets (the ±2 ms jitter case).
    reordered = []
    for b in range(10):
        block = packets[b * 20 : (b + 1) * 20]
        sources, repairs = block[:16], block[16:]
        reordered += sources[:14] + repairs + sources[14:]
    decoder = BlockDecoder(DecoderSettings(hold_time=HOLD))
    events = run(decoder, reordered)
    delivered = [e.data for e in events if isinstance(e, Delivery)]
    assert sorted(delivered) == sorted(datagrams)  # each exactly once: rebuilt, late copy dropped
    assert [e.reason for e in events if isinstance(e, Dropped)] == ["late"] * 20
    settled = decoder.on_timer(1.0 + SETTLED)
    assert decoder.stats.lost == 0 and decoder.stats.unrecovered == 0
    reports = [e for e in events + settled if isinstance(e, BlockReport)]
    assert len(reports) == 10 and all(r.lost == 0 and r.recovered == 0 for r in reports)


def test_a_straggler_of_a_block_given_up_is_still_delivered_but_beyond_the_tolerance_counted_lost():
    datagrams, packets = stream(16, m=0)
    decoder = BlockDecoder(DecoderSettings(hold_time=HOLD))
    run(decoder, packets[:14] + packets[15:16])  # the last one (END) tells k = 16
    decoder.on_timer(HOLD + 0.1)  # given up: one datagram missing, one hold time after its start
    events = decoder.receive(packets[14], None, HOLD + 0.2)
    assert [e.data for e in events if isinstance(e, Delivery)] == [datagrams[14]]
    decoder.on_timer(1.0 + SETTLED)
    assert (decoder.stats.lost, decoder.stats.unrecovered) == (1, 1)  # later than the stated tolerance


def test_an_outage_counts_the_whole_blocks_it_swallowed_from_the_block_numbers():
    # 100 blocks of 16; blocks 10..89 vanish (an outage of 1 280 datagrams), plus block 90's
    # first 3 datagrams: 1 283 datagrams really lost.
    datagrams, packets = stream(1600, m=4)
    kept = packets[: 10 * 20] + packets[90 * 20 + 3 :]
    decoder = BlockDecoder(DecoderSettings(hold_time=HOLD))
    events = run(decoder, kept, step=1e-4)
    events += decoder.on_timer(10.0)
    events += decoder.on_timer(20.0)
    delivered = [e.data for e in events if isinstance(e, Delivery)]
    assert len(delivered) == 1600 - 80 * 16  # block 90 rebuilt its 3 from repair
    assert decoder.stats.lost == 80 * 16 + 3
    assert decoder.stats.unrecovered == 80 * 16


def test_a_block_of_a_gap_that_shows_up_late_counts_as_itself():
    datagrams, packets = stream(64, m=4)
    blocks = [packets[b * 20 : (b + 1) * 20] for b in range(4)]
    decoder = BlockDecoder(DecoderSettings(hold_time=HOLD))
    events = run(decoder, blocks[0] + blocks[3] + blocks[1] + blocks[2])  # 1 and 2 reordered
    events += decoder.on_timer(10.0)
    assert len([e for e in events if isinstance(e, Delivery)]) == 64
    assert decoder.stats.lost == 0 and decoder.stats.unrecovered == 0


def test_a_forged_far_jump_is_not_counted_as_an_outage():
    _, packets = stream(32, m=4)
    decoder = BlockDecoder(DecoderSettings(hold_time=HOLD))
    run(decoder, packets[:20])
    far = wire.encode_source(7, 5_000_000, 0, 1, b"far")
    decoder.receive(far, None, 0.1)
    decoder.on_timer(10.0)
    assert decoder.stats.lost < 32


def test_repair_after_a_block_was_given_up_says_hold_is_too_short_once_a_minute():
    # The peer flushes at 600 ms (the shipped sender configs); this receiver holds 500 ms.
    encoder = BlockEncoder(EncoderSettings(block_size=16, repair=4, flush_interval=0.6), session=7)
    decoder = BlockDecoder(DecoderSettings(hold_time=HOLD))
    warnings = []
    for block in range(3):
        start = block * 2.0
        first = encoder.send(b"reading", 1, start)
        events = decoder.receive(first[0], None, start)
        events += decoder.receive(encoder.send(b"second", 1, start + 0.01)[0], None, start + 0.01)
        events += decoder.on_timer(start + HOLD + 0.01)  # given up before its repair
        for repair in encoder.on_timer(start + 0.6):
            events += decoder.receive(repair, None, start + 0.61)
        warnings += [e for e in events if isinstance(e, HoldTooShort)]
    assert len(warnings) == 1  # rate-limited
    assert warnings[0].hold == HOLD and warnings[0].waited == pytest.approx(0.61)


def test_an_oversize_datagram_is_a_rate_limited_notice():
    big = wire.encode_source(7, 0, 0, 1, bytes(1500))
    decoder = BlockDecoder(DecoderSettings(hold_time=HOLD, max_datagram=1400))
    drops = [e for i in range(5) for e in decoder.receive(big, None, i * 1.0) if isinstance(e, Dropped)]
    assert [d.reason for d in drops] == ["oversize"] * 5
    assert [d.notice is not None for d in drops] == [True, False, False, False, False]
