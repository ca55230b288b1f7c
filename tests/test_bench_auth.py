"""``fecproxy bench auth``: the cost of protecting a packet, printed beside parsing it.

Figures are for people to read and never asserted (the machine is shared); this checks that the
command measures every step and prints each as a ratio to its baseline.
"""

import json

import pytest

from fecproxy.cli import main


def test_every_step_is_measured_and_printed_as_a_ratio_to_parsing(capsys):
    assert main(["bench", "auth", "--rounds", "1", "--calls", "5", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert list(rows)[0] == "baseline: wire.parse"
    assert {"HMAC-SHA-256 protect", "HMAC-SHA-256 verify", "replay check + commit"} <= set(rows)
    assert all(micros > 0 for micros in rows.values())
    assert main(["bench", "auth", "--rounds", "1", "--calls", "5"]) == 0
    table = capsys.readouterr().out
    assert "per 1200-byte packet, best of 1 rounds:" in table
    assert table.count("× wire.parse") == len(rows)


def test_the_encrypted_rows_come_with_cryptography(capsys):
    pytest.importorskip("cryptography")
    assert main(["bench", "auth", "--rounds", "1", "--calls", "5", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert {"ChaCha20-Poly1305 protect", "ChaCha20-Poly1305 verify"} <= set(rows)
