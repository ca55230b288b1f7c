"""Sans-IO encoder and decoder driven with a fake clock: no sockets, no sleeps."""

import itertools
import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from support.decoding import receive_noting_peer

from fecproxy.protocol import wire
from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import BlockReport, Delivery, Dropped, SessionStarted


def make_block(k, m, sizes=None, *, session=1, seed=0, first_sbn=0):
    """Encode one full block of k datagrams; return (datagrams with flows, link packets)."""
    rng = random.Random(seed)
    enc = BlockEncoder(
        EncoderSettings(block_size=k, repair=m, flush_interval=0.05, allow_repair_above_source=True),
        session,
        first_sbn=first_sbn,
    )
    datagrams = []
    packets = []
    for i in range(k):
        size = sizes[i] if sizes else rng.randint(0, 60)
        data = rng.randbytes(size)
        flow = rng.randint(0, 255)
        datagrams.append((flow, data))
        packets += enc.send(data, flow, now=0.001 * i)
    assert len(packets) == k + m
    return datagrams, packets


def feed(decoder, packets, now=1.0):
    events = []
    for p in packets:
        events += decoder.receive(p, None, now)
    return events


def delivered(events):
    return [(e.flow, e.data) for e in events if isinstance(e, Delivery)]


def reports(events):
    return [e for e in events if isinstance(e, BlockReport)]


@pytest.mark.parametrize("k, m", [(1, 1), (2, 1), (3, 2), (4, 3), (5, 2)])
def test_every_loss_pattern_up_to_m_is_recovered(k, m):
    datagrams, packets = make_block(k, m, seed=k * 10 + m)
    n = k + m
    for lost_count in range(m + 1):
        for lost in itertools.combinations(range(n), lost_count):
            dec = BlockDecoder()
            events = feed(dec, [p for i, p in enumerate(packets) if i not in lost])
            assert sorted(delivered(events)) == sorted(datagrams), lost
            (report,) = reports(events + dec.close())  # a block with losses is settled later
            source_lost = sum(1 for i in lost if i < k)
            assert report.lost == source_lost and report.unrecovered == 0
            assert report.recovered == source_lost


@pytest.mark.parametrize("k, m", [(3, 1), (4, 2)])
def test_more_than_m_losses_is_reported_and_arrivals_still_delivered(k, m):
    datagrams, packets = make_block(k, m, seed=5)
    n = k + m
    for lost in itertools.combinations(range(n), m + 1):
        dec = BlockDecoder(DecoderSettings(hold_time=0.5))
        events = feed(dec, [p for i, p in enumerate(packets) if i not in lost], now=1.0)
        arrived = [datagrams[i] for i in range(k) if i not in lost]
        assert delivered(events) == arrived
        assert dec.next_deadline() == pytest.approx(1.5)
        assert dec.on_timer(1.49) == []
        expired = dec.on_timer(1.5) + dec.close()  # its loss is settled after the reorder tolerance
        (report,) = reports(expired)
        source_lost = sum(1 for i in lost if i < k)
        if any(i >= k for i in range(n) if i not in lost):
            assert report.k == k  # a repair packet told the block's size
            assert report.lost == source_lost
        assert report.outcome == "expired" and report.unrecovered == report.lost
        assert dec.next_deadline() is None


def test_short_block_closed_by_timer_recovers():
    enc = BlockEncoder(EncoderSettings(block_size=16, repair=4, flush_interval=0.02), session=9)
    datagrams = [(i, bytes([i]) * (10 + i)) for i in range(3)]
    packets = []
    for i, (flow, data) in enumerate(datagrams):
        packets += enc.send(data, flow, now=0.001 * i)
    assert len(packets) == 3
    assert enc.next_deadline() == pytest.approx(0.02)
    assert enc.on_timer(0.019) == []
    repairs = enc.on_timer(0.02)
    # proportional rule: ceil(4·3/16) = 1 repair packet
    assert len(repairs) == 1 and enc.next_deadline() is None
    assert wire.parse(repairs[0], max_datagram=1400).k == 3
    dec = BlockDecoder()
    events = feed(dec, [packets[0], packets[2], repairs[0]])
    assert sorted(delivered(events)) == sorted(datagrams)
    (report,) = reports(events + dec.close())
    assert report.outcome == "recovered" and report.k == 3 and report.lost == 1


