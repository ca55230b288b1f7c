"""BlockEncoder.send_batch against send(), driven with a fake clock: no sockets, no sleeps.

send_batch shares one codec call among the blocks a batch fills; the packets must be the very
bytes, in the very order, that one send() per datagram gives.  Repair bytes are also checked
against the field arithmetic of the `galois` library (RFC 5510 §8.2 generator), which this
project did not write.
"""

import random
import struct

import galois
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.coding import codec as codec_module
from fecproxy.protocol import encoder as encoder_module
from fecproxy.protocol import wire
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import Delivery

SESSION = 0x5EA7_0001


def weather_station_batches(rng, count, max_size):
    """Demo traffic of our own: a hill-top station's telemetry records and camera-still slices,
    arriving in read batches of varying length from a few client ports (flows)."""
    batches = []
    for _ in range(count):
        batch = []
        for _ in range(rng.randint(0, 70)):
            size = rng.choice([0, 1, rng.randint(2, 80), rng.randint(81, max_size), max_size])
            batch.append((rng.randbytes(size), rng.choice([0, 1, 7, 255, 0x0100FF, 0xFFFFFF])))
        batches.append(batch)
    return batches


def run_both(settings_, batches, *, first_sbn=0):
    one_by_one = BlockEncoder(settings_, SESSION, first_sbn=first_sbn)
    batched = BlockEncoder(settings_, SESSION, first_sbn=first_sbn)
    expected, got = [], []
    for position, batch in enumerate(batches):
        now = 0.004 * position
        for datagram, flow in batch:
            expected += one_by_one.send(datagram, flow, now)
        got += batched.send_batch(batch, now)
        assert one_by_one.next_deadline() == batched.next_deadline()
    expected += one_by_one.close()
    got += batched.close()
    return one_by_one, batched, expected, got


@pytest.mark.parametrize("k, m", [(16, 4), (1, 1), (3, 0), (5, 5), (20, 7), (200, 55)])
def test_batch_gives_the_bytes_and_order_of_one_send_per_datagram(k, m):
    rng = random.Random(k * 1000 + m)
    settings_ = EncoderSettings(block_size=k, repair=m, flush_interval=0.01, max_datagram=300)
    batches = weather_station_batches(rng, 12 if k < 200 else 30, settings_.max_datagram)
    one_by_one, batched, expected, got = run_both(settings_, batches, first_sbn=wire.SBN_MODULUS - 3)
    assert got == expected
    assert batched.stats == one_by_one.stats
    assert batched.sbn == one_by_one.sbn


def test_many_full_blocks_in_one_batch_span_several_codec_calls(monkeypatch):
    """More blocks than one codec call takes (MAX_BLOCKS_PER_ENCODE), and wide symbols that hit
    the byte bound: still the same packets, and the calls are really shared."""
    calls = []
    original = codec_module.BlockCode.encode

    def counting(self, source):
        calls.append(source.shape)
        return original(self, source)

    monkeypatch.setattr(codec_module.BlockCode, "encode", counting)
    rng = random.Random(5)
    k, m = 4, 2
    blocks = 3 * encoder_module.MAX_BLOCKS_PER_ENCODE + 1
    for max_datagram in (1400, 9000):
        settings_ = EncoderSettings(block_size=k, repair=m, max_datagram=max_datagram)
        batch = [(rng.randbytes(rng.randint(0, max_datagram)), 3) for _ in range(blocks * k + 2)]
        calls.clear()
        _, _, expected, got = run_both(settings_, [batch])
        sent_one_by_one = blocks + 1  # one call per block plus the flushed short block
        assert got == expected
        batch_calls = len(calls) - sent_one_by_one
        assert batch_calls < blocks
        shared = calls[sent_one_by_one:-1]  # the batch's calls (the last one is the flush)
        widest = max(width for _, width in shared)
        assert k * widest <= encoder_module.MAX_BYTES_PER_ENCODE + k * 8 * encoder_module.MAX_BLOCKS_PER_ENCODE


