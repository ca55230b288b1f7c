"""The ``auth`` config section: key files read at load time, refused when unsafe, never shown."""

from __future__ import annotations

import os
import textwrap
from pathlib import Path

import pytest
import yaml

from fecproxy import cli
from fecproxy.commands.check import EXIT_INVALID, EXIT_VALID
from fecproxy.config import ConfigError, load_config, parse_config_text, schema
from fecproxy.protocol.keys import MasterKey

KEY_A = "a1" * 32
KEY_B = "b2" * 32

BASE = """\
role: sender
listen: 127.0.0.1:5000
link:
  bind: 127.0.0.1:0
  peer: 127.0.0.1:7000
"""


def write_key(path: Path, text: str, mode: int = 0o600) -> Path:
    path.write_text(text)
    os.chmod(path, mode)
    return path


def write_config(tmp_path: Path, auth: str) -> Path:
    path = tmp_path / "sender.yaml"
    path.write_text(BASE + "auth:\n" + textwrap.indent(textwrap.dedent(auth), "  "))
    return path


def errors_of(path: Path) -> str:
    with pytest.raises(ConfigError) as caught:
        load_config(path)
    return "\n".join(caught.value.messages)


def test_no_auth_section_means_off():
    config = parse_config_text(BASE)
    assert not config.auth.enabled and config.auth.key is None
    assert config.effective()["auth"] == {"key_file": None, "previous_key_file": None, "encrypt": False}


def test_key_files_are_read_relative_to_the_config(tmp_path):
    write_key(tmp_path / "link.key", KEY_A + "\n")
    write_key(tmp_path / "old.key", " ".join(KEY_B[i : i + 16] for i in range(0, 64, 16)))
    config = load_config(write_config(tmp_path, "key_file: link.key\nprevious_key_file: old.key\n"))
    assert config.auth.enabled
    assert config.auth.key == MasterKey(bytes.fromhex(KEY_A))
    assert config.auth.previous_key == MasterKey(bytes.fromhex(KEY_B))
    assert config.auth.key_file == "link.key"


def test_the_key_never_shows_in_repr_or_effective_settings(tmp_path):
    write_key(tmp_path / "link.key", KEY_A)
    config = load_config(write_config(tmp_path, "key_file: link.key\n"))
    shown = repr(config) + repr(config.auth) + str(config.effective()) + yaml.safe_dump(config.effective())
    assert KEY_A[:16] not in shown and "\\xa1" not in shown
    assert config.effective()["auth"] == {"key_file": "link.key", "previous_key_file": None, "encrypt": False}


def test_check_shows_the_path_and_key_id_never_the_key(tmp_path, capsys):
    write_key(tmp_path / "link.key", KEY_A)
    path = write_config(tmp_path, "key_file: link.key\n")
    assert cli.main(["check", str(path)]) == EXIT_VALID
    out = capsys.readouterr().out
    assert KEY_A[:16] not in out
    assert f"key id 0x{MasterKey(bytes.fromhex(KEY_A)).key_id:02x}" in out
    assert yaml.safe_load(out)["auth"]["key_file"] == "link.key"


@pytest.mark.parametrize("mode", [0o640, 0o644, 0o604, 0o660])
def test_a_key_file_others_can_read_is_refused_with_chmod(tmp_path, mode, capsys):
    key = write_key(tmp_path / "link.key", KEY_A, mode)
    path = write_config(tmp_path, "key_file: link.key\n")
    message = errors_of(path)
    assert f"{path}: auth.key_file: {key}: the key file is open to" in message
    assert f"chmod 600 {key}" in message
    assert cli.main(["check", str(path)]) == EXIT_INVALID
    err = capsys.readouterr().err
    assert f"chmod 600 {key}" in err and KEY_A[:16] not in err


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("", "empty"),
        (KEY_A[:-1], "63 hexadecimal digits"),
        (KEY_A[:-1] + "g", "not a hexadecimal digit"),
        ("é" * 32, "not a hexadecimal digit"),
    ],
)
def test_a_malformed_key_file_is_refused_without_echoing_it(tmp_path, text, fragment):
    key = write_key(tmp_path / "link.key", text)
    message = errors_of(write_config(tmp_path, "key_file: link.key\n"))
    assert f"{key}: " in message and fragment in message and f"fecproxy keygen {key}" in message
    if text:
        assert text[:10] not in message