def test_full_rule_gives_short_blocks_all_repair():
    settings = EncoderSettings(block_size=16, repair=4, short_block_repair="full")
    assert settings.repair_for(3) == 4
    proportional = EncoderSettings(block_size=16, repair=4)
    assert [proportional.repair_for(k) for k in (1, 4, 5, 15, 16)] == [1, 1, 2, 4, 4]
    assert EncoderSettings(block_size=16, repair=0).repair_for(3) == 0


def test_no_loss_block_completes_on_end_flag_and_repair_is_not_a_drop():
    datagrams, packets = make_block(4, 2)
    dec = BlockDecoder()
    events = feed(dec, packets[:4])
    assert reports(events)[0].outcome == "complete"
    assert feed(dec, packets[4:]) == []
    assert dec.stats.repair_unneeded == 2 and dec.stats.dropped == {}
    assert dec.next_deadline() is None


def test_reordering_and_duplication():
    datagrams, packets = make_block(6, 3, seed=3)
    rng = random.Random(1)
    for _trial in range(50):
        lost = set(rng.sample(range(9), 3))
        kept = [p for i, p in enumerate(packets) if i not in lost]
        shuffled = kept + rng.sample(kept, 3)  # duplicates
        rng.shuffle(shuffled)
        dec = BlockDecoder()
        events = feed(dec, shuffled)
        assert sorted(delivered(events)) == sorted(datagrams)
        drops = [e for e in events if isinstance(e, Dropped)]
        assert all(d.reason in {"duplicate", "late"} for d in drops)


def test_zero_repair_is_still_framed_and_delivered():
    datagrams, packets = make_block(4, 0)
    dec = BlockDecoder()
    events = feed(dec, packets[:2] + packets[3:])
    assert delivered(events) == [datagrams[0], datagrams[1], datagrams[3]]
    (report,) = reports(dec.on_timer(2.0))  # END flag told k=4
    assert report.lost == 1 and report.unrecovered == 1


def test_block_number_wraps_around():
    enc = BlockEncoder(EncoderSettings(block_size=2, repair=1), session=4, first_sbn=2**24 - 2)
    dec = BlockDecoder()
    sbns = []
    for i in range(8):
        out = enc.send(bytes([i]) * 5, 0, now=i)
        sbns.append(wire.parse(out[0], max_datagram=1400).sbn)
        lost_first = out[1:] if i % 2 == 0 else out  # lose the first datagram of every block
        events = feed(dec, lost_first, now=i)
        if i % 2 == 1:
            assert reports(events + dec.close())[0].outcome == "recovered"
    assert sbns == [2**24 - 2, 2**24 - 2, 2**24 - 1, 2**24 - 1, 0, 0, 1, 1]
    assert dec.stats.recovered == 4 and dec.stats.dropped == {}


def test_sender_restart_keeps_both_sessions_apart_and_the_new_one_takes_the_replies():
    from fecproxy.protocol.decoder import SESSION_CONFIRM_PACKETS

    old_data, old = make_block(3, 1, session=100)
    k = SESSION_CONFIRM_PACKETS + 2
    new_data, new = make_block(k, 1, session=200, seed=9)
    dec = BlockDecoder()
    events = feed(dec, old[:2])
    assert isinstance(events[0], SessionStarted) and events[0].session == 100
    # The restarted sender's datagrams are delivered at once, in blocks of their own.
    events = feed(dec, new[:2], now=1.01)
    assert delivered(events) == new_data[:2] and dec.session == 100
    # A straggler of the old session still completes the old block (repair rebuilds nothing lost).
    events = feed(dec, old[2:], now=1.02)
    assert delivered(events) == old_data[2:] and reports(events)[0].outcome == "complete"
    # Once the old session is quiet for the hold time, the established new one is followed (and replied to).
    events = feed(dec, new[2:], now=1.0 + dec.settings.hold_time + 0.1)
    assert dec.session == 200
    assert [e for e in events if isinstance(e, SessionStarted)] == [SessionStarted(200, 100)]
    assert delivered(events) == new_data[2:]
    dec.on_timer(10.0)
    assert dec.sessions == (200,)  # the old session aged out, nothing of it left


