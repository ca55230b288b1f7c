"""`fecproxy check SENDER.yaml RECEIVER.yaml`: the two sides checked against each other, and the
single-side warnings (README "Caution", "Link security")."""

from __future__ import annotations

from pathlib import Path

import pytest
from support.processes import run_to_exit

from fecproxy import cli
from fecproxy.commands.check import EXIT_INVALID, EXIT_VALID
from fecproxy.commands.keygen import write_key_file

ROOT = Path(__file__).resolve().parents[1]
#: Every shipped pair: each *sender*.yaml in config/ with the receiver.yaml of the same name.
SHIPPED_PAIRS = [
    (path.name, path.name.replace("sender", "receiver")) for path in sorted((ROOT / "config").glob("*sender*.yaml"))
]

SENDER = """\
role: sender
listen: 127.0.0.1:5000
link: {{bind: 127.0.0.1:7001, peer: 127.0.0.1:7000}}
fec: {{block_size: 16, repair: 4, flush_ms: 40, max_datagram_bytes: {mtu}}}
decoder: {{hold_ms: 500}}
flows: {{max: 64}}
{auth}
"""
RECEIVER = """\
role: receiver
forward: 127.0.0.1:6000
link: {{bind: 127.0.0.1:7000, peer: 127.0.0.1:7001}}
fec: {{block_size: 8, repair: 2, flush_ms: {flush}, max_datagram_bytes: 1400}}
decoder: {{hold_ms: {hold}}}
flows: {{max: {flows}}}
{auth}
"""


def write_pair(tmp_path: Path, *, sender: dict, receiver: dict) -> tuple[str, str]:
    s, r = tmp_path / "s.yaml", tmp_path / "r.yaml"
    s.write_text(SENDER.format(**({"mtu": 1400, "auth": ""} | sender)))
    r.write_text(RECEIVER.format(**({"flush": 20, "hold": 500, "flows": 64, "auth": ""} | receiver)))
    return str(s), str(r)


def run_check(capsys, *argv: str) -> tuple[int, list[str]]:
    status = cli.main(["check", *argv])
    return status, capsys.readouterr().err.splitlines()


@pytest.mark.parametrize(("sender", "receiver"), SHIPPED_PAIRS)
def test_shipped_pairs_agree(capsys, sender, receiver):
    assert len(SHIPPED_PAIRS) >= 2
    status, err = run_check(capsys, str(ROOT / "config" / sender), str(ROOT / "config" / receiver))
    assert status == EXIT_VALID, err
    assert all(": warning: " in line for line in err), err


def test_a_matching_pair_passes_quietly(capsys, tmp_path):
    status, err = run_check(capsys, *write_pair(tmp_path, sender={}, receiver={}))
    assert (status, err) == (EXIT_VALID, [])


def test_a_mismatched_pair_names_every_fault_once_with_side_and_key(capsys, tmp_path):
    (tmp_path / "a.key").write_text("11" * 32 + "\n")
    (tmp_path / "a.key").chmod(0o600)
    (tmp_path / "b.key").write_text("22" * 32 + "\n")
    (tmp_path / "b.key").chmod(0o600)
    s, r = write_pair(
        tmp_path,
        sender={"mtu": 1200, "auth": "auth: {key_file: a.key}"},
        # hold 30 ms < sender flush 40 ms; the receiver's own flush 600 ms > the sender's hold 500 ms.
        receiver={"flush": 600, "hold": 30, "flows": 16, "auth": "auth: {key_file: b.key}"},
    )
    status, err = run_check(capsys, s, r)
    assert status == EXIT_INVALID
    *faults, summary = err
    assert summary == f"{s} + {r}: mismatched pair (6 errors)"
    expected = [
        f"{r}: fec.max_datagram_bytes: 1400, but {s} has 1200",
        f"{r}: auth.key_file: accepts fingerprint ",  # the sender's key is not among the receiver's
        f"{s}: auth.key_file: accepts fingerprint ",  # and the other way round
        f"{r}: decoder.hold_ms: 30 is below {s}'s fec.flush_ms 40",
        f"{s}: decoder.hold_ms: 500 is below {r}'s fec.flush_ms 600",
        f"{r}: flows.max: 16 is below {s}'s flows.max 64",
    ]
    assert len(faults) == len(expected), faults
    for line, start in zip(faults, expected, strict=True):
        assert line.startswith(start), (line, start)


def test_keys_on_one_side_only_and_encrypt_mismatch(capsys, tmp_path):
    write_key_file(str(tmp_path / "link.key"), bytes(range(32)))
    s, r = write_pair(tmp_path, sender={"auth": "auth: {key_file: link.key}"}, receiver={})
    status, err = run_check(capsys, s, r)
    assert status == EXIT_INVALID
    assert err[0].startswith(f"{r}: auth.key_file: not set, but {s} has a key")


def test_same_key_file_passes_and_check_shows_the_fingerprint(capsys, tmp_path):
    write_key_file(str(tmp_path / "link.key"), bytes(range(32)))
    auth = "auth: {key_file: link.key}"
    s, r = write_pair(tmp_path, sender={"auth": auth}, receiver={"auth": auth})
    status = cli.main(["check", s, r])
    out = capsys.readouterr().out
    assert status == EXIT_VALID
    from fecproxy.protocol.keys import MasterKey

    fingerprint = MasterKey(bytes(range(32))).fingerprint
    assert len(fingerprint) == 16 and out.count(f"fingerprint {fingerprint}") == 2