def test_repair_of_a_batched_block_matches_galois():
    # RFC 5510 §8.2: repair symbol j = Σ_i GM[i][j]·s_i with GM = V_k⁻¹·V, V[i][j] = α^(i·j) over
    # GF(2^8) built on 0x11D (§8.1); galois.GF(2**8, irreducible_poly=0x11D) as oracle.
    field = galois.GF(2**8, irreducible_poly=0x11D)
    k, m, n = 4, 3, 7
    alpha = field.primitive_element
    vandermonde = field([[alpha ** (i * j) for j in range(n)] for i in range(k)])
    generator = np.linalg.inv(vandermonde[:, :k]) @ vandermonde
    rng = random.Random(11)
    enc = BlockEncoder(
        EncoderSettings(block_size=k, repair=m, max_datagram=40, allow_repair_above_source=True), SESSION
    )
    batch = [(rng.randbytes(rng.randint(0, 40)), rng.randint(0, 2**24 - 1)) for _ in range(3 * k)]
    packets = enc.send_batch(batch, 0.0)
    assert len(packets) == 3 * (k + m)
    counts: dict[int, int] = {}
    sequence_of = []  # each flow's datagrams counted from 0
    for _, flow in batch:
        sequence_of.append(counts.get(flow, 0))
        counts[flow] = sequence_of[-1] + 1
    for block in range(3):
        items = batch[block * k : (block + 1) * k]
        length = 7 + max(len(data) for data, _ in items)
        # RFC 6363 §4: flow id ‖ length (2 bytes, big-endian) ‖ data ‖ zero padding; our flow id
        # is 3 bytes (slot ‖ generation) and our flow sequence number (2 bytes) follows the length
        # (wire version 3).
        symbols = field(
            np.array(
                [
                    list(
                        flow.to_bytes(3, "big")
                        + len(data).to_bytes(2, "big")
                        + sequence_of[block * k + row].to_bytes(2, "big")
                        + data
                        + bytes(length - 7 - len(data))
                    )
                    for row, (data, flow) in enumerate(items)
                ],
                dtype=np.uint8,
            )
        )
        expected = generator[:, k:].T @ symbols
        repairs = packets[block * (k + m) + k : (block + 1) * (k + m)]
        for j, data in enumerate(repairs):
            parsed = wire.parse(data, max_datagram=40)
            assert (parsed.sbn, parsed.esi, parsed.k) == (block, k + j, k)
            assert parsed.symbol == np.asarray(expected[j], dtype=np.uint8).tobytes()


def test_oversize_datagrams_in_a_batch_are_counted_and_skipped():
    settings_ = EncoderSettings(block_size=4, repair=2, max_datagram=10)
    enc = BlockEncoder(settings_, SESSION)
    ref = BlockEncoder(settings_, SESSION)
    batch = [(b"a" * 10, 1), (b"b" * 11, 1), (b"c", 2), (b"d" * 500, 2), (b"e", 1), (b"f", 1)]
    got = enc.send_batch(batch, 0.0)
    expected = []
    for data, flow in batch:
        if len(data) <= 10:
            expected += ref.send(data, flow, 0.0)
    assert got == expected
    assert enc.stats.dropped == {"oversize": 2}
    assert enc.stats.source_packets == 4 and enc.stats.blocks == 1


