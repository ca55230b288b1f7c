"""The decoder's fast path is only an optimisation: with it and without it, the same packets give
the same events (peer addresses learned included), the same counters and the same session table.

The fast path handles a source packet of the followed session and such a repair packet of a block
already finished without building a packet object; ``BlockDecoder._receive_general`` is the path
every packet could take.  Hypothesis feeds both the same streams of valid, duplicated, late,
reordered and bit-flipped packets of one or two sender sessions.
"""

from __future__ import annotations

import itertools

from hypothesis import given, settings
from hypothesis import strategies as st
from support.decoding import receive_noting_peer

from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings


def link_packets(k: int, m: int, datagrams: list[tuple[bytes, int]], session: int) -> list[bytes]:
    encoder = BlockEncoder(EncoderSettings(block_size=k, repair=m, max_datagram=24), session)
    packets: list[bytes] = []
    for i, (data, flow) in enumerate(datagrams):
        packets += encoder.send(data, flow, 0.001 * i)
    # A loss report about the other direction travels on the same link (ControlReceived).
    packets.append(encoder.control(bytes(56)))
    return packets + encoder.close()


datagram = st.tuples(st.binary(max_size=24), st.sampled_from([0, 1, 0x000101, 0xFFFFFF]))  # packed flow ids
step = st.tuples(
    st.integers(0, 10_000),  # which link packet (modulo: repeats give duplicates, order is free)
    st.booleans(),  # flip a byte?
    st.integers(0, 40),  # where
    st.integers(1, 255),  # with what
    st.sampled_from([0.0, 0.0, 0.001, 0.3, 0.6]),  # time to the packet (hold time is 0.5 s)
)


@settings(max_examples=150, deadline=None)
@given(
    k=st.integers(1, 6),
    m=st.integers(0, 3),
    first=st.lists(datagram, min_size=1, max_size=20),
    second=st.lists(datagram, max_size=20),
    steps=st.lists(step, min_size=1, max_size=80),
    max_datagram=st.sampled_from([24, 12]),
    max_open_blocks=st.sampled_from([2, 256]),
)
def test_fast_and_general_paths_agree(k, m, first, second, steps, max_datagram, max_open_blocks):
    link = link_packets(k, m, first, session=0x1111)
    if second:  # a restarted sender: a second session whose packets mix with the first's
        link += link_packets(k, m, second, session=0x2222)
    decoder_settings = DecoderSettings(max_datagram=max_datagram, max_open_blocks=max_open_blocks)
    fast = BlockDecoder(decoder_settings, learn_peer=True)
    general = BlockDecoder(decoder_settings, learn_peer=True)
    general.receive = general._receive_general  # the test hook: no fast path
    now = 0.0
    for index, flip, offset, xor, step_time in steps:
        data = link[index % len(link)]
        if flip:
            changed = bytearray(data)
            changed[offset % len(changed)] ^= xor
            data = bytes(changed)
        if step_time:
            now += step_time
            assert fast.on_timer(now) == general.on_timer(now)
        source = ("127.0.0.1", 1000 + index % 3)  # the peer's address moves now and then
        assert fast.receive(data, source, now) == general.receive(data, source, now)
        assert fast.stats == general.stats
        assert (fast.sessions, fast.session, fast.held_bytes, fast.open_blocks) == (
            general.sessions,
            general.session,
            general.held_bytes,
            general.open_blocks,
        )
        assert fast.next_deadline() == general.next_deadline()
    assert fast.close() == general.close()
    assert fast.stats == general.stats


