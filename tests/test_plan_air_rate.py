"""``fecproxy plan`` with an air rate: air time of source and repair, a burst's queueing delay as
the pacer produces it, codes that do not fit refused, overheads above 1 with repair above source."""

from __future__ import annotations

import json

import pytest

from fecproxy.cli import main as cli_main
from fecproxy.linkmodel.airtime import BudgetError, LinkBudget, parse_rate
from fecproxy.protocol import wire
from fecproxy.protocol.pacer import Pacer, PacketKind


def run(capsys, *argv: str) -> tuple[int, str, str]:
    status = cli_main(["plan", *argv])
    out, err = capsys.readouterr()
    return status, out, err


def test_rates_take_si_suffixes():
    assert parse_rate("9.6k") == 9600 and parse_rate("2M") == 2e6 and parse_rate("256000") == 256000
    with pytest.raises(BudgetError):
        parse_rate("fast")


def test_the_planned_burst_delay_is_the_pacers():
    """A 50-datagram still through the pacer, each full block's repair queued after its k-th datagram:
    the last datagram's wait must be the plan's figure (same arithmetic, computed two ways)."""
    k, m, burst, size, rate = 16, 8, 50, 1200, 256_000
    budget = LinkBudget(rate_bps=rate, datagram_bytes=size, burst_datagrams=burst, queue_ms=4000)
    pacer: Pacer[None] = Pacer(rate, 4.0)
    source = b"s" * (wire.SOURCE_HEADER_BYTES + size)
    repair = b"r" * (wire.REPAIR_HEADER_BYTES + wire.SYMBOL_PREFIX_BYTES + size)
    for i in range(burst):
        pacer.send(source, PacketKind.SOURCE, 0.0, None)
        if (i + 1) % k == 0:
            for _ in range(m):
                pacer.send(repair, PacketKind.REPAIR, 0.0, None)
    now, last_source = 0.0, None
    while True:
        for d in pacer.datagrams_to_send(now):
            if d.kind is PacketKind.SOURCE:
                last_source = d.waited
        deadline = pacer.next_deadline()
        if deadline is None:
            break
        now = deadline
    assert budget.burst_delay(k, m) == pytest.approx(last_source, rel=1e-6)
    assert pacer.counters.dropped_of(PacketKind.REPAIR) == 0 and budget.burst_fits(k, m)


def test_a_code_that_overflows_the_air_rate_is_never_recommended(capsys):
    status, out, _ = run(
        capsys, "--loss", "0.03", "--burst", "2", "--rate", "30", "--link-rate", "256k",
        "--datagram-bytes", "1200", "--json",
    )  # fmt: skip
    data = json.loads(out)
    assert status == 1 and data["recommended"] is None
    assert all(not c["within_air"] for c in data["candidates"])  # 30 × 1270 B = 305 kbit/s of source alone
    status, out, _ = run(
        capsys, "--loss", "0.03", "--burst", "2", "--rate", "10", "--link-rate", "200k", "--datagram-bytes", "1200",
        "--burst-datagrams", "50", "--queue-ms", "4000", "--flush-ms", "600", "--latency-ms", "800",
        "--max-overhead", "1", "--json",
    )  # fmt: skip
    data = json.loads(out)
    best = data["recommended"]
    assert best is not None and best["source_air"] + best["repair_air"] <= 1.0
    for c in data["candidates"]:
        assert c["within_air"] == (c["source_air"] + c["repair_air"] <= 1.0 + 1e-9)


def test_a_burst_that_overflows_the_queue_is_refused_with_the_reason(capsys):
    status, out, _ = run(
        capsys, "--loss", "0.01", "--rate", "10", "--link-rate", "256k", "--datagram-bytes", "1200",
        "--burst-datagrams", "50", "--queue-ms", "1000", "--k-values", "16",
    )  # fmt: skip
    assert "misses" in out and "queue" in out and status == 1


def test_overhead_above_one_needs_repair_above_source_and_then_answers_telemetry(capsys):
    argv = ("--loss", "0.05", "--burst", "3", "--rate", "2", "--latency-ms", "1000", "--max-overhead", "2")
    status, _, err = run(capsys, *argv)
    assert status == 2 and "--allow-repair-above-source" in err
    status, out, _ = run(capsys, *argv, "--allow-repair-above-source", "--json")
    data = json.loads(out)
    rows = {(c["k"], c["m"]) for c in data["candidates"]}
    assert (1, 2) in rows  # a repetition-like code: one datagram sent three times
    assert any(c["m_effective"] >= c["k_effective"] for c in data["candidates"])


def test_evaluation_mode_prints_air_use_and_burst_delay(capsys):
    status, out, _ = run(
        capsys, "--k", "16", "--m", "8", "--loss", "0.03", "--rate", "10", "--link-rate", "256k",
        "--datagram-bytes", "1200", "--burst-datagrams", "50", "--queue-ms", "4000",
    )  # fmt: skip
    assert status == 0
    assert "air rate used:" in out and "burst queueing delay:" in out


def test_air_options_without_a_link_rate_are_refused(capsys):
    status, _, err = run(capsys, "--loss", "0.01", "--rate", "10", "--burst-datagrams", "5")
    assert status == 2 and "--link-rate" in err