def test_update_during_a_batch_applies_from_the_next_block():
    old = EncoderSettings(block_size=4, repair=1, max_datagram=64)
    new = EncoderSettings(block_size=2, repair=2, max_datagram=32)
    rng = random.Random(2)
    first = [(rng.randbytes(20), 0) for _ in range(2)]
    second = [(rng.randbytes(rng.randint(0, 30)), 0) for _ in range(9)]
    one_by_one, batched = BlockEncoder(old, SESSION), BlockEncoder(old, SESSION)
    expected, got = [], []
    for enc, out, sender in ((one_by_one, expected, "send"), (batched, got, "batch")):
        for data, flow in first:
            out += enc.send(data, flow, 0.0)
        enc.update(new)  # the open block keeps k=4, m=1; later blocks are k=2, m=2
        if sender == "send":
            for data, flow in second:
                out += enc.send(data, flow, 0.1)
        else:
            out += enc.send_batch(second, 0.1)
        out += enc.close()
    assert got == expected
    assert [wire.parse(p, max_datagram=64).k for p in got if p[0] & 0x0F == wire.PacketType.REPAIR][:3] == [4, 2, 2]


def test_timer_closes_a_short_block_left_open_by_a_batch():
    settings_ = EncoderSettings(block_size=8, repair=4, flush_interval=0.02)
    enc, ref = BlockEncoder(settings_, SESSION), BlockEncoder(settings_, SESSION)
    batch = [(bytes([i]) * 30, 0) for i in range(11)]  # one full block and 3 datagrams
    got = enc.send_batch(batch, 1.0)
    expected = [p for data, flow in batch for p in ref.send(data, flow, 1.0)]
    assert got == expected
    assert enc.next_deadline() == pytest.approx(1.02)
    assert enc.on_timer(1.01) == [] and enc.on_timer(1.02) == ref.on_timer(1.02)
    assert enc.next_deadline() is None


@settings(max_examples=25, deadline=None)
@given(
    k=st.integers(1, 12),
    m=st.integers(0, 12),
    seed=st.integers(0, 2**16),
    drop_seed=st.integers(0, 2**16),
)
def test_decoder_rebuilds_every_batched_block_that_lost_at_most_m(k, m, seed, drop_seed):
    rng = random.Random(seed)
    # Repair above source is allowed here: this checks recovery, not the RFC 6363 §8.2 byte cap.
    settings_ = EncoderSettings(block_size=k, repair=m, max_datagram=120, allow_repair_above_source=True)
    enc = BlockEncoder(settings_, SESSION)
    sent = [(rng.randbytes(rng.randint(0, 120)), rng.randint(0, 255)) for _ in range(5 * k)]
    packets = enc.send_batch(sent[: 2 * k + 1], 0.0) + enc.send_batch(sent[2 * k + 1 :], 0.001)
    n = k + m
    assert len(packets) == 5 * n
    drops = random.Random(drop_seed)
    kept = []
    for block in range(5):
        lost = set(drops.sample(range(n), drops.randint(0, m)))
        kept += [p for i, p in enumerate(packets[block * n : (block + 1) * n]) if i not in lost]
    dec = BlockDecoder()
    events = [event for p in kept for event in dec.receive(p, None, 0.002)]
    delivered = sorted((e.flow, e.data) for e in events if isinstance(e, Delivery))
    assert delivered == sorted((flow, data) for data, flow in sent)
    assert dec.stats.unrecovered == 0


def test_a_bad_item_midway_raises_and_leaves_the_block_consistent():
    """A flow id outside 24 bits is a caller bug: the batch raises, but the datagrams already
    copied in stay counted, so the block's repair still matches and the decoder rebuilds them."""
    enc = BlockEncoder(EncoderSettings(block_size=4, repair=2), SESSION)
    with pytest.raises(struct.error):
        enc.send_batch([(b"first", 1), (b"second!", 1), (b"bad flow", 1 << 24)], 0.0)
    packets = enc.send_batch([(b"third", 2), (b"4th", 2)], 0.001)
    assert len(packets) == 2 + 2  # two sources, then the block's two repair packets
    dec = BlockDecoder()
    events = [event for p in packets for event in dec.receive(p, None, 0.002)]
    delivered = sorted((e.flow, e.data) for e in events if isinstance(e, Delivery))
    assert delivered == sorted([(1, b"first"), (1, b"second!"), (2, b"third"), (2, b"4th")])
    assert enc.next_deadline() is None
