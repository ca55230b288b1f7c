"""`fecproxy keygen PATH` as a whole process: a 0600 key file, never an overwrite."""

from __future__ import annotations

import os
import stat
import subprocess
import sys
from pathlib import Path

from fecproxy.commands.keygen import EXIT_NOT_WRITTEN, EXIT_WRITTEN
from fecproxy.config import read_key_file
from fecproxy.protocol.keys import MasterKey, check_key_file_mode, parse_key_text

#: Interpreter start and one import take well under a second; this only stops a hung child.
PROCESS_TIMEOUT_S = 60


def keygen(*argv: str, umask: int | None = None) -> subprocess.CompletedProcess:
    def set_umask():
        if umask is not None:
            os.umask(umask)

    return subprocess.run(
        [sys.executable, "-m", "fecproxy", "keygen", *argv],
        capture_output=True,
        text=True,
        timeout=PROCESS_TIMEOUT_S,
        preexec_fn=set_umask,
    )


def test_writes_64_hex_digits_mode_0600_and_prints_only_the_key_id(tmp_path):
    path = tmp_path / "link.key"
    result = keygen(str(path), umask=0)  # even with a permissive umask
    assert result.returncode == EXIT_WRITTEN, result.stderr
    text = path.read_text()
    assert len(text) == 65 and text.endswith("\n") and all(c in "0123456789abcdef" for c in text[:64])
    assert stat.S_IMODE(path.stat().st_mode) == 0o600
    check_key_file_mode(path.stat().st_mode, str(path))
    key = read_key_file(path)
    assert key == parse_key_text(text, str(path))
    assert f"key id 0x{key.key_id:02x}, fingerprint {key.fingerprint}" in result.stdout
    assert text[:16] not in result.stdout + result.stderr


def test_two_keys_differ(tmp_path):
    for name in ("a.key", "b.key"):
        assert keygen(str(tmp_path / name)).returncode == EXIT_WRITTEN
    assert (tmp_path / "a.key").read_text() != (tmp_path / "b.key").read_text()


def test_refuses_to_overwrite_an_existing_file(tmp_path):
    path = tmp_path / "link.key"
    path.write_text("the peer's key\n")
    result = keygen(str(path))
    assert result.returncode == EXIT_NOT_WRITTEN
    assert f"{path}: already exists; refusing to overwrite" in result.stderr
    assert path.read_text() == "the peer's key\n"


def test_refuses_to_follow_a_symlink(tmp_path):
    target = tmp_path / "elsewhere"
    (tmp_path / "link.key").symlink_to(target)
    result = keygen(str(tmp_path / "link.key"))
    assert result.returncode == EXIT_NOT_WRITTEN
    assert not target.exists()


def test_reports_a_directory_that_does_not_exist(tmp_path):
    result = keygen(str(tmp_path / "no" / "such" / "dir.key"))
    assert result.returncode == EXIT_NOT_WRITTEN
    assert "cannot create the key file: No such file or directory" in result.stderr


def test_listed_in_help():
    result = subprocess.run(
        [sys.executable, "-m", "fecproxy", "--help"], capture_output=True, text=True, timeout=PROCESS_TIMEOUT_S
    )
    assert "keygen" in result.stdout


def test_master_key_from_generated_file_round_trips(tmp_path):
    path = tmp_path / "k"
    assert keygen(str(path)).returncode == EXIT_WRITTEN
    assert isinstance(read_key_file(Path(path)), MasterKey)