def test_open_blocks_are_bounded_oldest_evicted_first():
    dec = BlockDecoder(DecoderSettings(max_open_blocks=3))
    enc = BlockEncoder(EncoderSettings(block_size=4, repair=1), session=1)
    events = []
    for sbn in range(5):
        out = []
        for _ in range(4):
            out += enc.send(b"x", 0, now=sbn)
        events += feed(dec, out[1:2], now=sbn)  # one source packet per block: never completes
    evicted = [r.sbn for r in reports(events + dec.close()) if r.outcome == "evicted"]
    assert evicted == [0, 1] and [r for r in reports(events) if r.outcome != "evicted"] == []


def test_oversize_datagram_is_counted_and_skipped_and_block_stays_intact():
    enc = BlockEncoder(EncoderSettings(block_size=2, repair=1, max_datagram=10), session=1)
    first = enc.send(b"a" * 10, 0, now=0)
    assert enc.send(b"b" * 11, 0, now=0) == []
    second = enc.send(b"c" * 3, 0, now=0)
    dec = BlockDecoder(DecoderSettings(max_datagram=10))
    events = feed(dec, [first[0], second[1]])  # lose the second source, keep repair
    assert sorted(delivered(events)) == [(0, b"a" * 10), (0, b"c" * 3)]
    assert enc.stats.dropped == {"oversize": 1}


def test_packets_contradicting_the_block_are_dropped_not_trusted():
    # Without authentication the first consistent packet sets the block's shape;
    # anything contradicting it afterwards is dropped and counted, and decoding stays correct.
    datagrams, packets = make_block(4, 2)
    dec = BlockDecoder()
    feed(dec, packets[:1] + packets[4:5])
    size = len(wire.parse(packets[4], max_datagram=1400).symbol)
    forged = [
        wire.encode_repair(1, 0, 5, 3, bytes(size)),  # another k
        wire.encode_repair(1, 0, 5, 4, bytes(size + 1)),  # another symbol size
        wire.encode_source(1, 0, 4, 0, b"x"),  # ESI beyond k
        wire.encode_source(1, 0, 1, 0, bytes(size)),  # longer than the block's symbols
    ]
    events = feed(dec, forged)
    assert [e.reason for e in events] == ["inconsistent"] * 4
    events = feed(dec, packets[2:3] + packets[5:])
    assert sorted(delivered(events)) == sorted(datagrams[1:])


def test_malformed_packets_are_counted_by_reason():
    dec = BlockDecoder()
    events = feed(dec, [b"", bytes([(wire.VERSION + 1) << 4]) + bytes(15), wire.encode_source(1, 0, 0, 0, bytes(2000))])
    assert [e.reason for e in events] == ["malformed", "unsupported", "oversize"]
    assert dec.stats.dropped == {"malformed": 1, "unsupported": 1, "oversize": 1}


def test_update_applies_from_next_block():
    enc = BlockEncoder(EncoderSettings(block_size=2, repair=1), session=1)
    out = enc.send(b"a", 0, 0)
    enc.update(EncoderSettings(block_size=3, repair=2))
    # The open block keeps its shape; what a reload logs is the next block's (no old m beside a new k).
    assert (enc.settings.block_size, enc.settings.repair) == (2, 1)
    assert (enc.next_settings.block_size, enc.next_settings.repair) == (3, 2)
    out += enc.send(b"b", 0, 0)
    assert len(out) == 3  # old block: 2 + 1
    for _ in range(3):
        out += enc.send(b"c", 0, 0)
    assert len(out) == 3 + 3 + 2


