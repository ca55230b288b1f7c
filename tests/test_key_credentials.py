"""Keys handed over by systemd (LoadCredential=, $CREDENTIALS_DIRECTORY) and the fingerprint."""

from __future__ import annotations

import os
import stat

import pytest

from fecproxy.commands.keygen import write_key_file
from fecproxy.config import ConfigError, load_config
from fecproxy.config.loading import CREDENTIALS_ENV, credential_path
from fecproxy.protocol.keys import KeyFileError, MasterKey, check_credential_mode, check_key_file_mode

REGULAR = stat.S_IFREG

CONFIG = """\
role: sender
listen: 127.0.0.1:5000
link: {bind: 127.0.0.1:0, peer: 127.0.0.1:7000}
auth: {key_file: link.key}
"""


# systemd src/core/exec-credential.c, write_credential: the file is made 0400 and root's, then
# the service user gets read access by an ACL entry (stat then shows the ACL mask, r--, in the
# group bits: 0440), or, without ACL support, by owning the file (0400, owner = service user).
@pytest.mark.parametrize(("mode", "owner"), [(0o400, 0), (0o440, 0), (0o400, 1234)])
def test_what_systemd_makes_is_accepted(mode, owner):
    check_credential_mode(REGULAR | mode, owner, 1234, "cred")


@pytest.mark.parametrize(
    ("mode", "owner", "fragment"),
    [
        (0o444, 0, "open to other users"),
        (0o460, 0, "open to other users"),  # group may write
        (0o600, 0, None),  # owner write is harmless on systemd's read-only mount
        (0o400, 999, "owned by user id 999"),
    ],
)
def test_credential_rule_refuses_what_others_could_read_or_swap(mode, owner, fragment):
    if fragment is None:
        check_credential_mode(REGULAR | mode, owner, 1234, "cred")
        return
    with pytest.raises(KeyFileError, match=fragment):
        check_credential_mode(REGULAR | mode, owner, 1234, "cred")


def test_plain_key_files_keep_the_strict_rule():
    with pytest.raises(KeyFileError, match="open to its group"):
        check_key_file_mode(REGULAR | 0o640, "link.key")


def test_a_plain_name_is_looked_up_among_the_credentials_first(tmp_path):
    credentials = tmp_path / "credentials"
    credentials.mkdir()
    (credentials / "link.key").write_text("00" * 32)
    environ = {CREDENTIALS_ENV: str(credentials)}
    assert credential_path("link.key", environ) == credentials / "link.key"
    assert credential_path("other.key", environ) is None  # not passed: read beside the config
    assert credential_path("keys/link.key", environ) is None  # a path is always a path
    assert credential_path("link.key", {}) is None  # no systemd: the file beside the config


def test_the_service_reads_the_credential_and_a_manual_run_the_file(tmp_path, monkeypatch):
    config_dir, credentials = tmp_path / "etc", tmp_path / "run-credentials"
    config_dir.mkdir()
    credentials.mkdir()
    (config_dir / "sender.yaml").write_text(CONFIG)
    write_key_file(str(config_dir / "link.key"), bytes(32))  # root's own copy, 0600
    write_key_file(str(credentials / "link.key"), bytes(range(32)))
    os.chmod(credentials / "link.key", 0o440)  # as stat shows systemd's ACL-granted credential
    monkeypatch.delenv(CREDENTIALS_ENV, raising=False)
    assert load_config(config_dir / "sender.yaml").auth.key == MasterKey(bytes(32))
    monkeypatch.setenv(CREDENTIALS_ENV, str(credentials))
    assert load_config(config_dir / "sender.yaml").auth.key == MasterKey(bytes(range(32)))
    os.chmod(credentials / "link.key", 0o444)
    with pytest.raises(ConfigError, match="the credential is open to other users"):
        load_config(config_dir / "sender.yaml")


def test_fingerprint_is_16_hex_digits_and_tells_keys_apart():
    # 8 bytes: two keys share a fingerprint with probability 2^-64 (the 1-byte id: 1 in 256).
    first, second = MasterKey(bytes(32)), MasterKey(bytes(31) + b"\x01")
    assert len(first.fingerprint) == 16 and int(first.fingerprint, 16) >= 0
    assert first.fingerprint != second.fingerprint
    assert first.fingerprint in repr(first) and "00" * 32 not in repr(first)


def test_fingerprint_is_hkdf_expand_of_its_label():
    # RFC 5869 §2.3 HKDF-Expand, computed by `cryptography` (code we did not write).
    from cryptography.hazmat.primitives import hashes
    from cryptography.hazmat.primitives.kdf.hkdf import HKDFExpand

    secret = bytes(range(32))
    expected = HKDFExpand(hashes.SHA256(), 32, b"fecproxy key fingerprint v1").derive(secret)[:8].hex()
    assert MasterKey(secret).fingerprint == expected
