"""Interleaving, size classes and the RFC 6363 §8.2 byte cap, encoder and decoder driven with a
fake clock: no sockets, no sleeps.  Traffic is demo data of our own: a hill-top weather
station's 18–24-byte telemetry records mixed with 1150–1200-byte camera-still slices."""

import itertools
import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.protocol import wire
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings, repair_byte_cap, size_class_names
from fecproxy.protocol.events import Delivery

SESSION = 0x0F0E_0D0C


def stream(rng, count, sizes=(1200, 1200)):
    return [(rng.randbytes(rng.randint(*sizes)), rng.randint(0, 255)) for _ in range(count)]


def send_all(enc, items, *, step=0.0001):
    packets = []
    for i, (data, flow) in enumerate(items):
        packets += enc.send(data, flow, step * i)
    return packets + enc.close()


def decode(packets, now=1.0):
    dec = BlockDecoder()
    events = [e for p in packets for e in dec.receive(p, None, now)]
    events += dec.close()
    return dec, sorted((e.flow, e.data) for e in events if isinstance(e, Delivery))


def is_source(packet):
    return packet[0] & 0x0F == wire.PacketType.SOURCE


@pytest.mark.parametrize("depth, recovered", [(1, False), (4, True)])
def test_a_burst_of_d_times_m_packets_costs_each_block_at_most_m(depth, recovered):
    # D·m = 16 consecutive link packets lost: with D = 4 each block loses 4 = m and is rebuilt;
    # with D = 1 one block loses 16 > m.
    k, m = 16, 4
    items = stream(random.Random(depth), 4 * k * depth)
    packets = send_all(BlockEncoder(EncoderSettings(block_size=k, repair=m, interleave=depth), SESSION), items)
    start = 12  # inside the first blocks' source run
    kept = packets[:start] + packets[start + 4 * m :]
    dec, got = decode(kept)
    assert (got == sorted((f, d) for d, f in items)) is recovered
    assert (dec.stats.unrecovered == 0) is recovered


def test_interleaved_source_packets_leave_at_once_and_blocks_take_turns():
    k, depth = 4, 3
    enc = BlockEncoder(EncoderSettings(block_size=k, repair=1, interleave=depth), SESSION)
    sbns = []
    for i in range(depth * k):
        out = enc.send(bytes([i]) * 100, 1, 0.0)
        assert is_source(out[0])  # every datagram's source packet comes out of its own call
        sbns.append(wire.parse(out[0], max_datagram=1400).sbn)
    assert sbns == [i % depth for i in range(depth * k)]
    assert enc.next_deadline() is None  # all three blocks filled and closed


def test_each_open_block_keeps_its_own_flush_deadline():
    enc = BlockEncoder(EncoderSettings(block_size=8, repair=2, interleave=2, flush_interval=0.02), SESSION)
    enc.send(b"a" * 50, 1, 1.000)  # lane 0 opens: deadline 1.020
    enc.send(b"b" * 50, 1, 1.010)  # lane 1 opens: deadline 1.030
    assert enc.next_deadline() == pytest.approx(1.02)
    # Block 0 closes at 1.020, but its repair waits for the other block of its round, then the
    # two blocks' repair packets go interleaved.
    assert enc.on_timer(1.02) == [] and enc.stats.short_blocks == 1
    assert enc.next_deadline() == pytest.approx(1.03)
    assert [wire.parse(p, max_datagram=1400).sbn for p in enc.on_timer(1.03)] == [0, 1]
    assert enc.stats.short_blocks == 2


def test_repair_of_a_round_sits_d_packets_apart_like_its_sources():
    # Steady traffic: every block's packets, source and repair, are exactly D link positions
    # apart, the layout the planner models with the D-step transition matrix.
    k, m, depth = 6, 3, 4
    enc = BlockEncoder(EncoderSettings(block_size=k, repair=m, interleave=depth), SESSION)
    packets = send_all(enc, stream(random.Random(3), 3 * k * depth, (100, 100)))
    positions: dict[int, list[int]] = {}
    for i, p in enumerate(packets):
        positions.setdefault(wire.parse(p, max_datagram=1400).sbn, []).append(i)
    for where in positions.values():
        assert len(where) == k + m
        assert {b - a for a, b in itertools.pairwise(where)} == {depth}


