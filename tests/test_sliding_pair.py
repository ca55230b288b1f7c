"""Whole-process: a ``fecproxy run`` pair with ``fec.code: sliding`` through the lossy relay.

The sender alone chooses the code; the receiver decodes what arrives (its own fec.code is for
its replies).  Harness: ``support/daemon_pair.py`` and the ``pairs`` fixture of conftest.py.
"""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import pytest
from support.daemon_pair import drain, send_paced
from support.lossy_relay import iid_loss

from fecproxy.config import ConfigError, parse_config

SLIDING = {"code": "sliding", "window": 16, "repair_interval": 4}


def test_sliding_pair_rebuilds_losses_and_never_corrupts(pairs):
    """20 % i.i.d. loss on the sliding code: many datagrams rebuilt, whatever arrives is bit-exact,
    every datagram accounted for as delivered or unrecovered."""
    count = 1200
    pair = pairs(sender_fec=SLIDING, forward=iid_loss(0.20, seed=11), record=True)
    client = pair.client(stream=3)
    send_paced(client.send, count, rate=1000)
    drain(pair, count)
    assert pair.server.corrupted == 0
    received = Counter(pair.server.received)
    assert max(received.values()) == 1, "a datagram was delivered twice"
    assert set(received) <= {(3, seq) for seq in range(count)}
    metrics = pair.receiver.metrics()
    assert metrics[("fecproxy_datagrams_recovered_total", ())] > 0.05 * count
    assert metrics[("fecproxy_datagrams_delivered_total", ())] == len(received)
    assert len(received) + metrics[("fecproxy_datagrams_unrecovered_total", ())] == count
    started = pair.sender.events("started")[0]
    assert started["code"] == "sliding" and started["window"] == "16" and started["repair_interval"] == "4"
    sent = pair.sender.metrics()
    assert sent[("fecproxy_repair_packets_sent_total", ())] >= count // 4


def test_sliding_sender_shows_its_window_in_metrics_and_readme(pairs):
    pair = pairs(sender_fec={**SLIDING, "repair_interval": 2})
    metrics = pair.sender.metrics()
    assert metrics[("fecproxy_sliding_window_packets", ())] == 16
    assert metrics[("fecproxy_sliding_repair_interval_packets", ())] == 2
    info = [labels for (name, labels) in metrics if name == "fecproxy_info"]
    assert ("fec_code", "sliding") in info[0]
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    for name in ("fecproxy_sliding_window_packets", "fecproxy_sliding_repair_interval_packets", "`fec.code`"):
        assert name in readme


BASE = {"role": "sender", "listen": "127.0.0.1:5000", "link": {"bind": "127.0.0.1:6000", "peer": "127.0.0.1:6001"}}


@pytest.mark.parametrize(
    "fec, key, words",
    [
        ({"code": "sliding", "interleave": 2}, "fec.interleave", "fec.code is sliding"),
        ({"code": "sliding", "size_classes": [300]}, "fec.size_classes", "one window for all datagram sizes"),
        ({"code": "sliding", "window": 4, "repair_interval": 8}, "fec.repair_interval", "repair_interval ≤ window"),
        ({"code": "convolutional"}, "fec.code", "block or sliding"),
    ],
)
def test_check_refuses_what_the_sliding_code_cannot_use(fec, key, words):
    with pytest.raises(ConfigError) as caught:
        parse_config({**BASE, "fec": fec})
    assert any(key in line and words in line for line in caught.value.messages), caught.value.messages


def test_sliding_config_with_default_size_classes_and_adapt_is_valid():
    config = parse_config({**BASE, "fec": {"code": "sliding", "adapt": {}}})
    assert config.fec.code == "sliding" and config.fec.window == 32


def test_demo_runs_the_sliding_code():
    """``fecproxy demo --code sliding``: the same scenario with the sliding-window code."""
    import contextlib
    import io
    import re

    from fecproxy import cli

    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        status = cli.main(["demo", "--code", "sliding", "--seconds", "3", "--no-live", "--metrics-port", "0"])
    text = out.getvalue()
    assert status == 0
    assert "sliding-window code (RFC 8681)" in text and "with FEC (sliding window 64, 1 repair per 2)" in text
    assert re.search(r"corrupted datagrams\s+–\s+0\n", text)


@pytest.mark.slow
def test_bench_pipeline_runs_the_sliding_code(capsys):
    import json
    import multiprocessing

    from fecproxy import cli

    children_before = set(multiprocessing.active_children())
    assert cli.main(["bench", "pipeline", "--quick", "--code", "sliding", "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert {trial["pipeline"] for trial in result["trials"]} == {"plain", "pair"}
    assert all(trial["sent"] > 0 and trial["received"] > 0 for trial in result["trials"] if trial["pipeline"] == "pair")
    assert set(multiprocessing.active_children()) <= children_before
