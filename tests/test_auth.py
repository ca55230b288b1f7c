"""Packet protection (fecproxy.protocol.auth): known answers, tamper cases, rollover, replay.

Nothing here uses a socket or a clock except the printed micro-benchmark at the end.
"""

from __future__ import annotations

import hashlib
import hmac
import os

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from support.keys import needs_crypto

from fecproxy.protocol import auth, keys, wire
from fecproxy.protocol.replay import ReplayWindow

crypto_available = pytest.importorskip  # alias, used inside tests that need cryptography

OLD = keys.MasterKey(bytes.fromhex("11" * 32))
NEW = keys.MasterKey(bytes.fromhex("22" * 32))
STRANGER = keys.MasterKey(bytes.fromhex("33" * 32))
SESSION = 0x0A0B0C0D
SOURCE = wire.encode_source(SESSION, 0x000102, 3, 5, b"wx", end=True, previous_k=16)
REPAIR = wire.encode_repair(SESSION, 0xFFFFFE, 6, 4, bytes.fromhex("0102000001 4d56a5"))  # a 5-byte prefix at least
CONTROL = bytes([wire.VERSION << 4 | wire.PacketType.CONTROL, 0]) + SESSION.to_bytes(4, "big") + bytes(4) + b"report"

MODES = [pytest.param(False, id="mac"), pytest.param(True, id="encrypted")]


def ring(current=OLD, previous=None, *, encrypt=False) -> auth.Keyring:
    needs_crypto(encrypt)
    return auth.Keyring(current, previous, encrypt=encrypt)


# ------------------------------------------------------------------ outside known answers


@pytest.mark.parametrize(
    "key, data, expected",
    [
        # RFC 4231 §4.2, Test Case 1 (HMAC-SHA-256).  Transcribed from memory of the RFC.
        (b"\x0b" * 20, b"Hi There", "b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"),
        # RFC 4231 §4.3, Test Case 2 (key shorter than the block).  From memory of the RFC.
        (b"Jefe", b"what do ya want for nothing?", "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"),
        # RFC 4231 §4.6, Test Case 5: output truncated to 128 bits, as our tag is.  From memory.
        (b"\x0c" * 20, b"Test With Truncation", "a3b6167473100ee06e0c796c2955552b"),
    ],
)
def test_hmac_sha256_known_answers_rfc_4231(key, data, expected):
    tag = bytes.fromhex(expected)
    assert hmac.digest(key, data, "sha256")[: len(tag)] == tag


def test_mac_tag_is_truncated_hmac_sha256_over_everything_before_it():
    packet = auth.protect(SOURCE, ring().current, 42)
    covered, tag = packet[:-16], packet[-16:]
    assert tag == hmac.new(keys.mac_key(OLD), covered, hashlib.sha256).digest()[:16]
    assert covered[:1] == SOURCE[:1] and covered[1] == SOURCE[1] | auth.FLAG_AUTH
    assert covered[2:-9] == SOURCE[2:]
    assert covered[-9] == OLD.key_id and int.from_bytes(covered[-8:], "big") == 42


def test_chacha20_poly1305_known_answer_rfc_8439():
    aead = pytest.importorskip("cryptography.hazmat.primitives.ciphers.aead")
    # RFC 8439 §2.8.2: example and test vector for AEAD_CHACHA20_POLY1305.  Key, nonce, AAD and
    # plaintext as given there; the ciphertext and tag transcribed from memory of the RFC.
    key = bytes(range(0x80, 0xA0))
    nonce = bytes.fromhex("070000004041424344454647")
    aad = bytes.fromhex("50515253c0c1c2c3c4c5c6c7")
    plaintext = (
        b"Ladies and Gentlemen of the class of '99: If I could offer you only one tip for the future, "
        b"sunscreen would be it."
    )
    ciphertext_head = bytes.fromhex("d31a8d34648e60db7b86afbc53ef7ec2a4aded51296e08fea9e2b5a736ee62d6")
    tag = bytes.fromhex("1ae10b594f09e26a7e902ecbd0600691")
    sealed = aead.ChaCha20Poly1305(key).encrypt(nonce, plaintext, aad)  # our call order: nonce, data, aad
    assert sealed[:32] == ciphertext_head
    assert sealed[-16:] == tag
    assert len(sealed) == len(plaintext) + 16


