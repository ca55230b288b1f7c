"""Key files, key ids and sub-keys (fecproxy.protocol.keys): pure rules, no disk."""

from __future__ import annotations

import stat

import pytest
from hypothesis import given
from hypothesis import strategies as st

from fecproxy.protocol import keys

KEY = bytes(range(32))
KEY_HEX = KEY.hex()


def test_key_text_round_trips_and_ignores_whitespace():
    assert keys.parse_key_text(KEY_HEX + "\n", "k").secret() == KEY
    spaced = " ".join(KEY_HEX[i : i + 8] for i in range(0, 64, 8))
    assert keys.parse_key_text(f"\n  {spaced[:20]}\n\t{spaced[20:].upper()}\r\n", "k").secret() == KEY
    assert keys.format_key_text(KEY) == KEY_HEX + "\n"


@given(st.binary(min_size=32, max_size=32))
def test_format_then_parse_is_identity(secret):
    assert keys.parse_key_text(keys.format_key_text(secret), "k").secret() == secret


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("", "empty"),
        ("   \n", "empty"),
        (KEY_HEX[:-2], "has 62 hexadecimal digits"),
        (KEY_HEX + "00", "has 66 hexadecimal digits"),
        (KEY_HEX[:10] + "zz" + KEY_HEX[12:], "not a hexadecimal digit (at digit 11)"),
        ("0x" + KEY_HEX[2:], "not a hexadecimal digit"),
    ],
)
def test_malformed_key_text_names_the_file_and_the_fix_without_echoing_it(text, fragment):
    with pytest.raises(keys.KeyFileError) as caught:
        keys.parse_key_text(text, "/etc/fecproxy/link.key")
    message = str(caught.value)
    assert message.startswith("/etc/fecproxy/link.key: ")
    assert fragment in message
    assert "fecproxy keygen /etc/fecproxy/link.key" in message
    assert KEY_HEX[:16] not in message


@pytest.mark.parametrize("mode", [0o600, 0o400, 0o700, 0o200])
def test_owner_only_modes_pass(mode):
    keys.check_key_file_mode(stat.S_IFREG | mode, "k")


@pytest.mark.parametrize(
    "mode, who",
    [
        (0o640, "its group"),
        (0o604, "other users"),
        (0o644, "its group and other users"),
        (0o620, "its group"),
        (0o602, "other users"),
    ],
)
def test_modes_open_to_others_are_refused_with_chmod(mode, who):
    with pytest.raises(keys.KeyFileError) as caught:
        keys.check_key_file_mode(stat.S_IFREG | mode, "/k/link.key")
    assert f"open to {who} (mode {mode:04o})" in str(caught.value)
    assert "chmod 600 /k/link.key" in str(caught.value)


@pytest.mark.parametrize("kind", [stat.S_IFDIR, stat.S_IFIFO, stat.S_IFCHR])
def test_non_regular_files_are_refused(kind):
    with pytest.raises(keys.KeyFileError, match="not a regular file"):
        keys.check_key_file_mode(kind | 0o600, "k")


def test_master_key_never_shows_its_bytes():
    master = keys.MasterKey(KEY)
    for text in (repr(master), str(master), f"{master}", keys.key_fingerprint_text(master)):
        assert KEY_HEX[:8] not in text and "\\x" not in text
        assert f"0x{master.key_id:02x}" in text
    assert master == keys.MasterKey(KEY)
    assert master != keys.MasterKey(bytes(32))
    with pytest.raises(ValueError):
        keys.MasterKey(KEY[:31])


def test_hkdf_expand_block_matches_rfc_5869():
    # RFC 5869 Appendix A.1 (Test Case 1), SHA-256: PRK and info as given there; the first 32
    # bytes of OKM are T(1).  Values transcribed from memory of the RFC, and cross-checked below
    # against the cryptography package's HKDFExpand.
    prk = bytes.fromhex("077709362c2e32df0ddc3f0dc47bba6390b6c73bb50f9c3122ec844ad7c2b3e5")
    info = bytes.fromhex("f0f1f2f3f4f5f6f7f8f9")
    okm_first_block = bytes.fromhex("3cb25f25faacd57a90434f64d0362f2a2d2d0a90cf1a5a4c5db02d56ecc4c5bf")
    assert keys.hkdf_expand_block(prk, info) == okm_first_block


def test_hkdf_expand_block_matches_the_cryptography_package():
    crypto = pytest.importorskip("cryptography.hazmat.primitives.kdf.hkdf")
    from cryptography.hazmat.primitives import hashes

    for info in (b"", b"fecproxy packet mac v1", bytes(range(40))):
        reference = crypto.HKDFExpand(hashes.SHA256(), 32, info).derive(KEY)
        assert keys.hkdf_expand_block(KEY, info) == reference


def test_sub_keys_are_distinct_and_deterministic():
    master = keys.MasterKey(KEY)
    mac, aead = keys.mac_key(master), keys.aead_key(master)
    assert len(mac) == len(aead) == 32
    assert len({mac, aead, KEY}) == 3
    assert keys.mac_key(keys.MasterKey(KEY)) == mac
    assert master.key_id == keys.key_id(KEY) == keys.hkdf_expand_block(KEY, b"fecproxy key id v1")[0]