def test_previous_k_tells_a_whole_lost_block_to_the_receiver_with_interleaving():
    # A block lost whole (all its source and repair packets) is still counted as lost: a later
    # packet of block SBN + 1 sent after it closed carries its k.
    k, depth = 4, 2
    items = stream(random.Random(5), 4 * k * depth, (100, 100))
    packets = send_all(BlockEncoder(EncoderSettings(block_size=k, repair=1, interleave=depth), SESSION), items)
    kept = [p for p in packets if wire.parse(p, max_datagram=1400).sbn != 2]
    dec, got = decode(kept)
    assert len(got) == len(items) - k
    assert dec.stats.lost == k and dec.stats.unrecovered == k


def test_previous_k_is_zero_until_block_sbn_minus_1_closed():
    enc = BlockEncoder(EncoderSettings(block_size=2, repair=1, interleave=2), SESSION)
    seen = []
    for _ in range(8):
        out = enc.send(b"x" * 30, 1, 0.0)
        seen.append((wire.parse(out[0], max_datagram=1400).sbn, wire.parse(out[0], max_datagram=1400).previous_k))
    # SBN 1 opens while SBN 0 is open (0); SBN 0 closes at datagram 2, so SBN 1's last packet says 2.
    assert seen == [(0, 0), (1, 0), (0, 0), (1, 2), (2, 2), (3, 0), (2, 2), (3, 2)]


def test_small_datagrams_are_never_padded_to_large_ones():
    enc = BlockEncoder(EncoderSettings(block_size=4, repair=1, size_classes=(256,)), SESSION)
    packets = []
    for _ in range(4):
        packets += enc.send(b"t" * 20, 1, 0.0)
        packets += enc.send(b"i" * 1200, 2, 0.0)
    repairs = [wire.parse(p, max_datagram=1400) for p in packets if not is_source(p)]
    assert sorted(len(r.symbol) for r in repairs) == [20 + wire.SYMBOL_PREFIX_BYTES, 1200 + wire.SYMBOL_PREFIX_BYTES]
    assert set(enc.stats.classes) == {"le256", "gt256"}


def test_mixed_traffic_byte_overhead_per_class_is_close_to_m_over_k():
    # Each class's repair/source byte ratio lies within the bounds its datagram sizes allow:
    # (m/k)·(R + P + min)/(S + max) ≤ ratio ≤ (m/k)·(R + P + max)/(S + min), R and S the repair
    # and source header bytes, P the symbol prefix (a repair symbol is as long as the block's
    # longest datagram plus the prefix).  For telemetry (18–24 bytes) that is 0.25·[0.92, 1.30].
    k, m = 16, 4
    rng = random.Random(9)
    items = []
    for _ in range(k * 40):
        items.append((rng.randbytes(rng.randint(18, 24)), 1))
        if rng.random() < 0.5:
            items.append((rng.randbytes(rng.randint(1150, 1200)), 2))
    enc = BlockEncoder(EncoderSettings(block_size=k, repair=m), SESSION)
    send_all(enc, items)
    head_r, head_s, prefix = wire.REPAIR_HEADER_BYTES, wire.SOURCE_HEADER_BYTES, wire.SYMBOL_PREFIX_BYTES
    for name, (low, high) in {"le256": (18, 24), "gt256": (1150, 1200)}.items():
        stats = enc.stats.classes[name]
        ratio = stats.repair_bytes / stats.source_bytes
        assert (
            m / k * (head_r + prefix + low) / (head_s + high)
            <= ratio
            <= m / k * (head_r + prefix + high) / (head_s + low)
        )
    # One class for all: the telemetry blocks would pay for image-sized repair symbols.
    single = BlockEncoder(
        EncoderSettings(block_size=k, repair=m, size_classes=(), allow_repair_above_source=True), SESSION
    )
    send_all(single, items)
    assert single.stats.repair_bytes / single.stats.source_bytes > 1.5 * enc.stats.repair_bytes / enc.stats.source_bytes