def test_an_invalid_packet_bearing_the_followed_session_does_not_keep_it_alive():
    """Only valid packets count as the followed session's activity, on either path: a bad one
    (here an undefined flag) must not hold off a restarted sender's taking the replies."""
    old = link_packets(4, 1, [(b"a", 0)] * 2, session=0x1111)
    new = link_packets(4, 1, [(b"b", 0)] * 8, session=0x2222)  # established: 8 sources
    bad = bytearray(old[1])
    bad[1] |= 0x40  # a flag this version does not define
    for hooked in (False, True):
        decoder = BlockDecoder()
        if hooked:
            decoder.receive = decoder._receive_general
        decoder.receive(old[0], None, 1.0)
        events, in_session = receive_noting_peer(decoder, bytes(bad), 1.4)
        assert not in_session and [e.reason for e in events] == ["unsupported"]
        for packet in new:  # 0.6 s after the old session's last valid packet
            decoder.receive(packet, None, 1.6)
        assert decoder.session == 0x2222


@settings(max_examples=100, deadline=None)
@given(
    k=st.integers(1, 6),
    m=st.integers(0, 3),
    first=st.lists(datagram, min_size=1, max_size=20),
    second=st.lists(datagram, max_size=20),
    steps=st.lists(step, min_size=1, max_size=80),
    cuts=st.lists(st.integers(1, 12), min_size=1, max_size=20),
    max_open_blocks=st.sampled_from([2, 256]),
)
def test_a_batch_gives_the_events_of_its_packets_one_by_one(k, m, first, second, steps, cuts, max_open_blocks):
    """``receive_batch`` rebuilds the blocks a read makes decodable together (recover_many), yet
    gives the same events in the same order, the same counters and the same table as ``receive``
    packet by packet, on the fast path and on the general one."""
    link = link_packets(k, m, first, session=0x1111)
    if second:
        link += link_packets(k, m, second, session=0x2222)
    decoder_settings = DecoderSettings(max_datagram=24, max_open_blocks=max_open_blocks)
    single = BlockDecoder(decoder_settings, learn_peer=True)
    batched = BlockDecoder(decoder_settings, learn_peer=True)
    general = BlockDecoder(decoder_settings, learn_peer=True)
    general.receive = general._receive_general  # receive_batch over the general path
    packets = []
    for index, flip, offset, xor, _ in steps:
        data = link[index % len(link)]
        if flip:
            changed = bytearray(data)
            changed[offset % len(changed)] ^= xor
            data = bytes(changed)
        packets.append((data, ("127.0.0.1", 1000 + index % 3)))
    now, start = 0.0, 0
    for number, cut in enumerate(itertools.cycle(cuts)):
        if start >= len(packets):
            break
        read = packets[start : start + cut]
        start += cut
        now += steps[number % len(steps)][4]
        assert single.on_timer(now) == batched.on_timer(now) == general.on_timer(now)
        expected = [event for data, source in read for event in single.receive(data, source, now)]
        assert batched.receive_batch(read, now) == expected
        assert general.receive_batch(read, now) == expected
        assert single.stats == batched.stats == general.stats
        assert (single.sessions, single.held_bytes, single.open_blocks) == (
            batched.sessions,
            batched.held_bytes,
            batched.open_blocks,
        )
        assert single.next_deadline() == batched.next_deadline()
    assert single.close() == batched.close()
    assert single.stats == batched.stats


def test_blocks_decodable_in_one_read_are_rebuilt_by_one_codec_call():
    """Eight (4, 2) blocks each missing one or two datagrams, in one read: one recover_many for
    them all, and every datagram delivered once, each block's before its report."""
    encoder = BlockEncoder(EncoderSettings(block_size=4, repair=2, max_datagram=24), 0x3333)
    read = []
    sent = [bytes([i]) * 10 for i in range(32)]
    for i, data in enumerate(sent):
        packets = encoder.send(data, 0, 0.0)
        read += [(p, None) for p in packets if not (i % 4 == 1 or (i % 8 == 2 and p[0] == packets[0][0]))]
    decoder = BlockDecoder()
    events = decoder.receive_batch(read, 1.0)
    assert (decoder.rebuilds.calls, decoder.rebuilds.blocks) == (1, 8)
    delivered = [e.data for e in events if type(e).__name__ == "Delivery"]
    assert sorted(delivered) == sorted(sent) and len(delivered) == 32
    assert decoder.stats.recovered == 12 and decoder.stats.unrecovered == 0
