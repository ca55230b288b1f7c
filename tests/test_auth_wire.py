"""Authentication wired into the encoder and decoder (sans-IO, fake clock): every packet sealed,
every bad one refused with its reason before it touches any block, nothing forged delivered."""

import random

import pytest
from support.decoding import receive_noting_peer
from support.keys import needs_crypto

from fecproxy.protocol import auth, keys, wire
from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import (
    ControlReceived,
    Delivery,
    Dropped,
    KeyCheckDue,
    SessionStarted,
)

OLD = keys.MasterKey(bytes.fromhex("11" * 32))
NEW = keys.MasterKey(bytes.fromhex("22" * 32))
STRANGER = keys.MasterKey(bytes.fromhex("33" * 32))


def sender(key=OLD, *, encrypt=False, session=0x1234, salt=7, k=4, m=2) -> BlockEncoder:
    sealer = auth.Sealer(auth.Keyring(key, encrypt=encrypt).current, salt)
    return BlockEncoder(EncoderSettings(block_size=k, repair=m), session, sealer=sealer)


def receiver(key=OLD, previous=None, *, encrypt=False) -> BlockDecoder:
    return BlockDecoder(DecoderSettings(), auth.Keyring(key, previous, encrypt=encrypt))


def stream(encoder: BlockEncoder, count: int, *, seed=1, start=0.0):
    """(datagrams, link packets) for ``count`` datagrams sent 1 ms apart."""
    rng = random.Random(seed)
    datagrams, packets = [], []
    for i in range(count):
        data = rng.randbytes(rng.randint(1, 80))
        datagrams.append(data)
        packets += encoder.send(data, 1, start + i * 0.001)
    packets += encoder.close()
    return datagrams, packets


def run(decoder: BlockDecoder, packets, now=1.0):
    delivered, drops = [], []
    for packet in packets:
        events = decoder.receive(packet, None, now)
        delivered += [e.data for e in events if isinstance(e, Delivery)]
        drops += [e.reason for e in events if isinstance(e, Dropped)]
    return delivered, drops


@pytest.mark.parametrize("encrypt", [False, True])
def test_every_packet_is_sealed_and_a_keyed_pair_delivers_everything(encrypt):
    needs_crypto(encrypt)
    encoder = sender(encrypt=encrypt)
    datagrams, packets = stream(encoder, 40)
    assert all(p[1] & wire.FLAG_AUTH for p in packets)
    assert all(bool(p[1] & wire.FLAG_ENCRYPTED) == encrypt for p in packets)
    lossy = [p for i, p in enumerate(packets) if i % 6 != 2]  # one source lost per block, rebuilt
    delivered, drops = run(receiver(encrypt=encrypt), lossy)
    assert sorted(delivered) == sorted(datagrams) and drops == []


