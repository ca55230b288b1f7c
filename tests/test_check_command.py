"""`fecproxy check`: effective settings on stdout and exit 0, or every fault on stderr and exit 2."""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest
import yaml
from support.processes import run_to_exit

from fecproxy import cli
from fecproxy.commands.check import EXIT_INVALID, EXIT_UNREADABLE, EXIT_VALID
from fecproxy.config import parse_config, parse_config_text

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "config"
#: A whole process (interpreter start + yaml import) takes well under a second; this only stops
#: a hung child from hanging the suite.
PROCESS_TIMEOUT_S = 60

GOOD_SENDER = """\
role: sender
listen: 127.0.0.1:5000
link:
  bind: 127.0.0.1:0
  peer: 127.0.0.1:7000
fec:
  block_size: 8
  repair: 2
"""


def run_check(capsys, *argv: str) -> tuple[int, str, str]:
    status = cli.main(["check", *argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


@pytest.mark.parametrize("name", ["sender.yaml", "receiver.yaml"])
def test_example_files_pass_check(capsys, name):
    path = EXAMPLES / name
    status, out, err = run_check(capsys, str(path))
    assert status == EXIT_VALID
    # The examples have their key commented out, and bind the link to every address: warned of.
    assert all(": warning: " in line for line in err.splitlines())
    assert out.startswith(f"# {path}: valid; effective settings")
    effective = yaml.safe_load(out)
    # The printed settings are a config in their own right and describe the same daemon.
    assert parse_config(effective, "printed") == parse_config_text(path.read_text(), str(path))


def test_output_fills_in_defaults(capsys, tmp_path):
    path = tmp_path / "s.yaml"
    path.write_text(GOOD_SENDER)
    status, out, _ = run_check(capsys, str(path))
    assert status == EXIT_VALID
    effective = yaml.safe_load(out)
    assert effective["fec"] == {
        "block_size": 8,
        "repair": 2,
        "flush_ms": 20,
        "max_datagram_bytes": 1400,
        "short_block_repair": "proportional",
        "allow_repair_above_source": False,
        "adapt": None,
        "interleave": 1,
        "size_classes": [256],
        "code": "block",
        "window": 32,
        "window_ms": 1000,
        "repair_interval": 4,
    }
    assert effective["link"] == {
        "bind": "127.0.0.1:0",
        "peer": "127.0.0.1:7000",
        "rate": None,
        "queue_ms": 1000,
        "mtu": 1500,
    }
    assert effective["forward"] is None and effective["metrics"] == {"listen": None}
    assert list(effective) == [
        "role",
        "listen",
        "forward",
        "link",
        "fec",
        "decoder",
        "delivery",
        "flows",
        "sockets",
        "log",
        "metrics",
        "reports",
        "auth",
    ]
    assert effective["reports"] == {"interval_ms": 1000}


def test_quiet_prints_nothing_when_valid(capsys, tmp_path):
    path = tmp_path / "s.yaml"
    path.write_text(GOOD_SENDER)
    assert run_check(capsys, "--quiet", str(path)) == (EXIT_VALID, "", "")


BAD_FILES = [
    # (id, file text, fragments expected on stderr)
    (
        "k + m above 255",
        GOOD_SENDER.replace("block_size: 8", "block_size: 300"),
        ["bad.yaml: fec.block_size: 300 is out of range; expected an integer 1..255 with block_size + repair ≤ 255"],
    ),
    (
        "typo in a key",
        GOOD_SENDER.replace("repair: 2", "repiar: 2"),
        ["bad.yaml: fec.repiar: unknown key; did you mean fec.repair?"],
    ),
    (
        "m above k",
        GOOD_SENDER.replace("repair: 2", "repair: 9"),
        ["bad.yaml: fec.repair: 9 is above fec.block_size 8", "RFC 6363 §8.2"],
    ),
    (
        "receiver keys on a sender",
        GOOD_SENDER + "forward: 127.0.0.1:6000\n",
        ['bad.yaml: forward: "127.0.0.1:6000" is set but role is sender'],
    ),
    (
        "bad port",
        GOOD_SENDER.replace("127.0.0.1:5000", "127.0.0.1:99999"),
        ['bad.yaml: listen: "127.0.0.1:99999" has port 99999, out of range 0..65535'],
    ),
    ("YAML syntax", GOOD_SENDER + "  - oops\n", ["bad.yaml: line 9, column 3: YAML syntax error"]),
    ("not a mapping", "- role: sender\n", ["bad.yaml: the document is a list; expected a mapping"]),
    ("empty", "", ["bad.yaml: the document is empty"]),
]


@pytest.mark.parametrize("text, fragments", [case[1:] for case in BAD_FILES], ids=[case[0] for case in BAD_FILES])
def test_bad_files_exit_2_with_messages(capsys, tmp_path, text, fragments):
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    status, out, err = run_check(capsys, str(path))
    assert status == EXIT_INVALID == 2
    assert out == ""
    for fragment in fragments:
        assert fragment.replace("bad.yaml", str(path)) in err, err
    assert err.rstrip().endswith("invalid config (1 error)")


def test_every_error_is_printed(capsys, tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text(GOOD_SENDER + "log:\n  level: loud\n  colour: true\nflows:\n  max: 0\n")
    status, _, err = run_check(capsys, str(path))
    assert status == EXIT_INVALID
    lines = err.strip().splitlines()
    assert len(lines) == 4 and lines[-1].endswith("invalid config (3 errors)")
    assert any("log.level:" in line for line in lines)
    assert any("log.colour: unknown key" in line for line in lines)
    assert any("flows.max: 0 is out of range" in line for line in lines)


def test_missing_file(capsys, tmp_path):
    path = tmp_path / "nowhere.yaml"
    status, out, err = run_check(capsys, str(path))
    assert status == EXIT_UNREADABLE != EXIT_VALID
    assert out == ""
    assert f"{path}: cannot read the file: No such file or directory" in err


def test_help_lists_the_options(capsys):
    with pytest.raises(SystemExit) as exited:
        cli.main(["check", "--help"])
    assert exited.value.code == 0
    out = capsys.readouterr().out
    assert "validate a config file" in out
    assert "CONFIG.yaml" in out and "--quiet" in out
    assert "2 = invalid config" in " ".join(out.split())  # wrapped to the terminal width


# ---------------------------------------------------------------- whole process


def run_process(*argv: str) -> subprocess.CompletedProcess:
    return run_to_exit("check", *argv, timeout=PROCESS_TIMEOUT_S, cwd=ROOT)


def test_process_accepts_the_example_sender():
    result = run_process("config/sender.yaml")
    assert result.returncode == 0, result.stderr
    assert result.stderr.startswith(
        "config/sender.yaml: link.bind: warning: 0.0.0.0:7000 is reachable from other hosts"
    )
    effective = yaml.safe_load(result.stdout)
    assert effective["role"] == "sender" and effective["link"]["peer"] == "192.0.2.10:7000"


def test_process_rejects_a_bad_file(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text(GOOD_SENDER.replace("block_size: 8", "blocksize: 8").replace("127.0.0.1:7000", "127.0.0.1"))
    result = run_process(str(path))
    assert result.returncode == 2
    assert result.stdout == ""
    assert f"{path}: fec.blocksize: unknown key; did you mean fec.block_size?" in result.stderr
    assert f'{path}: link.peer: "127.0.0.1" has no port' in result.stderr
    assert "Traceback" not in result.stderr


def test_check_tells_which_max_datagram_bytes_fits_the_mtu(capsys, tmp_path):
    # Design notes §7 (RFC 791 / RFC 768 / RFC 8200): a 1500-byte MTU leaves 1472 bytes of UDP payload
    # over IPv4 and 1452 over IPv6; our repair packet adds 12 + 7 bytes of header and symbol prefix
    # (wire version 3).
    path = tmp_path / "s.yaml"
    path.write_text(GOOD_SENDER + "  max_datagram_bytes: 1460\n")
    status, out, err = run_check(capsys, str(path))
    assert status == EXIT_VALID
    assert "link.mtu: warning: 1500" in err and "fec.max_datagram_bytes ≤ 1453" in err and "IPv4" in err
    path.write_text(GOOD_SENDER)
    status, out, err = run_check(capsys, str(path))
    assert "# link.mtu 1500:" in out and "up to 1453 (IPv4) fits" in out and err == ""