def test_encrypted_packet_follows_the_documented_layout():
    aead = pytest.importorskip("cryptography.hazmat.primitives.ciphers.aead")
    packet = auth.protect(REPAIR, ring(encrypt=True).current, (9 << 32) + 5)
    header, body, trailer_head, tag = packet[:10], packet[10:-25], packet[-25:-16], packet[-16:]
    assert header == REPAIR[:1] + bytes([auth.FLAG_AUTH | auth.FLAG_ENCRYPTED]) + REPAIR[2:10]
    assert body != REPAIR[10:] and len(body) == len(REPAIR) - 10
    nonce = SESSION.to_bytes(4, "big") + ((9 << 32) + 5).to_bytes(8, "big")  # session ‖ sequence
    plain = aead.ChaCha20Poly1305(keys.aead_key(OLD)).decrypt(nonce, body + tag, header + trailer_head)
    assert plain == REPAIR[10:]


# ------------------------------------------------------------------ round trips


def test_the_trailer_fits_the_room_the_wire_format_keeps_for_it():
    assert auth.TRAILER_BYTES <= wire.AUTH_TAG_RESERVE_BYTES


@pytest.mark.parametrize("encrypt", MODES)
@pytest.mark.parametrize("packet", [SOURCE, REPAIR, CONTROL], ids=["source", "repair", "control"])
def test_round_trip_gives_back_the_version_1_packet(encrypt, packet):
    keyring = ring(encrypt=encrypt)
    sealer = auth.Sealer(keyring.current, salt=3)
    protected = sealer.seal(packet)
    assert len(protected) == len(packet) + auth.TRAILER_BYTES
    verified = auth.verify(protected, keyring)
    assert verified.packet == packet
    assert (verified.key_id, verified.sequence, verified.session) == (OLD.key_id, 3 << 32, SESSION)
    assert not verified.previous_key
    wire.parse(verified.packet, max_datagram=1400)  # parses as if never protected
    assert sealer.seal(packet) != protected  # next sequence: never the same bytes twice


@settings(max_examples=60, deadline=None)
@given(data=st.binary(max_size=300), sequence=st.integers(0, (1 << 64) - 1), flow=st.integers(0, 255))
def test_any_source_packet_round_trips_in_mac_mode(data, sequence, flow):
    packet = wire.encode_source(SESSION, 7, 1, flow, data)
    keyring = auth.Keyring(OLD)
    assert auth.verify(auth.protect(packet, keyring.current, sequence), keyring).packet == packet


def test_sealer_counts_up_from_its_salt_and_stops_before_wrapping():
    sealer = auth.Sealer(ring().current, salt=(1 << auth.SALT_BITS) - 1)
    assert sealer.next_sequence == ((1 << 31) - 1) << 32
    sealer.next_sequence = (1 << 64) - 1
    sealer.seal(SOURCE)
    with pytest.raises(auth.SequenceExhausted):
        sealer.seal(SOURCE)
    with pytest.raises(ValueError):
        auth.first_sequence(1 << auth.SALT_BITS)


def test_protect_refuses_a_packet_that_is_already_protected_or_headless():
    key = ring().current
    with pytest.raises(ValueError):
        auth.protect(auth.protect(SOURCE, key, 1), key, 2)
    with pytest.raises(ValueError):
        auth.protect(SOURCE[:9], key, 1)


# ------------------------------------------------------------------ rejections


def reject(packet: bytes, keyring: auth.Keyring) -> auth.AuthError:
    with pytest.raises(auth.AuthError) as caught:
        auth.verify(packet, keyring)
    assert caught.value.reason == "auth"
    return caught.value


