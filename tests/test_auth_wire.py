"""Authentication wired into the encoder and decoder (sans-IO, fake clock): every packet sealed,
every bad one refused with its reason before it touches any block, nothing forged delivered."""

import random

import pytest
from support.decoding import receive_noting_peer
from support.keys import needs_crypto

from fecproxy.protocol import auth, freshness, keys, wire
from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import (
    ChallengeDue,
    ControlReceived,
    Delivery,
    Dropped,
    KeyCheckDue,
    SessionProven,
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


def prove(decoder: BlockDecoder, encoder: BlockEncoder, now=0.5) -> None:
    """The freshness exchange (protocol.freshness) before the test's traffic: the decoder's
    challenge for the encoder's session, answered by an echo the encoder seals."""
    challenge = decoder.freshness.challenge(encoder.session, now)
    assert challenge is not None
    echo = answer(challenge, encoder, now)
    events = decoder.receive(encoder.control(echo), None, now)
    assert len(events) == 1 and isinstance(events[0], SessionProven)


def answer(challenge: bytes, encoder: BlockEncoder, now: float, started: float = 0.0) -> bytes:
    """The echo an encoder running since ``started`` (nothing sealed before that) gives."""
    first = auth.first_sequence(7)  # every test sender's salt is 7 or its sequence starts later
    assert encoder.sealer is not None
    history = freshness.SequenceHistory(started, min(first, encoder.sealer.next_sequence))
    echo = freshness.EchoResponder().answer(challenge, encoder.session, history, encoder.sealer.next_sequence, now)
    assert echo is not None
    return echo


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
    decoder = receiver(encrypt=encrypt)
    prove(decoder, encoder)
    datagrams, packets = stream(encoder, 40)
    assert all(p[1] & wire.FLAG_AUTH for p in packets)
    assert all(bool(p[1] & wire.FLAG_ENCRYPTED) == encrypt for p in packets)
    lossy = [p for i, p in enumerate(packets) if i % 6 != 2]  # one source lost per block, rebuilt
    delivered, drops = run(decoder, lossy)
    assert sorted(delivered) == sorted(datagrams) and drops == []


@pytest.mark.parametrize("encrypt", [False, True])
def test_bit_flipped_truncated_extended_and_unkeyed_packets_never_reach_the_application(encrypt):
    needs_crypto(encrypt)
    encoder = sender(encrypt=encrypt)
    decoder = receiver(encrypt=encrypt)
    prove(decoder, encoder)
    _, packets = stream(encoder, 8)
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
    encoder, decoder = sender(), receiver()
    prove(decoder, encoder)
    datagrams, packets = stream(encoder, 12)
    delivered, drops = run(decoder, packets)
    assert delivered == datagrams
    shuffled = packets[:]
    random.Random(3).shuffle(shuffled)
    delivered, drops = run(decoder, packets + shuffled, now=1.1)
    assert delivered == [] and drops == ["replay"] * (2 * len(packets))


def test_replay_of_a_session_that_ended_is_still_a_replay():
    from fecproxy.protocol.decoder import SESSION_CONFIRM_PACKETS

    decoder = receiver()
    first, second = sender(session=1), sender(session=2, salt=9)
    prove(decoder, first)
    old_data, old = stream(first, 6)
    assert run(decoder, old)[0] == old_data
    prove(decoder, second, now=1.5)
    _, new = stream(second, SESSION_CONFIRM_PACKETS)
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
    prove(decoder, encoder)
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
    prove(decoder, encoder)
    _, packets = stream(encoder, 1)
    run(decoder, packets)
    control = encoder.control(b"\x01report")
    assert control[1] & wire.FLAG_AUTH
    events, in_session = receive_noting_peer(decoder, control, 1.0)
    assert [(e.session, e.body) for e in events if isinstance(e, ControlReceived)] == [(0x1234, b"\x01report")]
    assert len(events) == 1
    assert not in_session  # a control packet never teaches the shell its peer
    forged = wire.encode_control(0x1234, b"\x01forged")
    assert [e.reason for e in decoder.receive(forged, None, 1.0)] == ["auth"]


def test_a_stranger_without_the_key_cannot_start_or_take_a_session():
    decoder, encoder = receiver(), sender()
    prove(decoder, encoder)
    datagrams, packets = stream(encoder, 20)
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
    encoder, decoder = sender(), receiver()
    prove(decoder, encoder)
    _, packets = stream(encoder, 4)
    events = [e for p in packets for e in decoder.receive(p, None, 1.0)]
    assert [e for e in events if isinstance(e, SessionStarted)] == [SessionStarted(0x1234, None)]


def test_a_recording_replayed_to_a_restarted_receiver_delivers_nothing_and_is_challenged():
    # RFC 4303 §3.3.3: a static key's replay state does not survive a restart; RFC 7296 §2.10:
    # freshness from a nonce drawn by the new start.  A receiver that restarts has no window.
    encoder = sender()
    before = receiver()
    prove(before, encoder)
    datagrams, recording = stream(encoder, 24)
    assert run(before, recording)[0] == datagrams
    restarted = receiver()
    restarted.freshness.listening(2.0)
    events = [e for p in recording for e in restarted.receive(p, None, 2.0)]
    assert not [e for e in events if isinstance(e, (Delivery, Dropped))]  # held, not delivered
    challenges = [e for e in events if isinstance(e, ChallengeDue)]
    assert len(challenges) == 1  # once per retry interval, not once per packet
    # An attacker cannot answer (no key); a recorded echo answers an older nonce.
    old_echo = encoder.control(freshness.encode(freshness.KIND_ECHO, 0x1234, bytes(16)))
    assert [e.reason for e in restarted.receive(old_echo, None, 2.1)] == ["unproven"]
    # The live sender, running for 60 s (longer than this receiver), answers: what it sealed
    # before its echo may be a recording, so the held packets are dropped, not delivered.
    echo = answer(challenges[0].body, encoder, 2.2, started=-60.0)
    events = restarted.receive(encoder.control(echo), None, 2.2)
    assert events[0] == SessionProven(0x1234, encoder.sealer.next_sequence - 2, False, 0)
    assert [(e.reason, e.detail.split()[0]) for e in events[1:]] == [("unproven", str(len(recording)))]
    assert run(restarted, recording, now=2.3)[0] == []
    fresh, more = stream(encoder, 8, seed=5, start=2.3)
    assert run(restarted, more, now=2.4)[0] == fresh


def test_a_restarted_sender_loses_nothing_its_packets_held_until_proven_are_released():
    decoder = receiver()
    decoder.freshness.listening(0.0)
    prove(decoder, sender(session=1), now=0.1)
    restarted = sender(session=2, salt=11)  # started at 5.0, after the receiver began listening
    datagrams, packets = stream(restarted, 12, start=5.0)
    events = [e for p in packets for e in decoder.receive(p, None, 5.01)]
    assert not [e for e in events if isinstance(e, Delivery)]
    challenge = next(e for e in events if isinstance(e, ChallengeDue))
    history = freshness.SequenceHistory(5.0, auth.first_sequence(11))
    echo = freshness.EchoResponder().answer(challenge.body, 2, history, restarted.sealer.next_sequence, 5.02)
    events = decoder.receive(restarted.control(echo), None, 5.02)
    assert events[0] == SessionProven(2, auth.first_sequence(11) - 1, True, len(packets))
    assert [e.data for e in events if isinstance(e, Delivery)] == datagrams
    assert run(decoder, packets, now=5.03) == ([], ["replay"] * len(packets))  # held ones were windowed


def test_a_hello_proves_whichever_session_the_peer_runs_and_is_bounded():
    decoder, encoder = receiver(), sender()
    gate = decoder.freshness
    hello = gate.hello(0.0)
    assert freshness.parse(hello).any_session and gate.hello(0.1) is None  # not due yet
    echo = answer(hello, encoder, 0.2)
    events = decoder.receive(encoder.control(echo), None, 0.3)
    assert isinstance(events[0], SessionProven) and gate.is_proven(0x1234)
    assert gate.hello(1.0) is None and gate.hello_deadline() is None  # a session is proven: done
    quiet = receiver().freshness
    sent = [quiet.hello(t * freshness.CHALLENGE_RETRY_S) for t in range(40)]
    assert sum(body is not None for body in sent) == freshness.HELLO_TRIES


def test_held_packets_are_bounded_per_session():
    encoder, decoder = sender(k=16, m=0), receiver()
    _, packets = stream(encoder, freshness.MAX_HELD_PACKETS + 40)
    drops = run(decoder, packets)[1]
    assert drops == ["unproven"] * (len(packets) - freshness.MAX_HELD_PACKETS)


def test_a_challenge_is_answered_only_for_the_own_session_and_at_a_bounded_rate():
    responder = freshness.EchoResponder()
    history = freshness.SequenceHistory(0.0, 100)
    for step in range(1, 11):  # a checkpoint every 1/64 s (over CHECKPOINT_S), 50 packets apart
        history.note(step / 64, 100 + 50 * step)
    body = freshness.encode(freshness.KIND_CHALLENGE, 0x1234, bytes(range(16)), 45)  # listening 45 ms
    assert responder.answer(body, 0x9999, history, 700, 0.1) is None  # a predecessor's session: no echo
    echoes = [responder.answer(body, 0x1234, history, 700, 0.1) for _ in range(50)]
    assert sum(e is not None for e in echoes) == freshness.BURST
    # Received at 100 ms by a side listening for 45 ms: vouches from the 62.5 ms checkpoint on.
    assert freshness.parse(echoes[0]) == freshness.Message(freshness.KIND_ECHO, 0x1234, bytes(range(16)), 300)
    young = freshness.encode(freshness.KIND_CHALLENGE, 0x1234, bytes(16), 5000)  # listening 5 s
    assert freshness.parse(responder.answer(young, 0x1234, history, 700, 0.2)).value == 100
    late = freshness.encode(freshness.KIND_CHALLENGE, 0x1234, bytes(16), 0)  # just started
    assert freshness.parse(responder.answer(late, 0x1234, history, 700, 0.3)).value == 700
    for bad in (b"", body[:-1], body + b"\x00", body[:2] + b"\x01" + body[3:], b"\x07" + body[1:]):
        with pytest.raises(freshness.FreshnessError):
            freshness.parse(bad)