def test_delay_spread_is_added_to_the_flush_time(capsys, tmp_path):
    s, r = write_pair(tmp_path, sender={}, receiver={"hold": 100})
    assert run_check(capsys, s, r)[0] == EXIT_VALID
    status, err = run_check(capsys, "--delay-spread-ms", "80", s, r)
    assert status == EXIT_INVALID
    assert err[0] == (
        f"{r}: decoder.hold_ms: 100 is below {s}'s fec.flush_ms 40 + the stated delay spread 80 ms = 120 ms; "
        f"expected hold_ms ≥ 120 (a block would expire before its repair packets arrive)"
    )


def test_sides_in_the_wrong_order(capsys, tmp_path):
    s, r = write_pair(tmp_path, sender={}, receiver={})
    status, err = run_check(capsys, r, s)
    assert status == EXIT_INVALID
    assert err[:2] == [
        f"{r}: role: receiver; expected sender (give the sender's file first)",
        f"{s}: role: sender; expected receiver (give the sender's file first)",
    ]


def test_warnings_for_an_open_link_without_key_and_wildcard_metrics(capsys, tmp_path):
    path = tmp_path / "r.yaml"
    path.write_text(
        "role: receiver\nforward: 127.0.0.1:6000\nlink: {bind: 0.0.0.0:7000}\nmetrics: {listen: '[::]:11465'}\n"
    )
    status, err = run_check(capsys, "--quiet", str(path))
    assert status == EXIT_VALID
    assert [line.split(": warning: ")[0] for line in err] == [
        f"{path}: link.bind",
        f"{path}: link.peer",
        f"{path}: metrics.listen",
    ]


def test_pair_check_as_a_process():
    result = run_to_exit("check", "config/trial-sender.yaml", "config/trial-receiver.yaml", timeout=60, cwd=ROOT)
    assert result.returncode == 0, result.stderr
    assert "the pair agrees" in result.stdout


def test_link_budget_repair_air_time_and_pacing_on_one_side_only(capsys, tmp_path):
    """A paced sender's repair packets leave after their air time: the receiver's hold must
    cover it; pacing on one side only and different MTUs are warned of."""
    s, r = tmp_path / "s.yaml", tmp_path / "r.yaml"
    s.write_text(
        "role: sender\nlisten: 127.0.0.1:5000\n"
        "link: {bind: 127.0.0.1:7001, peer: 127.0.0.1:7000, rate: 9600, queue_ms: 2000, mtu: 576}\n"
        "fec: {block_size: 4, repair: 2, flush_ms: 100, max_datagram_bytes: 256}\n"
    )
    r.write_text(
        "role: receiver\nforward: 127.0.0.1:6000\nlink: {bind: 127.0.0.1:7000, peer: 127.0.0.1:7001}\n"
        "fec: {block_size: 4, repair: 2, flush_ms: 20, max_datagram_bytes: 256}\ndecoder: {hold_ms: 200}\n"
    )
    from fecproxy.config import load_config
    from fecproxy.config.pair import _repair_air_ms
    from fecproxy.protocol import wire

    # Two repair packets of header + symbol prefix + 256 bytes + IPv4/UDP 28 bytes at 9600 bit/s.
    air = _repair_air_ms(load_config(s))
    expected_air = 2 * (wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + 256 + 28) * 8 / 9600 * 1000
    assert air == pytest.approx(expected_air, abs=1)
    status, err = run_check(capsys, str(s), str(r))
    assert status == EXIT_INVALID
    assert err[0] == (
        f"{r}: decoder.hold_ms: 200 is below {s}'s fec.flush_ms 100 + the repair's air time {air} ms at its "
        f"link.rate = {100 + air} ms; expected hold_ms ≥ {100 + air} (a block would expire before its repair "
        f"packets arrive)"
    )
    warned = [line.split(": warning: ")[0] for line in err if ": warning: " in line]
    assert f"{r}: link.mtu" in warned and f"{r}: link.rate" in warned


def test_in_order_wait_shorter_than_a_rebuild_is_warned_of(capsys, tmp_path):
    s, r = write_pair(tmp_path, sender={}, receiver={"auth": "delivery: {order: in_order, max_wait_ms: 10}"})
    status, err = run_check(capsys, s, r)
    assert status == EXIT_VALID
    assert err == [
        f"{r}: delivery.max_wait_ms: warning: 10 is below the 40 ms a gap may take to be rebuilt ({s}'s "
        f"fec.flush_ms, plus air time and delay spread): such gaps are skipped although repair is on its way"
    ]


def test_a_sliding_window_sender_is_checked_without_block_rules(capsys, tmp_path):
    s, r = write_pair(tmp_path, sender={}, receiver={"hold": 30})
    Path(s).write_text(Path(s).read_text().replace("fec: {", "fec: {code: sliding, window: 32, "))
    status, err = run_check(capsys, s, r)
    assert status == EXIT_INVALID  # the flush rule still holds: a pause's repair leaves at flush_ms
    assert [line.split(":")[1] for line in err[:-1]] == [" decoder.hold_ms"]