def test_missing_unreadable_special_and_huge_key_files(tmp_path, monkeypatch):
    config = write_config(tmp_path, "key_file: absent.key\n")
    assert f"{tmp_path / 'absent.key'}: no such key file; create one with `fecproxy keygen" in errors_of(config)
    (tmp_path / "dir.key").mkdir(mode=0o700)
    assert "not a regular file" in errors_of(write_config(tmp_path, "key_file: dir.key\n"))
    write_key(tmp_path / "huge.key", "0" * 10_000)
    assert "not a key file" in errors_of(write_config(tmp_path, "key_file: huge.key\n"))
    write_key(tmp_path / "locked.key", KEY_A)
    real_open = os.open

    def refuse(path, *args, **kwargs):  # tests run as root, who can read any file
        if str(path).endswith("locked.key"):
            raise PermissionError(13, "Permission denied")
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(os, "open", refuse)
    message = errors_of(write_config(tmp_path, "key_file: locked.key\n"))
    assert "cannot read the key file (Permission denied)" in message and "LoadCredential=" in message


def test_both_key_files_are_checked_and_reported_together(tmp_path):
    write_key(tmp_path / "link.key", KEY_A, 0o644)
    write_key(tmp_path / "old.key", "nope")
    message = errors_of(write_config(tmp_path, "key_file: link.key\nprevious_key_file: old.key\n"))
    assert "auth.key_file:" in message and "auth.previous_key_file:" in message


def test_the_same_key_twice_is_refused(tmp_path):
    write_key(tmp_path / "link.key", KEY_A)
    write_key(tmp_path / "copy.key", KEY_A.upper())
    assert "same key as auth.key_file" in errors_of(
        write_config(tmp_path, "key_file: link.key\nprevious_key_file: copy.key\n")
    )
    with pytest.raises(ConfigError, match="same file as auth.key_file"):
        parse_config_text(BASE + "auth:\n  key_file: a.key\n  previous_key_file: a.key\n")


@pytest.mark.parametrize(
    "auth, fragment",
    [
        ("previous_key_file: old.key", 'auth.previous_key_file: "old.key" is set without auth.key_file'),
        ("encrypt: true", "auth.encrypt: true needs auth.key_file"),
        ("encrypt: yes please", 'auth.encrypt: "yes please" is a string; expected true or false'),
        ("key_file: 5", "auth.key_file: 5 is an integer; expected the path of a key file"),
        ("key_file: ''", "is not a usable path"),
        ("key: " + KEY_A, "auth.key: unknown key; valid keys here are key_file"),
    ],
)
def test_schema_faults(auth, fragment):
    with pytest.raises(ConfigError) as caught:
        parse_config_text(BASE + "auth:\n  " + auth + "\n")
    assert fragment in str(caught.value)
    assert KEY_A[:16] not in str(caught.value)


def test_encrypt_without_the_crypto_package_says_how_to_install_it(monkeypatch):
    monkeypatch.setattr(schema, "crypto_available", lambda: False)
    with pytest.raises(ConfigError) as caught:
        parse_config_text(BASE + "auth:\n  key_file: a.key\n  encrypt: true\n")
    assert "auth.encrypt: true needs the cryptography package" in str(caught.value)
    assert "pip install 'fecproxy[crypto]'" in str(caught.value)


def test_encrypt_with_the_crypto_package(tmp_path):
    pytest.importorskip("cryptography")
    write_key(tmp_path / "link.key", KEY_A)
    config = load_config(write_config(tmp_path, "key_file: link.key\nencrypt: true\n"))
    assert config.auth.encrypt is True and config.auth.key is not None


def test_run_refuses_a_key_file_with_wrong_permissions(tmp_path, capsys):
    key = write_key(tmp_path / "link.key", KEY_A, 0o644)
    path = write_config(tmp_path, "key_file: link.key\n")
    assert cli.main(["run", str(path)]) == 2
    err = capsys.readouterr().err
    assert f"chmod 600 {key}" in err and KEY_A[:16] not in err
