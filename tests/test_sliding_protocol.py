"""The sliding-window encoder and decoder (fec.code: sliding), sans-IO: fake clock, no sockets.

Properties: every datagram the decoder delivers is one that was sent (flow and bytes), at most
once; a lost datagram is rebuilt at the first repair packet that determines it; the decoder's
state stays within its window whatever arrives; malformed, forged and replayed packets are
counted drops and never crash it.  The wire layout is checked against RFC 8681 §4.1.3's fields.
"""

from __future__ import annotations

import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.coding import sliding
from fecproxy.protocol import auth, keys, wire
from fecproxy.protocol.events import Delivery, Dropped, DropReason
from fecproxy.protocol.sliding_decoder import SlidingDecoder, SlidingDecoderSettings
from fecproxy.protocol.sliding_encoder import SlidingEncoder, SlidingSettings


def deliveries(events):
    return [(e.flow, e.data) for e in events if isinstance(e, Delivery)]


def feed(dec, packets, now=0.0):
    events = []
    for packet in packets:
        events += dec.receive(packet, now)[0]
    return events


# --- wire ------------------------------------------------------------------------------------


def test_repair_header_carries_the_rfc_8681_repair_payload_id():
    # RFC 8681 §4.1.3: repair key (16 bits), DT (4 bits), NSS (12 bits), FSS_ESI (32 bits).
    packet = wire.encode_sliding_repair(0xABCDEF01, 0x89ABCDEF, 0xBEEF, 9, 0x123, b"\x00" * 8)
    assert len(packet) == wire.SLIDING_REPAIR_HEADER_BYTES + 8 == 22
    assert packet[6:10] == bytes.fromhex("89abcdef")  # FSS_ESI in the payload-id word
    assert packet[10:12] == bytes.fromhex("beef")  # repair key
    assert packet[12:14] == bytes([0x91, 0x23])  # DT ‖ NSS
    pkt = wire.parse(packet, max_datagram=100, sliding=True)
    assert pkt == wire.SlidingRepairPacket(0xABCDEF01, 0x89ABCDEF, 0xBEEF, 9, 0x123, b"\x00" * 8)


def test_source_header_carries_a_32_bit_esi():
    # RFC 8681 §4.1.2: the source FEC payload ID is a 32-bit ESI.
    packet = wire.encode_sliding_source(7, 0xFFFFFFFF, 0x0102AA, b"hello", seq=0xBEEF)
    assert packet[14:16] == bytes.fromhex("beef")  # the flow sequence number, as in block source packets
    pkt = wire.parse(packet, max_datagram=100, sliding=True)
    assert pkt == wire.SlidingSourcePacket(7, 0xFFFFFFFF, 0x0102AA, b"hello", 0xBEEF)


def test_block_receivers_refuse_sliding_packets_as_unsupported():
    packet = wire.encode_sliding_source(7, 1, 1, b"x")
    with pytest.raises(wire.UnsupportedPacket):
        wire.parse(packet, max_datagram=100)


@pytest.mark.parametrize(
    "packet, reason",
    [
        (wire.encode_sliding_repair(1, 0, 1, 15, 1, b"\x00" * 4), DropReason.MALFORMED),  # symbol < prefix
        (wire.pack_sliding_repair(1, 0, 1, 15 << 12) + b"\x00" * 5, DropReason.MALFORMED),  # NSS 0
        (wire.encode_sliding_source(1, 0, 1, b"x" * 101), DropReason.OVERSIZE),
        (wire.encode_sliding_repair(1, 0, 1, 15, 1, b"\x00" * 108), DropReason.OVERSIZE),
        (wire.pack_sliding_source(1, 0, 5, 0) + b"x", DropReason.MALFORMED),  # reserved bits
        (bytes([wire.SLIDING_SOURCE_TYPE_BYTE, 1]) + bytes(12), DropReason.MALFORMED),  # END flag
    ],
)
def test_bad_sliding_packets_are_refused_with_a_reason(packet, reason):
    dec = SlidingDecoder(SlidingDecoderSettings(max_datagram=100))
    events, in_session = dec.receive(packet, 0.0)
    assert [e.reason for e in events if isinstance(e, Dropped)] == [reason]
    assert not in_session and dec.stats.dropped == {reason: 1}


# --- encoder -----------------------------------------------------------------------------------


