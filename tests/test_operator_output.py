"""What a running daemon tells its operator: /metrics against the README table, the gauges of an
idle receiver, the decoded code, the periodic stats line, and ``plan --from-metrics`` on an idle
receiver, all from real ``fecproxy run`` / ``fecproxy impair`` processes on 127.0.0.1.

The README check is generic: it scrapes every family a daemon (and the impairment relay) exposes
and requires each name in the README's metrics table, so a new metric cannot go undocumented.
"""

from __future__ import annotations

import math
import re
import socket
import urllib.request
from pathlib import Path

import pytest
from support.daemon_pair import drain, send_paced
from support.processes import Child, fecproxy, run_to_exit

from fecproxy import cli
from fecproxy.commands import EXIT_CANNOT_START, EXIT_INVALID, EXIT_MEANINGS, EXIT_UNREADABLE

README = (Path(__file__).resolve().parent.parent / "README.md").read_text()
LOOPBACK = "127.0.0.1"


def _metrics_table_names() -> set[str]:
    """Every metric name written in the first column of the README's metrics tables."""
    section = README.split("### Metrics", 1)[1].split("\n## ", 1)[0]
    names: set[str] = set()
    for line in section.splitlines():
        if line.startswith(("| `fecproxy_", "| `process_")):
            first_column = line.split("|")[1]
            names.update(re.findall(r"`((?:fecproxy|process|python)_[a-z0-9_]+)", first_column))
    return names


def _families(url: str) -> tuple[set[str], str]:
    """Family names as the exposition's ``# TYPE`` lines give them (counters with ``_total``)."""
    with urllib.request.urlopen(url, timeout=5) as response:
        page = response.read().decode()
    return set(re.findall(r"^# TYPE (\S+) ", page, flags=re.MULTILINE)), page


def _undocumented(families: set[str]) -> set[str]:
    documented = _metrics_table_names()
    return {name for name in families if name not in documented}


def test_every_family_a_daemon_pair_exposes_is_in_the_readme_table(pairs):
    pair = pairs(sender_extra={"log": {"level": "info", "format": "text", "stats_interval_s": 1}})
    client = pair.client(1)
    send_paced(client.send, 192, rate=4000.0)  # 16 datagrams in 4 ms: full blocks, not flushed short
    drain(pair, 192)
    exposed: set[str] = set()
    for daemon in (pair.sender, pair.receiver):
        families, page = _families(f"http://{LOOPBACK}:{daemon.metrics_port}/metrics")
        assert "fecproxy_info" in families and "fecproxy_recovery_delay_seconds" in families
        assert not _undocumented(families), f"add to README's metrics table: {sorted(_undocumented(families))}"
        assert "_created" not in page
        exposed |= families
    # ... and back: a name the table lists is one a daemon serves (a renamed metric leaves no ghost).
    # impair's are checked with the relay below; fecproxy_sliding_* only with fec.code: sliding.
    stale = {
        name
        for name in _metrics_table_names()
        if name.startswith("fecproxy_")
        and not name.startswith(("fecproxy_impair_", "fecproxy_sliding_"))
        and name not in exposed
        and name.removesuffix("_total") not in exposed
    }
    assert not stale, f"README's metrics table lists what no daemon serves: {sorted(stale)}"
    # The receiver decodes the sender's code (k=16, m=4), seen in its repair packets ...
    assert pair.receiver.metric("fecproxy_received_code_source_symbols") == 16
    assert pair.receiver.metric("fecproxy_received_code_repair_symbols") == 4
    code = pair.receiver.wait_event("peer_code", 5)
    assert (code["k"], code["m"]) == ("16", "4")
    assert pair.receiver.started["decoding"] == "peer's code unknown until traffic"
    assert pair.receiver.started["sends"] == "replies"
    # ... and the sender logs a stats line each second with the counters since the last one.
    stats = pair.sender.wait_event("stats", 10)
    for field in (
        "datagrams_in",
        "datagrams_out",
        "link_packets_in",
        "link_packets_out",
        "link_loss",
        "residual_loss",
        "recovered",
        "dropped",
        "flows",
    ):
        assert field in stats, field
    lines = pair.sender.events("stats")
    assert sum(int(line["datagrams_in"]) for line in lines) <= 192


def test_an_idle_receiver_exposes_its_estimate_as_nan_and_plan_says_no_traffic(pairs):
    pair = pairs()
    receiver = pair.receiver
    for name in (
        "fecproxy_link_loss_ratio",
        "fecproxy_link_mean_burst_packets",
        "fecproxy_received_code_source_symbols",
        "fecproxy_received_code_repair_symbols",
    ):
        assert math.isnan(receiver.metric(name)), name
    url = f"http://{LOOPBACK}:{receiver.metrics_port}/metrics"
    done = run_to_exit("plan", "--from-metrics", url, "--rate", "30")
    assert done.returncode != 0
    assert "no traffic measured yet" in done.stderr, done.stderr
    assert not receiver.events("stats")  # the default interval is a minute


def test_every_family_the_impairment_relay_exposes_is_in_the_readme_table():
    far = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    far.bind((LOOPBACK, 0))
    relay = Child(
        fecproxy(
            "impair",
            "--listen",
            f"{LOOPBACK}:0",
            "--to",
            f"{LOOPBACK}:{far.getsockname()[1]}",
            "--metrics",
            f"{LOOPBACK}:0",
            "--seconds",
            "30",
        )
    )
    try:
        url = relay.wait_for(r"^metrics: (\S+)").group(1)
        families, page = _families(url)
        assert families and all(name.startswith(("fecproxy_impair_", "process_", "python_")) for name in families)
        assert not _undocumented(families), f"add to README's metrics table: {sorted(_undocumented(families))}"
        listed = {name for name in _metrics_table_names() if name.startswith("fecproxy_impair_")}
        stale = {name for name in listed if name not in families and name.removesuffix("_total") not in families}
        assert not stale, f"README's impair table lists what the relay does not serve: {sorted(stale)}"
        assert "_created" not in page
    finally:
        relay.stop()
        far.close()


def _help(capsys, *argv: str) -> str:
    with pytest.raises(SystemExit) as exited:
        cli.main([*argv, "--help"])
    assert exited.value.code == 0
    return capsys.readouterr().out


@pytest.mark.parametrize(
    "argv", [[], *([name] for name in cli.COMMANDS), ["bench", "codec"], ["bench", "pipeline"], ["bench", "auth"]]
)
def test_help_speaks_to_users_not_to_the_source_tree(capsys, argv):
    text = _help(capsys, *argv)
    assert not re.search(r"fecproxy\.[a-z]|\.py\b|:mod:|\bmodule\b", text), text
    assert "(default: None)" not in text and "(default: False)" not in text, text


def test_check_and_run_document_the_same_exit_statuses(capsys):
    check, run = _help(capsys, "check"), _help(capsys, "run")
    for status in (EXIT_UNREADABLE, EXIT_INVALID):
        meaning = f"{status} = {EXIT_MEANINGS[status]}"
        assert meaning in " ".join(check.split()) and meaning in " ".join(run.split())
    assert f"{EXIT_CANNOT_START} = " in run
    assert f"| {EXIT_CANNOT_START} |" in README and f"| {EXIT_UNREADABLE} |" in README