@settings(max_examples=60, deadline=None)
@given(
    k=st.integers(1, 12),
    m=st.integers(0, 6),
    blocks=st.integers(1, 4),
    seed=st.integers(0, 2**32 - 1),
    loss=st.floats(0, 0.6),
)
def test_random_loss_never_corrupts_and_delivers_each_datagram_at_most_once(k, m, blocks, seed, loss):
    rng = random.Random(seed)
    enc = BlockEncoder(EncoderSettings(block_size=k, repair=m, max_datagram=64), session=seed & 0xFFFFFFFF)
    dec = BlockDecoder(DecoderSettings(max_datagram=64))
    sent = []
    link = []
    for _ in range(k * blocks):
        data = rng.randbytes(rng.randint(0, 64))
        flow = rng.randint(0, 3)
        sent.append((flow, data))
        link += enc.send(data, flow, now=0)
    arrived = [p for p in link if rng.random() >= loss]
    rng.shuffle(arrived)
    events = feed(dec, arrived) + dec.on_timer(10.0)
    got = delivered(events)
    remaining = list(sent)
    for item in got:
        remaining.remove(item)  # raises if corrupted or delivered twice
    total_unrecovered = sum(r.unrecovered for r in reports(events))
    assert dec.stats.delivered == len(got)
    assert len(reports(events)) <= blocks
    assert total_unrecovered <= len(remaining)


def test_a_stray_packet_of_another_session_does_not_retire_the_live_one():
    datagrams, live = make_block(4, 2, session=100)
    dec = BlockDecoder()
    feed(dec, live[:1], now=1.0)
    stray = wire.encode_source(0xDEAD, 7, 0, 3, b"stray")
    events, stray_in_session = receive_noting_peer(dec, stray, 1.01)
    assert delivered(events) == [(3, b"stray")]  # its datagram is not lost
    assert dec.session == 100 and not stray_in_session
    events = feed(dec, live[2:3] + live[4:-1], now=1.02)  # the live session goes on and recovers
    last_events, last_in_session = receive_noting_peer(dec, live[-1], 1.02)
    events += last_events
    assert last_in_session and sorted(delivered(events)) == sorted(datagrams[1:])


def test_a_stranger_flooding_one_made_up_session_changes_nothing_for_the_live_one():
    # Regression: many packets of one constant session value, sent while the real sender runs,
    # must neither retire the real session nor take the replies.
    enc = BlockEncoder(EncoderSettings(block_size=4, repair=2), session=100)
    dec = BlockDecoder()
    sent, got = [], []
    now = 0.0
    for i in range(200):
        now += 0.01
        data = i.to_bytes(4, "big")
        sent.append(data)
        for packet in enc.send(data, 1, now):
            events, in_session = receive_noting_peer(dec, packet, now)
            assert in_session
            got += [e.data for e in events if isinstance(e, Delivery)]
        for j in range(5):  # the stranger: one made-up session, plausible headers
            forged = wire.encode_source(0x0BADF00D, i, j, 1, b"forged")
            events, in_session = receive_noting_peer(dec, forged, now)
            assert not in_session
        dec.on_timer(now)
    assert got == sent and dec.session == 100
    assert not any(isinstance(e, SessionStarted) and e.session == 0x0BADF00D for e in events)


def test_sessions_are_bounded_and_a_live_established_session_is_never_evicted():
    from fecproxy.protocol.decoder import MAX_SESSIONS

    dec = BlockDecoder()
    _, live = make_block(4, 2, session=100)
    feed(dec, live[:3], now=1.0)
    for fake in range(1, 50):  # one packet each: never established, the oldest makes room
        dec.receive(wire.encode_source(fake, 0, 0, 0, b"x"), None, 1.0 + fake * 1e-4)
        assert len(dec.sessions) <= MAX_SESSIONS and 100 in dec.sessions
    dec.on_timer(1.0 + dec.settings.hold_time + 0.01)
    assert dec.sessions == (100,)


def test_a_duplicated_packet_of_a_new_session_is_delivered_once():
    _, live = make_block(4, 2, session=100)
    datagrams, new = make_block(4, 2, session=200, seed=8)
    dec = BlockDecoder()
    feed(dec, live[:1], now=1.0)
    events = feed(dec, [new[0], new[0]], now=1.01)
    assert delivered(events) == datagrams[:1]
    assert [e.reason for e in events if isinstance(e, Dropped)] == ["duplicate"]


