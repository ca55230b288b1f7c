"""Link keys for tests: key files written as an operator would, keyed pair configs, and the skip
for the encrypted mode when the optional cryptography package is missing."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import pytest

#: Two keys of the link-key text format (64 hex digits), different from each other.
KEY_A = "a1" * 32
KEY_B = "b2" * 32


def needs_crypto(encrypt: bool) -> None:
    """The encrypted mode needs the optional cryptography package: skip without it."""
    if encrypt:
        pytest.importorskip("cryptography")


def write_key(path: Path, text: str) -> None:
    """A new key file, mode 0600 from its creation, never over an existing file."""
    descriptor = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(descriptor, "w") as file:
        file.write(text + "\n")


def keyed(tmp_path: Path, sender_key: str = KEY_A, receiver_key: str = KEY_A, encrypt: bool = False) -> dict[str, Any]:
    """Pair keyword arguments for keyed configs (key files beside the configs, mode 0600)."""
    write_key(tmp_path / "sender.key", sender_key)
    write_key(tmp_path / "receiver.key", receiver_key)
    return dict(
        sender_extra={"auth": {"key_file": "sender.key", "encrypt": encrypt}},
        receiver_extra={"auth": {"key_file": "receiver.key", "encrypt": encrypt}},
    )
