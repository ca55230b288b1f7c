"""The shipped example configs: all valid, the senders' codes meet their own stated traffic and
link by `fecproxy plan`, and traffic figures and the metrics port agree across README, configs,
the demo and the Prometheus scrape config."""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import pytest
import yaml

from fecproxy import cli
from fecproxy.commands.demo import options, traffic

ROOT = Path(__file__).resolve().parent.parent
CONFIGS = sorted((ROOT / "config").glob("*.yaml"))
README = (ROOT / "README.md").read_text()
#: The target the examples are planned for (README, "Ask for a code": 1 in 1000), and the
#: overhead budget stated there (at most 50 %).
TARGET_RESIDUAL_LOSS = 1e-3
MAX_OVERHEAD = 0.5
#: fecproxy's example metrics port (README, "Metrics port"); the receiver uses the next one.
METRICS_PORT = 11464
#: Average datagrams/s of the weather-station traffic the examples describe.
STATION_RATE = 30
#: The video example's rate: 1 Mbit/s of 1316-byte datagrams (7 TS packets of 188 bytes,
#: ISO/IEC 13818-1) is 10^6 / (8 · 1316) ≈ 95 datagrams/s.
VIDEO_RATE = 95


def test_there_are_example_configs():
    names = {path.name for path in CONFIGS}
    assert {"sender.yaml", "receiver.yaml", "trial-sender.yaml", "trial-receiver.yaml"} <= names


@pytest.mark.parametrize("path", CONFIGS, ids=lambda path: path.name)
def test_every_example_passes_check(capsys, path):
    status = cli.main(["check", str(path)])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    # Only warnings: the two-site examples bind their link to every address with the key
    # commented out (README "Link security" says how to turn it on).
    assert all(": warning: " in line for line in captured.err.splitlines()), captured.err


def plan_command(path: Path) -> list[str]:
    """The `fecproxy plan --k ...` line a sender example quotes for its code."""
    found = re.search(r"fecproxy plan (--k .*)$", path.read_text(), re.M)
    assert found, f"{path.name} does not quote the plan command for its code"
    return shlex.split(found.group(1))


@pytest.mark.parametrize(
    "path", [p for p in CONFIGS if yaml.safe_load(p.read_text())["role"] == "sender"], ids=lambda path: path.name
)
def test_sender_code_meets_its_stated_traffic_and_link(capsys, path):
    argv = plan_command(path)
    options = dict(zip(argv[::2], argv[1::2], strict=True))
    fec = yaml.safe_load(path.read_text())["fec"]
    # The quoted command describes this file's code ...
    assert (int(options["--k"]), int(options["--m"]), float(options["--flush-ms"])) == (
        fec["block_size"],
        fec["repair"],
        fec["flush_ms"],
    )
    assert float(options["--rate"]) == (VIDEO_RATE if path.name.startswith("video-") else STATION_RATE)
    # ... and the planner rates it as meeting the target within the overhead budget.
    assert cli.main(["plan", *argv, "--json"]) == 0
    rated = json.loads(capsys.readouterr().out)
    assert rated["residual_loss"] <= TARGET_RESIDUAL_LOSS
    assert rated["overhead"] <= MAX_OVERHEAD


def test_traffic_figures_agree_with_the_demo_and_readme():
    # The demo's weather station: telemetry plus camera stills cut into chunks.
    demo_rate = (
        traffic.DEFAULT_TELEMETRY_RATE
        + traffic.CAMERA_IMAGE_BYTES / traffic.CAMERA_CHUNK_BYTES / traffic.CAMERA_INTERVAL_S
    )
    assert demo_rate == STATION_RATE
    assert f"{traffic.DEFAULT_TELEMETRY_RATE:g} readings a second" in README
    assert f"{STATION_RATE} datagrams a second" in README
    sender = (ROOT / "config" / "sender.yaml").read_text()
    assert (
        f"{traffic.DEFAULT_TELEMETRY_RATE:g} readings a second" in sender
        and f"{STATION_RATE} datagrams a second" in sender
    )


def test_metrics_port_agrees_everywhere():
    assert options.DEFAULT_METRICS_PORT == METRICS_PORT
    for path in CONFIGS:
        listen = (yaml.safe_load(path.read_text()).get("metrics") or {}).get("listen", "")
        if listen:
            assert int(listen.rpartition(":")[2]) in (METRICS_PORT, METRICS_PORT + 1), path.name
    scrape = yaml.safe_load((ROOT / "deploy" / "prometheus" / "prometheus.yml").read_text())
    ports = {int(t.rpartition(":")[2]) for c in scrape["scrape_configs"][0]["static_configs"] for t in c["targets"]}
    assert ports == {METRICS_PORT, METRICS_PORT + 1}
    # 9464 belongs to another widely used exporter: no example address may use it (the README
    # names it once, to say why).
    for text in (README, *(path.read_text() for path in CONFIGS)):
        assert ":9464" not in text