@pytest.mark.parametrize("encrypt", [False, True])
def test_bit_flipped_truncated_extended_and_unkeyed_packets_never_reach_the_application(encrypt):
    needs_crypto(encrypt)
    _, packets = stream(sender(encrypt=encrypt), 8)
    decoder = receiver(encrypt=encrypt)
    sample = packets[0]
    bad = []
    for bit in range(0, len(sample) * 8, 3):
        flipped = bytearray(sample)
        flipped[bit // 8] ^= 1 << (bit % 8)
        bad.append(bytes(flipped))
    bad += [sample[:cut] for cut in (0, 5, 10, 34, len(sample) - 1)]
    bad += [sample + b"\x00", sample + bytes(40)]
    bad += [wire.encode_source(0x1234, 0, 0, 1, b"forged"), bytes(64), bytes([0xFF]) * 64]
    delivered, drops = run(decoder, bad)
    assert delivered == [] and len(drops) == len(bad)
    assert set(drops) <= {"auth", "replay"}
    assert decoder.sessions == () and decoder.held_bytes == 0  # no state from any of them
    # The genuine packets still go through afterwards: the forgeries moved no window.
    delivered, drops = run(decoder, packets)
    assert len(delivered) == 8 and drops == []


def test_replays_and_reordered_replays_are_dropped_as_replay():
    datagrams, packets = stream(sender(), 12)
    decoder = receiver()
    delivered, drops = run(decoder, packets)
    assert delivered == datagrams
    shuffled = packets[:]
    random.Random(3).shuffle(shuffled)
    delivered, drops = run(decoder, packets + shuffled, now=1.1)
    assert delivered == [] and drops == ["replay"] * (2 * len(packets))


def test_replay_of_a_session_that_ended_is_still_a_replay():
    from fecproxy.protocol.decoder import SESSION_CONFIRM_PACKETS

    old_data, old = stream(sender(session=1), 6)
    decoder = receiver()
    assert run(decoder, old)[0] == old_data
    _, new = stream(sender(session=2, salt=9), SESSION_CONFIRM_PACKETS)
    run(decoder, new, now=2.0)  # the restarted sender takes over; the old session ages out
    decoder.on_timer(3.0)
    assert decoder.sessions == (2,)
    delivered, drops = run(decoder, old, now=3.1)
    assert delivered == [] and set(drops) == {"replay"}


def test_a_wrong_key_is_refused_and_says_which_key_ids_differ():
    _, packets = stream(sender(STRANGER), 4)
    decoder = receiver()
    events, in_session = receive_noting_peer(decoder, packets[0], 1.0)
    assert not in_session and [e.reason for e in events if isinstance(e, Dropped)] == ["auth"]
    assert isinstance(events[1], KeyCheckDue)  # the peer is told too (the key check's own test: test_core_decisions)
    error = events[0].error
    assert isinstance(error, auth.AuthError) and error.kind == "unknown_key"
    notice = auth.FailureNotice()
    line = notice.note(error, 1.0)
    assert f"0x{STRANGER.key_id:02x}" in line and f"0x{OLD.key_id:02x}" in line
    assert notice.note(error, 2.0) is None  # once per interval


def test_a_plain_packet_at_a_keyed_receiver_and_a_sealed_one_at_an_unkeyed_receiver():
    _, sealed = stream(sender(), 2)
    _, plain = stream(BlockEncoder(EncoderSettings(block_size=4, repair=2), 0x1234), 2)
    assert run(receiver(), plain)[1] == ["auth"] * len(plain)
    assert run(BlockDecoder(), sealed)[1] == ["unsupported"] * len(sealed)


def test_two_key_rollover_loses_nothing():
    # Rollover as documented: the receiver accepts old and new; the sender switches keys
    # mid-stream (a reload swaps the sealer's key, the sequence runs on).
    encoder = sender(OLD)
    decoder = receiver(OLD, previous=NEW)
    first, packets = stream(encoder, 10)
    encoder.sealer.key = auth.Keyring(NEW).current
    second, more = stream(encoder, 10, seed=2, start=0.5)
    delivered, drops = run(decoder, packets + more)
    assert delivered == first + second and drops == []
    assert decoder.last_verified.previous_key  # the peer uses what this side calls previous
    # The receiver then makes the new key current: windows are kept, nothing replays.
    decoder.keyring = auth.Keyring(NEW, previous=OLD)
    third, last = stream(encoder, 5, seed=3, start=1.0)
    delivered, drops = run(decoder, last + more[:3], now=1.5)
    assert delivered == third and drops == ["replay"] * 3


def test_control_packets_are_sealed_verified_and_handed_on():
    encoder = sender()
    decoder = receiver()
    _, packets = stream(encoder, 1)
    run(decoder, packets)
    control = encoder.control(b"\x01report")
    assert control[1] & wire.FLAG_AUTH
    events, in_session = receive_noting_peer(decoder, control, 1.0)
    assert events == [ControlReceived(0x1234, b"\x01report")]
    assert not in_session  # a control packet never teaches the shell its peer
    forged = wire.encode_control(0x1234, b"\x01forged")
    assert [e.reason for e in decoder.receive(forged, None, 1.0)] == ["auth"]


def test_a_stranger_without_the_key_cannot_start_or_take_a_session():
    decoder = receiver()
    datagrams, packets = stream(sender(), 20)
    got = []
    for i, packet in enumerate(packets):
        events = decoder.receive(packet, None, 1.0 + i * 1e-3)
        got += [e.data for e in events if isinstance(e, Delivery)]
        for j in range(5):
            forged = wire.encode_source(0xBAD, i, j, 1, b"forged") + bytes(auth.TRAILER_BYTES)
            forged = forged[:1] + bytes([forged[1] | wire.FLAG_AUTH]) + forged[2:]
            assert decoder.receive(forged, None, 1.0)[0].reason == "auth"
    assert got == datagrams and decoder.sessions == (0x1234,)
    assert decoder.stats.dropped == {"auth": 5 * len(packets)}


def test_session_started_is_told_once_for_a_keyed_sender():
    _, packets = stream(sender(), 4)
    decoder = receiver()
    events = [e for p in packets for e in decoder.receive(p, None, 1.0)]
    assert [e for e in events if isinstance(e, SessionStarted)] == [SessionStarted(0x1234, None)]