@pytest.mark.parametrize("encrypt", MODES)
def test_every_single_bit_flip_is_rejected(encrypt):
    keyring = ring(encrypt=encrypt)
    protected = auth.protect(SOURCE, keyring.current, 77)
    for bit in range(len(protected) * 8):
        damaged = bytearray(protected)
        damaged[bit // 8] ^= 1 << (bit % 8)
        error = reject(bytes(damaged), keyring)
        assert error.kind in {"bad_tag", "unknown_key", "no_tag", "mode_mismatch"}, bit


@pytest.mark.parametrize("encrypt", MODES)
def test_truncated_and_extended_packets_are_rejected(encrypt):
    keyring = ring(encrypt=encrypt)
    protected = auth.protect(REPAIR, keyring.current, 1)
    for size in range(len(protected)):
        error = reject(protected[:size], keyring)
        assert error.kind in {"truncated", "bad_tag", "unknown_key", "no_tag", "mode_mismatch"}
    assert reject(protected[: auth.MIN_PROTECTED_BYTES - 1], keyring).kind == "truncated"
    assert reject(protected + b"\0", keyring).kind in {"bad_tag", "unknown_key"}


@pytest.mark.parametrize("encrypt", MODES)
def test_forgeries_are_rejected(encrypt):
    keyring = ring(encrypt=encrypt)
    genuine = auth.protect(SOURCE, keyring.current, 10)
    # A forger who knows the format and the key id but not the key.
    forged = genuine[:-16] + os.urandom(16)
    assert reject(forged, keyring).kind == "bad_tag"
    # Changing the FEC payload ID (SBN) of an authentic packet: RFC 6363 §9.3.
    moved = genuine[:6] + b"\x00\x00\x09" + genuine[9:]
    assert reject(moved, keyring).kind == "bad_tag"
    # A plain version-1 packet where a tag is required.
    assert reject(SOURCE + bytes(auth.TRAILER_BYTES), keyring).kind == "no_tag"
    # Junk of every short length.
    for size in range(60):
        with pytest.raises(auth.AuthError):
            auth.verify(os.urandom(size), keyring)


def test_stripping_the_encrypted_flag_is_caught_as_a_mode_mismatch():
    keyring = ring(encrypt=True)
    protected = bytearray(auth.protect(SOURCE, keyring.current, 10))
    protected[1] &= ~auth.FLAG_ENCRYPTED
    error = reject(bytes(protected), keyring)
    assert error.kind == "mode_mismatch" and "does not encrypt" in str(error)


@pytest.mark.parametrize("encrypt", MODES)
def test_a_packet_under_another_key_names_both_key_ids(encrypt):
    here = ring(OLD, encrypt=encrypt)
    there = ring(STRANGER, encrypt=encrypt)
    error = reject(auth.protect(SOURCE, there.current, 1), here)
    if STRANGER.key_id != OLD.key_id:
        assert error.kind == "unknown_key" and error.key_id == STRANGER.key_id
        assert f"0x{STRANGER.key_id:02x}" in str(error) and f"0x{OLD.key_id:02x}" in str(error)
        assert "different key files" in str(error)
        assert f"fingerprint {OLD.fingerprint}" in str(error)  # what the peer's log is compared with


def test_a_different_key_with_the_same_id_fails_the_tag_not_the_lookup():
    keyring = ring(OLD)
    impostor = auth.PacketKey(OLD.key_id, keys.mac_key(STRANGER), None)
    error = reject(auth.protect(SOURCE, impostor, 1), keyring)
    # The 1-byte ids agree (1 time in 256 for two random keys): the fingerprint tells them apart.
    assert error.kind == "bad_tag" and f"fingerprint {OLD.fingerprint}" in str(error)


@pytest.mark.parametrize("sender_encrypts", [True, False])
def test_encrypt_set_on_one_side_only_says_so(sender_encrypts):
    pytest.importorskip("cryptography")
    sender, receiver = ring(encrypt=sender_encrypts), ring(encrypt=not sender_encrypts)
    error = reject(auth.protect(SOURCE, sender.current, 1), receiver)
    assert error.kind == "mode_mismatch" and "auth.encrypt" in str(error)


def test_no_key_text_ever_appears_in_reprs_or_errors():
    keyring = ring(NEW, OLD)
    shown = [repr(keyring), repr(keyring.current), repr(keyring.previous)]
    error = reject(auth.protect(SOURCE, ring(STRANGER).current, 1), keyring)
    shown.append(str(error))
    for text in shown:
        for secret in (NEW.secret(), OLD.secret(), keys.mac_key(NEW), keys.mac_key(OLD)):
            assert secret.hex()[:12] not in text


# ------------------------------------------------------------------ rollover


@pytest.mark.parametrize("encrypt", MODES)
def test_rollover_accepts_both_keys_and_says_which(encrypt):
    receiver = ring(NEW, OLD, encrypt=encrypt)
    old_sender, new_sender = ring(OLD, encrypt=encrypt), ring(NEW, encrypt=encrypt)
    from_old = auth.verify(auth.protect(SOURCE, old_sender.current, 1), receiver)
    from_new = auth.verify(auth.protect(SOURCE, new_sender.current, 2), receiver)
    assert from_old.packet == from_new.packet == SOURCE
    assert (from_old.key_id, from_old.previous_key) == (OLD.key_id, True)
    assert (from_new.key_id, from_new.previous_key) == (NEW.key_id, False)
    # After the rollover, the old key alone is refused.
    reject(auth.protect(SOURCE, old_sender.current, 3), ring(NEW, encrypt=encrypt))


def test_rollover_with_colliding_key_ids_tries_both():
    secrets = [bytes([value]) * 32 for value in range(256)]
    by_id: dict[int, bytes] = {}
    pair = None
    for secret in secrets:
        master = keys.MasterKey(secret)
        if master.key_id in by_id:
            pair = keys.MasterKey(by_id[master.key_id]), master
            break
        by_id[master.key_id] = secret
    assert pair is not None, "256 keys and 1-byte ids: a collision is certain (pigeonhole needs 257, birthday ~20)"
    first, second = pair
    receiver = auth.Keyring(first, second)
    assert len(receiver.candidates(first.key_id)) == 2
    for master in pair:
        assert auth.verify(auth.protect(SOURCE, auth.Keyring(master).current, 1), receiver).packet == SOURCE


# ------------------------------------------------------------------ replay


@pytest.mark.parametrize("encrypt", MODES)
def test_replays_are_rejected_after_the_tag_and_forgeries_do_not_move_the_window(encrypt):
    keyring = ring(encrypt=encrypt)
    window = ReplayWindow(64)
    sealer = auth.Sealer(keyring.current, salt=1)
    packets = [sealer.seal(SOURCE) for _ in range(100)]
    for packet in packets[10:]:
        auth.open_packet(packet, keyring, window)
    with pytest.raises(auth.ReplayedPacket) as caught:
        auth.open_packet(packets[50], keyring, window)  # duplicate inside the window
    assert caught.value.reason == "replay" and "duplicate" in str(caught.value)
    with pytest.raises(auth.ReplayedPacket, match="too old"):
        auth.open_packet(packets[0], keyring, window)  # behind the window
    # A forged packet far ahead fails its tag and leaves the window where it was.
    highest = window.highest
    ahead = auth.protect(SOURCE, keyring.current, highest + 10**6)
    forged = ahead[:-1] + bytes([ahead[-1] ^ 1])
    with pytest.raises(auth.AuthError):
        auth.open_packet(forged, keyring, window)
    assert window.highest == highest
    assert window.check(highest + 1).accepted


def test_reordered_packets_inside_the_window_are_all_accepted_once():
    keyring = ring()
    window = ReplayWindow(128)
    sealer = auth.Sealer(keyring.current, salt=0)
    packets = [sealer.seal(REPAIR) for _ in range(100)]
    order = list(range(100))
    order[10:90] = reversed(order[10:90])  # a late run, as an interleaver or a multipath hop gives
    for index in order:
        assert auth.open_packet(packets[index], keyring, window).sequence == index
    for index in order:
        with pytest.raises(auth.ReplayedPacket):
            auth.open_packet(packets[index], keyring, window)


def test_peek_reads_only_fixed_offsets():
    protected = auth.protect(SOURCE, ring().current, 12345)
    assert auth.peek_trailer(protected) == (SESSION, OLD.key_id, 12345)


# ------------------------------------------------------------------ failure log


def test_failure_notice_logs_once_per_interval_and_counts_the_rest():
    notice = auth.FailureNotice(interval=60)
    error = auth.AuthError("unknown_key", "packet made with key id 0x01, this side has 0x02", 1)
    assert "key id 0x01" in notice.note(error, now=0.0)
    assert notice.note(error, now=1.0) is None
    assert notice.note(error, now=59.9) is None
    assert notice.note(auth.AuthError("bad_tag", "x"), now=2.0) is not None  # another kind
    assert "2 more since the last report" in notice.note(error, now=60.0)
    assert notice.note(error, now=61.0) is None


def test_a_short_plain_packet_is_reported_as_untagged_not_truncated():
    # A peer without a key sends plain packets, some shorter than a trailer: say what is wrong.
    short = wire.encode_source(SESSION, 1, 0, 0, b"")
    assert len(short) < auth.MIN_PROTECTED_BYTES
    assert reject(short, ring()).kind == "no_tag"
    assert reject(short[:5], ring()).kind == "truncated"
    with pytest.raises(auth.AuthError) as caught:
        auth.open_packet(short, ring(), ReplayWindow())
    assert caught.value.kind == "no_tag"