def test_repair_packets_carry_rfc_symbols_of_the_rfc6363_framing():
    # Outside check: the repair payloads equal what galois computes for RFC 5510 §8.2
    # (GM = V_k^-1 · V over GF(2^8) on 0x11D, alpha = 2, §8.1) applied to the source symbols
    # framed as RFC 6363 §4 / RFC 6865 §4 say, with our flow id widened to 3 bytes and our flow
    # sequence number after the length (wire version 3):
    # flow id (3: slot ‖ generation) ‖ length (2, big-endian) ‖ sequence (2) ‖ data ‖ zeros.
    import galois
    import numpy as np

    field = galois.GF(2**8, irreducible_poly=0x11D)
    k, m = 3, 2
    flows_and_data = [(0x000107, b"wind 4.2"), (0xFFFE09, b"rain 0.0 mm"), (0x000107, b"")]
    enc = BlockEncoder(EncoderSettings(block_size=k, repair=m), session=1)
    link = []
    for flow, data in flows_and_data:
        link += enc.send(data, flow, now=0.0)
    repairs = [wire.parse(p, max_datagram=1400) for p in link[k:]]
    length = 7 + max(len(d) for _, d in flows_and_data)
    symbols = np.zeros((k, length), dtype=np.uint8)
    for row, ((flow, data), seq) in enumerate(zip(flows_and_data, (0, 0, 1), strict=True)):
        framed = flow.to_bytes(3, "big") + len(data).to_bytes(2, "big") + seq.to_bytes(2, "big") + data
        symbols[row, : len(framed)] = np.frombuffer(framed, dtype=np.uint8)
    vandermonde = field.Vandermonde(field.primitive_element, k, k + m)
    generator = np.linalg.inv(vandermonde[:, :k]) @ vandermonde
    expected = generator[:, k:].T @ field(symbols)
    assert [r.k for r in repairs] == [k, k] and [r.esi for r in repairs] == [k, k + 1]
    assert [r.symbol for r in repairs] == [bytes(np.asarray(row, dtype=np.uint8)) for row in expected]


def _stream(k, m, blocks, *, flush_after=None):
    """Link packets of ``blocks`` consecutive blocks, grouped per block."""
    enc = BlockEncoder(EncoderSettings(block_size=k, repair=m), session=5)
    grouped = []
    for b in range(blocks):
        out = []
        for i in range(k if flush_after is None else flush_after):
            out += enc.send(bytes([b, i]) * 3, 0, now=b)
        if flush_after is not None:
            out += enc.on_timer(b + 1.0)
        grouped.append(out)
    return grouped


def test_every_source_packet_tells_the_previous_blocks_k():
    grouped = _stream(4, 1, 3, flush_after=3)  # timer-closed blocks of 3
    previous = [[wire.parse(p, max_datagram=1400) for p in block][0].previous_k for block in grouped]
    assert previous == [0, 3, 3]


def test_a_lost_tail_with_all_its_repair_is_still_counted():
    grouped = _stream(4, 1, 2)
    dec = BlockDecoder()
    events = feed(dec, grouped[0][:2], now=1.0)  # sources 2, 3 and the repair are lost
    events += feed(dec, grouped[1][:1], now=1.1)  # the next block says block 0 had k=4
    events += dec.on_timer(5.0)
    block0 = [r for r in reports(events) if r.sbn == 0][0]
    assert block0.k == 4 and block0.lost == 2 and block0.unrecovered == 2


def test_a_block_lost_whole_is_counted():
    grouped = _stream(4, 1, 3)
    dec = BlockDecoder()
    events = feed(dec, grouped[0] + grouped[2], now=1.0)  # block 1 never arrives
    events += dec.on_timer(5.0)
    block1 = [r for r in reports(events) if r.sbn == 1][0]
    assert block1.k == 4 and block1.lost == 4 and block1.outcome == "expired"
    assert dec.stats.lost == 4 and dec.stats.unrecovered == 4