def test_one_repair_every_interval_over_the_window():
    enc = SlidingEncoder(SlidingSettings(window=6, repair_interval=3), session=1)
    out = []
    for i in range(9):
        out += enc.send(bytes([i]) * (i + 1), i % 2, now=0.0)
    kinds = [p[0] for p in out]
    repairs = [wire.parse(p, max_datagram=1400, sliding=True) for p in out if p[0] == wire.SLIDING_REPAIR_TYPE_BYTE]
    assert kinds.count(wire.SLIDING_SOURCE_TYPE_BYTE) == 9 and len(repairs) == 3
    assert [(r.first_esi, r.nss) for r in repairs] == [(0, 3), (0, 6), (3, 6)]  # window ≤ 6, slides
    # the repair symbol is the RFC 8681 combination of the window's ADUIs
    adui = [wire.pack_symbol_prefix(i % 2, i + 1, i // 2) + bytes([i]) * (i + 1) for i in range(9)]  # 2 flows
    last = repairs[-1]
    assert last.symbol == sliding.encode_repair(adui[3:9], last.repair_key, last.dt)


def test_window_age_and_flush():
    enc = SlidingEncoder(SlidingSettings(window=10, window_age=0.1, repair_interval=4, flush=0.02), session=1)
    enc.send(b"a", 0, now=0.0)
    enc.send(b"b", 0, now=0.05)
    assert enc.next_deadline() == pytest.approx(0.02)
    assert enc.on_timer(0.01) == []
    (repair,) = enc.on_timer(0.06)
    pkt = wire.parse(repair, max_datagram=1400, sliding=True)
    assert (pkt.first_esi, pkt.nss) == (0, 2)
    assert enc.next_deadline() is None
    enc.send(b"c", 0, now=0.2)  # a and b are older than 0.1 s: out of the window
    (repair,) = enc.on_timer(0.3)
    assert wire.parse(repair, max_datagram=1400, sliding=True).nss == 1
    assert enc.flushed_repairs == 2


def test_oversize_datagram_is_counted_and_skipped():
    enc = SlidingEncoder(SlidingSettings(max_datagram=10, repair_interval=1, window=4), session=1)
    assert enc.send(b"x" * 11, 0, 0.0) == []
    assert enc.stats.dropped == {DropReason.OVERSIZE: 1}


# --- decoder -----------------------------------------------------------------------------------


def test_a_lost_datagram_is_rebuilt_at_the_next_repair():
    enc = SlidingEncoder(SlidingSettings(window=8, repair_interval=4), session=5)
    dec = SlidingDecoder()
    packets = []
    for i in range(4):
        packets += [(p, i * 0.001) for p in enc.send(b"datagram %d" % i, 3, now=i * 0.001)]
    events = []
    for n, (packet, t) in enumerate(packets):
        if n == 1:
            continue  # the second source packet is lost
        events += dec.receive(packet, t)[0]
    rebuilt = [e for e in events if isinstance(e, Delivery) and e.recovered]
    assert [(e.flow, e.data) for e in rebuilt] == [(3, b"datagram 1")]
    assert rebuilt[0].delay == pytest.approx(0.001)  # noticed at 2 ms, rebuilt with the repair at 3 ms
    assert (dec.stats.lost, dec.stats.recovered, dec.stats.unrecovered) == (1, 1, 0)


def test_esi_wraps_around_32_bits():
    enc = SlidingEncoder(SlidingSettings(window=8, repair_interval=2), session=5, first_esi=0xFFFFFFFE)
    dec = SlidingDecoder()
    sent, link = [], []
    for i in range(8):
        sent.append((0, bytes([i])))
        link += enc.send(bytes([i]), 0, 0.0)
    link = [p for n, p in enumerate(link) if n not in (3, 6)]  # lose ESIs 0xFFFFFFFF+... around the wrap
    got = deliveries(feed(dec, link))
    assert sorted(got) == sorted(sent)


@settings(max_examples=80, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    count=st.integers(1, 120),
    window=st.integers(1, 40),
    interval=st.integers(1, 8),
    loss=st.floats(0, 0.6),
    shuffle=st.booleans(),
    density=st.sampled_from([15, 15, 10, 4]),
)
def test_random_loss_never_corrupts_and_delivers_each_datagram_at_most_once(
    seed, count, window, interval, loss, shuffle, density
):
    rng = random.Random(seed)
    interval = min(interval, window)
    enc = SlidingEncoder(
        SlidingSettings(window=window, repair_interval=interval, density=density, max_datagram=64), session=seed
    )
    dec = SlidingDecoder(SlidingDecoderSettings(max_datagram=64, max_window=64))
    sent, link = [], []
    for _ in range(count):
        data, flow = rng.randbytes(rng.randint(0, 64)), rng.randint(0, 5)
        sent.append((flow, data))
        link += enc.send(data, flow, 0.0)
    link += enc.close()
    arrived = [p for p in link if rng.random() >= loss]
    if shuffle:
        rng.shuffle(arrived)
    events = feed(dec, arrived) + dec.on_timer(10.0) + dec.close()
    remaining = list(sent)
    for item in deliveries(events):
        remaining.remove(item)  # raises if corrupted or delivered twice
    stats = dec.stats
    assert stats.recovered + stats.unrecovered == stats.lost
    assert not any(isinstance(e, Dropped) and e.reason == DropReason.INCONSISTENT for e in events)
    if not shuffle and loss == 0:
        assert remaining == []


def test_burst_within_the_window_is_rebuilt_when_enough_repair_arrives():
    enc = SlidingEncoder(SlidingSettings(window=16, repair_interval=2), session=9)
    dec = SlidingDecoder()
    link = []
    for i in range(16):
        link += enc.send(b"%02d" % i, 0, 0.0)
    sources = [n for n, p in enumerate(link) if p[0] == wire.SLIDING_SOURCE_TYPE_BYTE]
    lost = set(sources[4:7])  # a burst of 3 source packets
    events = feed(dec, [p for n, p in enumerate(link) if n not in lost])
    assert sorted(deliveries(events)) == [(0, b"%02d" % i) for i in range(16)]
    assert dec.stats.recovered == 3


def test_state_stays_within_the_window_under_a_flood_of_gaps():
    dec = SlidingDecoder(SlidingDecoderSettings(max_window=32, max_datagram=64))
    for esi in range(0, 100_000, 1000):  # huge gaps: lost outright beyond the window
        dec.receive(wire.encode_sliding_source(1, esi, 0, b"x"), 0.0)
        dec.receive(wire.encode_sliding_repair(1, esi - 31, esi % 4096, 15, 32, b"\x00" * 20), 0.0)
    (stream,) = dec._streams.values()
    assert len(stream.missing) <= 32 and len(stream.system.known) <= 32
    assert len(stream.system.unknowns) <= 32 and stream.system.rows <= 32


@settings(max_examples=150, deadline=None)
@given(st.lists(st.binary(max_size=80), max_size=30), st.integers(0, 2**32 - 1))
def test_garbage_and_mutated_packets_never_crash_the_decoder(junk, seed):
    rng = random.Random(seed)
    enc = SlidingEncoder(SlidingSettings(window=8, repair_interval=2, max_datagram=64), session=3)
    link = []
    for i in range(20):
        link += enc.send(rng.randbytes(rng.randint(0, 64)), i % 3, 0.0)
    mutated = []
    for packet in link:
        data = bytearray(packet)
        if rng.random() < 0.3:
            data[rng.randrange(len(data))] ^= 1 << rng.randrange(8)
        mutated.append(bytes(data))
    packets = mutated + list(junk)
    rng.shuffle(packets)
    dec = SlidingDecoder(SlidingDecoderSettings(max_datagram=64))
    events = feed(dec, packets) + dec.on_timer(5.0) + dec.close()
    for event in events:
        assert isinstance(event, (Delivery, Dropped)) or type(event).__name__ in (
            "SessionStarted",
            "ControlReceived",
            "BlockReport",
        )


def test_keyed_decoder_delivers_only_what_was_sent_whatever_is_forged():
    master = keys.MasterKey(bytes(range(32)))
    keyring = auth.Keyring(master)
    sealer = auth.Sealer(auth.PacketKey.derive(master, encrypt=False), salt=1)
    enc = SlidingEncoder(SlidingSettings(window=8, repair_interval=2, max_datagram=64), session=3, sealer=sealer)
    dec = SlidingDecoder(SlidingDecoderSettings(max_datagram=64), keyring=keyring)
    rng = random.Random(1)
    sent, link = [], []
    for i in range(40):
        data = rng.randbytes(rng.randint(0, 64))
        sent.append((i % 3, data))
        link += enc.send(data, i % 3, 0.0)
    forged = []
    for packet in link:
        data = bytearray(packet)
        data[rng.randrange(len(data))] ^= 0x10
        forged.append(bytes(data))
    plain = wire.encode_sliding_repair(3, 0, 7, 15, 4, b"\x00" * 20)
    events = feed(dec, forged + [plain] + link + link[:5])  # flipped, unsealed, genuine, replayed
    remaining = list(sent)
    for item in deliveries(events):
        remaining.remove(item)
    assert remaining == []
    assert dec.stats.dropped[DropReason.AUTH] == len(forged) + 1
    assert dec.stats.dropped[DropReason.REPLAY] == 5


def test_resolved_segments_are_reported_like_blocks_for_the_loss_estimate():
    enc = SlidingEncoder(SlidingSettings(window=16, repair_interval=4), session=2)
    dec = SlidingDecoder()
    link = []
    for i in range(32):
        link += enc.send(bytes([i]), 0, 0.0)
    sources = [n for n, p in enumerate(link) if p[0] == wire.SLIDING_SOURCE_TYPE_BYTE]
    events = feed(dec, [p for n, p in enumerate(link) if n != sources[5]])
    reports = [e for e in events if type(e).__name__ == "BlockReport"]
    assert [(r.sbn, r.k, r.outcome, r.lost, r.recovered, r.span) for r in reports] == [
        (0, 16, "recovered", 1, 1, 16),
        (1, 16, "complete", 0, 0, 16),
    ]
    assert reports[0].arrived_mask == 0xFFFF & ~(1 << 5)


def test_repair_symbols_match_the_reference_through_ring_wraps_and_window_changes():
    rng = random.Random(5)
    enc = SlidingEncoder(SlidingSettings(window=5, repair_interval=2, max_datagram=64), session=1)
    aduis = {}
    checked = 0
    for i in range(60):
        if i == 20:
            enc.update(SlidingSettings(window=3, repair_interval=2, max_datagram=64))
        if i == 40:
            enc.update(SlidingSettings(window=7, repair_interval=3, max_datagram=64))
        data = rng.randbytes(rng.randint(0, 64))
        for packet in enc.send(data, 1, 0.0):
            pkt = wire.parse(packet, max_datagram=64, sliding=True)
            if isinstance(pkt, wire.SlidingSourcePacket):
                aduis[pkt.esi] = wire.pack_symbol_prefix(pkt.flow, len(pkt.data), pkt.seq) + pkt.data
            else:
                window = [aduis[e] for e in range(pkt.first_esi, pkt.first_esi + pkt.nss)]
                assert pkt.symbol == sliding.encode_repair(window, pkt.repair_key, pkt.dt)
                checked += 1
    assert checked >= 20


def test_adaptation_sets_the_repair_interval_from_the_chosen_m():
    """fec.adapt chooses m for k = fec.block_size; the sliding code sends that overhead:
    one repair every ceil(k/m) datagrams (never more than the window)."""
    from fecproxy.protocol.encoder import EncoderSettings

    fixed = SlidingEncoder(SlidingSettings(window=32, repair_interval=4), session=1)
    fixed.update(EncoderSettings(block_size=16, repair=8))
    assert fixed.sliding_settings.repair_interval == 4  # no fec.adapt: the configured interval stays
    adapting = SlidingEncoder(SlidingSettings(window=32, repair_interval=4), session=1, follow_repair=True)
    for m, interval in ((8, 2), (3, 6), (1, 16), (16, 1)):
        adapting.update(EncoderSettings(block_size=16, repair=m))
        assert adapting.sliding_settings.repair_interval == interval
        assert adapting.settings.repair == m
    small = SlidingEncoder(SlidingSettings(window=8, repair_interval=4), session=1, follow_repair=True)
    small.update(EncoderSettings(block_size=16, repair=1))
    assert small.sliding_settings.repair_interval == 8


def test_forged_far_ahead_esis_do_not_move_the_window_but_a_real_jump_does():
    rng = random.Random(9)
    enc = SlidingEncoder(SlidingSettings(window=16, repair_interval=4), session=4)
    dec = SlidingDecoder()
    link = []
    for i in range(200):
        link += enc.send(b"%03d" % i, 0, 0.0)
    sources = [n for n, p in enumerate(link) if p[0] == wire.SLIDING_SOURCE_TYPE_BYTE]
    lost = set(sources[10::17])
    events = []
    for n, packet in enumerate(link):
        if n % 5 == 0:  # a stranger's forged packets of the same session, ESIs anywhere
            esi = rng.randrange(1 << 32)
            forged = rng.choice(
                [
                    wire.encode_sliding_source(4, esi, 0, b"forged"),
                    wire.encode_sliding_repair(4, esi, rng.randrange(4096), 15, 16, bytes(12)),
                ]
            )
            events += dec.receive(forged, 0.0)[0]
        if n not in lost:
            events += dec.receive(packet, 0.0)[0]
    genuine = [d for d in deliveries(events) if d[1] != b"forged"]
    assert sorted(genuine) == [(0, b"%03d" % i) for i in range(200)]
    # a real jump: the sender goes on 10 000 datagrams later; after RESYNC_PACKETS agreeing
    # packets the window follows, and losses are rebuilt again
    enc2 = SlidingEncoder(SlidingSettings(window=16, repair_interval=4), session=4, first_esi=10_200)
    later = []
    for i in range(40):
        later += enc2.send(b"L%02d" % i, 0, 0.0)
    later_sources = [n for n, p in enumerate(later) if p[0] == wire.SLIDING_SOURCE_TYPE_BYTE]
    events = feed(dec, [p for n, p in enumerate(later) if n != later_sources[30]])
    assert sorted(deliveries(events)) == [(0, b"L%02d" % i) for i in range(40)]
    assert any(isinstance(e, Delivery) and e.recovered for e in events)
