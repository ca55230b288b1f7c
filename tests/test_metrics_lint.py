"""The metrics as the Prometheus ecosystem reads them: ``promtool check metrics`` (Prometheus'
own naming lint) passes with no warning on both daemons of a running pair and on the impairment
relay; each label name has one meaning across the package; every drop reason is documented and
every reason an alert names exists.

promtool comes with Debian's ``prometheus`` package (installed by .ci/run); without it the lint
tests skip (fail under CI=true), as the other tests against a real Prometheus do.
"""

from __future__ import annotations

import re
import subprocess
import urllib.request
from pathlib import Path

import yaml
from prometheus_client.parser import text_string_to_metric_families
from support.daemon_pair import LOOPBACK, drain, send_paced
from support.lossy_relay import iid_loss
from support.stand_in_view import a_receiver
from support.tools import require

from fecproxy.protocol.events import DropReason
from fecproxy.shell.metrics import build_registry
from fecproxy.shell.relay import RelayConfig, UdpRelay, _RelayCollector

ROOT = Path(__file__).resolve().parent.parent
#: The values each shared label name may take, wherever it appears (one meaning per name).
LABEL_MEANINGS = {
    "direction": {"forward", "return"},  # the link direction of the pair (fecproxy impair)
    "code": {"send", "receive"},  # the code this daemon sends with / the peer's it receives
    "change": {"up", "down"},  # an adaptation of m
    "kind": {"source", "repair", "control"},  # the kind of link packet (control: reports, key checks)
}


def _text(port: int) -> str:
    with urllib.request.urlopen(f"http://{LOOPBACK}:{port}/metrics", timeout=5) as response:
        return response.read().decode()


def promtool_check(text: str) -> subprocess.CompletedProcess:
    promtool = require("promtool")
    return subprocess.run(
        [promtool, "check", "metrics"], input=text, capture_output=True, text=True, timeout=30, check=False
    )


def test_both_daemons_metrics_pass_promtool_with_no_warning(pairs):
    pair = pairs(forward=iid_loss(0.05, seed=3))
    client = pair.client(1)
    send_paced(client.send, 300, 300.0)
    drain(pair, 300)
    for daemon in (pair.sender, pair.receiver):
        text = _text(daemon.metrics_port)
        assert "process_start_time_seconds" in text and "process_open_fds" in text and "python_info" in text
        result = promtool_check(text)
        assert result.returncode == 0 and not result.stdout.strip() and not result.stderr.strip(), (
            f"{daemon.config_path.name}: promtool exit {result.returncode}:\n{result.stdout}{result.stderr}"
        )


def _label_values(families) -> dict[str, set[str]]:
    values: dict[str, set[str]] = {}
    for family in families:
        for sample in family.samples:
            for name, value in sample.labels.items():
                values.setdefault(name, set()).add(value)
    return values


async def _running_relay(nursery) -> UdpRelay:
    relay = UdpRelay(RelayConfig(listen=(LOOPBACK, 0), to=(LOOPBACK, 9)))
    await nursery.start(relay.run)
    return relay


async def test_each_shared_label_name_has_one_meaning_on_the_daemon_and_the_relay(nursery):
    daemon_registry, _ = build_registry(a_receiver())
    relay = await _running_relay(nursery)
    seen = _label_values(daemon_registry.collect())
    for name, values in _label_values(_RelayCollector(relay).collect()).items():
        seen.setdefault(name, set()).update(values)
    for name, allowed in LABEL_MEANINGS.items():
        assert seen.get(name, set()) <= allowed, (name, seen.get(name))
    assert seen["direction"] == {"forward", "return"} and seen["code"] == {"send", "receive"}
    nursery.cancel_scope.cancel()


async def test_relay_metrics_pass_promtool_with_no_warning(nursery):
    from prometheus_client import CollectorRegistry, generate_latest

    relay = await _running_relay(nursery)
    registry = CollectorRegistry(auto_describe=False)
    registry.register(_RelayCollector(relay))
    result = promtool_check(generate_latest(registry).decode())
    assert result.returncode == 0 and not result.stdout.strip(), result.stdout + result.stderr
    nursery.cancel_scope.cancel()


def test_readme_drop_reason_table_lists_every_reason():
    readme = (ROOT / "README.md").read_text()
    table = readme.split("Drop reasons (the `reason` label", 1)[1].split("\n\n", 2)[1]
    listed = set(re.findall(r"^\| `([a-z_]+)` \|", table, flags=re.MULTILINE))
    assert listed == {reason.value for reason in DropReason}


def test_every_drop_reason_an_alert_names_is_counted():
    alerts = yaml.safe_load((ROOT / "deploy" / "prometheus" / "fecproxy.alerts.yml").read_text())
    named = set()
    for group in alerts["groups"]:
        for rule in group["rules"]:
            # The reason label of the drop counter (or its recorded rate), not of other families.
            for pattern in re.findall(r'fecproxy_packets_dropped[:a-z0-9_]*\{[^}]*reason=~?"([^"]+)"', rule["expr"]):
                named.update(pattern.split("|"))
    assert named and named <= {reason.value for reason in DropReason}, named
    text = (ROOT / "deploy" / "prometheus" / "fecproxy.alerts.yml").read_text()
    assert "until a build counts" not in text  # they are counted: the comment once said otherwise


def test_metric_families_parse_and_names_carry_the_prefix():
    from prometheus_client import generate_latest

    registry, _ = build_registry(a_receiver())
    names = {family.name for family in text_string_to_metric_families(generate_latest(registry).decode())}
    ours = {name for name in names if not name.startswith(("process_", "python_"))}
    assert all(name.startswith("fecproxy_") for name in ours), ours