def test_repair_bytes_never_exceed_source_bytes_unless_allowed():
    # RFC 6363 §8.2: repair ≤ source.  Fifteen 20-byte records and one 1400-byte slice in one
    # class: m = 4 repair symbols of 1403 bytes would be 5612 bytes for 1748 of source content.
    items = [(b"r" * 20, 1)] * 15 + [(b"s" * 1400, 2)]
    capped = BlockEncoder(EncoderSettings(block_size=16, repair=4, size_classes=()), SESSION)
    packets = send_all(capped, items)
    repairs = [p for p in packets if not is_source(p)]
    content = 15 * (20 + wire.SYMBOL_PREFIX_BYTES) + 1400 + wire.SYMBOL_PREFIX_BYTES
    assert len(repairs) == content // (1400 + wire.SYMBOL_PREFIX_BYTES) == 1
    assert capped.stats.repair_capped == 1
    assert capped.stats.repair_bytes <= capped.stats.source_bytes
    allowed = BlockEncoder(
        EncoderSettings(block_size=16, repair=4, size_classes=(), allow_repair_above_source=True), SESSION
    )
    assert sum(not is_source(p) for p in send_all(allowed, items)) == 4
    assert allowed.stats.repair_capped == 0
    # The capped block still recovers what its one repair packet can.
    dec, got = decode(packets[1:])
    assert got == sorted((f, d) for d, f in items)


@settings(max_examples=40, deadline=None)
@given(
    sizes=st.lists(st.integers(0, 600), min_size=1, max_size=40),
    k=st.integers(1, 12),
    m=st.integers(0, 12),
    depth=st.integers(1, 4),
    bounds=st.sampled_from([(), (64,), (32, 256)]),
)
def test_no_block_sends_more_repair_symbol_bytes_than_source_content(sizes, k, m, depth, bounds):
    enc = BlockEncoder(
        EncoderSettings(block_size=k, repair=m, interleave=depth, size_classes=bounds, max_datagram=600), SESSION
    )
    packets = send_all(enc, [(bytes(size), 1) for size in sizes])
    blocks: dict[int, list] = {}
    for p in packets:
        parsed = wire.parse(p, max_datagram=600)
        blocks.setdefault(parsed.sbn, []).append(parsed)
    for parts in blocks.values():
        content = sum(len(x.data) + wire.SYMBOL_PREFIX_BYTES for x in parts if isinstance(x, wire.SourcePacket))
        repair = sum(len(x.symbol) for x in parts if isinstance(x, wire.RepairPacket))
        assert repair <= content
    # Every datagram is still delivered.
    assert len(decode(packets)[1]) == len(sizes)


def test_byte_cap_and_class_names():
    assert repair_byte_cap(4, content_bytes=1748, symbol_len=1403) == 1
    assert repair_byte_cap(4, content_bytes=16 * 23, symbol_len=23) == 4  # equal datagrams: m ≤ k
    assert size_class_names(()) == ("all",)
    assert size_class_names((256, 1024)) == ("le256", "le1024", "gt1024")


def test_settings_refuse_bad_depths_and_boundaries():
    for bad in (
        dict(interleave=0),
        dict(interleave=17),
        dict(size_classes=(256, 256)),
        dict(size_classes=(0,)),
        dict(size_classes=(1, 2, 3, 4, 5)),
    ):
        with pytest.raises(ValueError):
            EncoderSettings(**bad)


def test_a_new_layout_leaves_open_blocks_to_their_deadline():
    enc = BlockEncoder(EncoderSettings(block_size=4, repair=1, interleave=1), SESSION)
    enc.send(b"a" * 40, 1, 0.0)
    enc.update(EncoderSettings(block_size=4, repair=1, interleave=2))
    out = enc.send(b"b" * 40, 1, 0.001)
    assert wire.parse(out[0], max_datagram=1400).sbn == 1  # a new block; block 0 gets no more datagrams
    assert [wire.parse(p, max_datagram=1400).sbn for p in enc.on_timer(0.02)] == [0]


def test_a_bad_item_that_opened_a_block_leaves_nothing_to_flush():
    # A flow id outside 24 bits is a caller bug and raises; if it had just opened a block, that
    # empty block is forgotten at its deadline (no packet of it went out), and traffic goes on.
    import struct

    enc = BlockEncoder(EncoderSettings(block_size=2, repair=1), SESSION)
    with pytest.raises(struct.error):
        enc.send_batch([(b"a" * 30, 1), (b"b" * 30, 1), (b"bad", 1 << 24)], 0.0)  # block 0 full, block 1 opened
    assert enc.next_deadline() is not None
    assert enc.on_timer(1.0) == [] and enc.next_deadline() is None
    assert enc.stats.blocks == 1
    packets = enc.send_batch([(b"d" * 30, 1), (b"e" * 30, 1)], 1.0) + enc.close()
    dec, got = decode(packets)
    assert got == [(1, b"d" * 30), (1, b"e" * 30)]