def test_a_late_lost_block_still_recovers_after_being_presumed_lost():
    grouped = _stream(4, 2, 3)
    dec = BlockDecoder()
    events = feed(dec, grouped[0] + grouped[2], now=1.0)
    events += feed(dec, grouped[1][1:], now=1.1)  # block 1 arrives late, missing one source
    assert sorted(delivered(events)) == sorted((0, bytes([b, i]) * 3) for b in range(3) for i in range(4))
    assert dec.stats.unrecovered == 0


def test_blocks_before_the_receiver_listened_are_not_counted():
    grouped = _stream(4, 1, 4)
    dec = BlockDecoder()
    events = feed(dec, grouped[2] + grouped[3], now=1.0)  # joined at block 2
    events += dec.on_timer(5.0)
    assert dec.stats.lost == 0 and all(r.sbn in (2, 3) for r in reports(events))


@settings(max_examples=150, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    flips=st.lists(st.tuples(st.integers(0, 40), st.integers(0, 63), st.integers(1, 255)), max_size=12),
    junk=st.lists(st.binary(max_size=40), max_size=6),
)
def test_mutated_and_junk_packets_never_raise_and_state_stays_bounded(seed, flips, junk):
    # Fuzzing the decoder with genuine packets, byte-flipped copies of them and junk: every
    # input gets events (deliveries or counted drops), never an exception, and the open-block
    # table respects its bound.
    rng = random.Random(seed)
    grouped = _stream(4, 2, 5)
    link = [p for block in grouped for p in block]
    mutated = []
    for index, offset, xor in flips:
        original = bytearray(link[index % len(link)])
        original[offset % len(original)] ^= xor
        mutated.append(bytes(original))
    stream = link + mutated + junk
    rng.shuffle(stream)
    dec = BlockDecoder(DecoderSettings(max_open_blocks=3, max_datagram=64))
    now = 0.0
    for data in stream:
        now += 0.01
        dec.receive(data, None, now)
        dec.on_timer(now)
        assert dec.open_blocks <= 3
    dec.on_timer(now + 10)
    assert dec.next_deadline() is None


def test_blackout_deep_reordering_and_duplication_leave_no_stuck_blocks_and_no_growth():
    # A 1000 datagrams/s stream over a link that goes dark for 3 s, reorders packets up to 200
    # places and sends every packet twice: each datagram is delivered at most once and intact,
    # everything outside the blackout arrives, and nothing is held once the hold time has passed.
    enc = BlockEncoder(EncoderSettings(block_size=8, repair=2, flush_interval=0.02), session=77)
    link = []  # (time, packet)
    sent = {}
    now = 0.0
    for seq in range(6000):
        now = seq * 0.001
        data = seq.to_bytes(4, "big") + bytes(seq % 50)
        sent[seq] = data
        for packet in enc.send(data, 1, now) + enc.on_timer(now):
            if not 2.0 <= now < 5.0:  # the blackout
                link.append((now, packet))
    rng = random.Random(5)
    reordered = []
    for start in range(0, len(link), 200):
        chunk = link[start : start + 200]
        rng.shuffle(chunk)
        reordered += chunk
    dec = BlockDecoder(DecoderSettings(max_open_blocks=64))
    got = []
    peak = 0
    for index, (sent_at, packet) in enumerate(reordered):
        at = max(sent_at, reordered[index - 1][0] if index else 0.0)
        for copy in (packet, packet):
            got += [e.data for e in dec.receive(copy, None, at) if isinstance(e, Delivery)]
        dec.on_timer(at)
        peak = max(peak, dec.held_bytes)
        assert dec.open_blocks <= 64
    dec.on_timer(now + 10)
    assert dec.open_blocks == 0 and dec.held_bytes == 0 and dec.next_deadline() is None
    assert len(got) == len(set(got))  # nothing twice
    assert set(got) <= set(sent.values())  # nothing corrupted
    outside = {data for seq, data in sent.items() if not 2.0 <= seq * 0.001 < 5.0}
    assert outside <= set(got)
    assert peak <= dec.settings.max_memory_bytes
