"""The shipped Prometheus rules, alerts and Grafana dashboard, checked against a real Prometheus.

A fecproxy pair runs on 127.0.0.1 with a lossy relay between them (tests/lossy_relay.py); a real
Prometheus server (Debian's ``prometheus`` package, installed by .ci/run) scrapes both daemons
with deploy/prometheus/prometheus.yml, its targets replaced by the daemons' metrics ports and
its intervals shortened to 1 s.  Then every recording rule, every alert expression and every
dashboard panel query is evaluated through Prometheus' HTTP API and must return data, and the
loss panels must agree with what the relay dropped.

Windows: the shipped rules keep their 5m (and 1h) windows unchanged.  rate() needs only two
samples inside its window, so 1-s scrapes give data within seconds; and because traffic starts
only after Prometheus has scraped every counter at 0, rate() extrapolates numerator and
denominator of a ratio by the same factor (same sample timestamps, both starting from zero), so a
ratio of two 5m rates equals the ratio of the counters' increases over the run.

Without the package the test skips with the reason printed; under CI=true it fails instead.
"""

from __future__ import annotations

import json
import re
import shutil
import socket
import subprocess
import time
import urllib.parse
import urllib.request
from pathlib import Path

import pytest
import yaml
from support.daemon_pair import LOOPBACK, SOURCE, Pair, drain, parse_link_header, send_paced, wait_until
from support.lossy_relay import iid_loss
from support.processes import end_process
from support.tools import require

ROOT = Path(__file__).resolve().parent.parent
PROMETHEUS_DIR = ROOT / "deploy" / "prometheus"
DASHBOARD = ROOT / "deploy" / "grafana" / "dashboards" / "fecproxy.json"
#: Short intervals so a test run sees many scrapes and rule evaluations in a few seconds.
TEST_INTERVAL = "1s"
#: Upper bound for Prometheus to start and scrape both daemons once (it starts in ~1 s).
PROMETHEUS_READY_TIMEOUT = 20.0
#: Forward link loss of the relay and the weak code that leaves some of it unrecovered.
LINK_LOSS = 0.1
DATAGRAMS = 1200
RATE = 300.0
SEED = 11
#: A comparison in PromQL; turned into a `bool` comparison so an alert expression returns its
#: series (0 or 1) whether or not it fires.  The shipped rules use no `!=` label matchers.
COMPARISON = re.compile(r"(>=|<=|==|!=|>|<)(?!\s*bool)")


def test_promtool_accepts_config_and_rules():
    promtool = require("promtool")
    checks = [
        [promtool, "check", "config", str(PROMETHEUS_DIR / "prometheus.yml")],
        [
            promtool,
            "check",
            "rules",
            *map(str, sorted(PROMETHEUS_DIR.glob("*.rules.yml"))),
            *map(str, sorted(PROMETHEUS_DIR.glob("*.alerts.yml"))),
        ],
    ]
    for command in checks:
        result = subprocess.run(command, capture_output=True, text=True, timeout=60)
        assert result.returncode == 0, result.stdout + result.stderr


def test_recording_rule_names_follow_level_metric_operations():
    # prometheus.io "Recording rules": level:metric:operations, `_total` dropped after rate(),
    # ratios `a_per_b` with the operation `ratio`.
    rules = yaml.safe_load((PROMETHEUS_DIR / "fecproxy.rules.yml").read_text())
    for group in rules["groups"]:
        for rule in group["rules"]:
            level, metric, operations = rule["record"].split(":")
            assert level and metric.startswith("fecproxy_") and not metric.endswith("_total")
            assert ("_per_" in metric) == operations.startswith("ratio"), rule["record"]
    alerts = yaml.safe_load((PROMETHEUS_DIR / "fecproxy.alerts.yml").read_text())
    for rule in alerts["groups"][0]["rules"]:
        # prometheus.io "Alerting": CamelCase names, a `for:` duration, and here an action line.
        assert re.fullmatch(r"(?:[A-Z][a-z]+)+", rule["alert"]), rule["alert"]
        assert rule["for"] and rule["annotations"]["action"].count("\n") == 0


def test_grafana_dashboard_and_provisioning_are_well_formed():
    # Grafana docs, "Provisioning": `apiVersion: 1`; dashboard providers with `type: file` and
    # `options.path`; a dashboard JSON model carries `schemaVersion`.
    provisioning = ROOT / "deploy" / "grafana" / "provisioning"
    providers = yaml.safe_load((provisioning / "dashboards" / "fecproxy.yaml").read_text())
    assert providers["apiVersion"] == 1
    assert all(p["type"] == "file" and p["options"]["path"] for p in providers["providers"])
    sources = yaml.safe_load((provisioning / "datasources" / "fecproxy.yaml").read_text())
    assert sources["apiVersion"] == 1
    dashboard = json.loads(DASHBOARD.read_text())
    assert isinstance(dashboard["schemaVersion"], int) and dashboard["uid"] and dashboard["title"]
    ids = [panel["id"] for panel in dashboard["panels"]]
    assert len(ids) == len(set(ids))
    # The data source is a variable (and an import input), never a fixed uid.
    variables = {variable["name"]: variable for variable in dashboard["templating"]["list"]}
    assert variables["datasource"]["type"] == "datasource" and variables["datasource"]["query"] == "prometheus"
    assert [entry["type"] for entry in dashboard["__inputs"]] == ["datasource"]
    for panel in dashboard["panels"]:
        assert panel["datasource"]["uid"] == "${datasource}" and panel["targets"]
        assert all(target["datasource"]["uid"] == "${datasource}" and target["expr"] for target in panel["targets"])
    # One pair at a time: the pair variable is single-valued, and every query is filtered by it
    # and by the chosen daemons, and keeps the pair label in what it returns.
    assert not variables["pair"]["multi"] and not variables["pair"]["includeAll"]
    assert '{job="fecproxy", pair="$pair"}' in variables["instance"]["query"]["query"]
    for panel in dashboard["panels"]:
        for target in panel["targets"]:
            expr = target["expr"]
            assert expr.count('pair="$pair", instance=~"$instance"') == expr.count("fecproxy_"), expr
            assert all("pair" in group for group in re.findall(r"by \(([^)]*)\)", expr)), expr
    exprs = " ".join(t["expr"] for panel in dashboard["panels"] for t in panel["targets"])
    for needed in (
        "source_packets_lost_per_expected",
        "datagrams_unrecovered_per_expected",
        "datagrams_recovered",
        "repair_packets_sent_per",
        "repair_bytes_sent_per",
        "histogram_quantile",
        "packets_dropped",
        "fecproxy_flows",
        "fecproxy_link_loss_ratio",
        "fecproxy_link_mean_burst_packets",
        "fecproxy_info",
    ):
        assert needed in exprs, needed


def schema_losses(written: dict) -> list[str]:
    """What of a dashboard does not survive a round trip through Grafana's own SDK
    (grafana-foundation-sdk, types generated from Grafana 11.6's dashboard schema): a key the
    schema does not know is dropped on reading.  `__inputs` and `__requires` are import metadata
    outside the dashboard model."""
    from grafana_foundation_sdk.cog.encoder import JSONEncoder
    from grafana_foundation_sdk.models.dashboard import Dashboard

    read_back = json.loads(JSONEncoder(sort_keys=True).encode(Dashboard.from_json(written)))
    lost: list[str] = []

    def compare(ours, theirs, path: str) -> None:
        if isinstance(ours, dict):
            for key, value in ours.items():
                if not isinstance(theirs, dict) or key not in theirs:
                    lost.append(f"{path}.{key}")
                else:
                    compare(value, theirs[key], f"{path}.{key}")
        elif isinstance(ours, list):
            if not isinstance(theirs, list) or len(ours) != len(theirs):
                lost.append(path)
                return
            for index, (mine, other) in enumerate(zip(ours, theirs, strict=True)):
                compare(mine, other, f"{path}[{index}]")
        elif ours != theirs:
            lost.append(f"{path}: {ours!r} read back as {theirs!r}")

    compare({k: v for k, v in written.items() if k not in ("__inputs", "__requires")}, read_back, "")
    return lost


def test_dashboard_matches_grafana_s_dashboard_schema():
    assert schema_losses(json.loads(DASHBOARD.read_text())) == []


def test_schema_check_catches_a_misspelt_key():
    dashboard = json.loads(DASHBOARD.read_text())
    dashboard["panels"][0]["gridPoss"] = dashboard["panels"][0].pop("gridPos")
    dashboard["templating"]["list"][1]["multiple"] = False
    assert sorted(schema_losses(dashboard)) == [".panels[0].gridPoss", ".templating.list[1].multiple"]


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind((LOOPBACK, 0))
        return probe.getsockname()[1]


def scrape_config_for(ports: dict[str, dict[str, int]], tmp_path: Path) -> Path:
    """The shipped config with the test's ports and 1-s intervals, its targets repeated for each
    pair (``ports``: pair label -> side -> metrics port) as README says to copy them; the rule
    files copied beside."""
    config = yaml.safe_load((PROMETHEUS_DIR / "prometheus.yml").read_text())
    config["global"]["scrape_interval"] = config["global"]["evaluation_interval"] = TEST_INTERVAL
    shipped = config["scrape_configs"][0]["static_configs"]
    targets = []
    for pair, sides in ports.items():
        for target in shipped:
            side = target["labels"]["side"]
            targets.append({"targets": [f"{LOOPBACK}:{sides[side]}"], "labels": target["labels"] | {"pair": pair}})
    config["scrape_configs"][0]["static_configs"] = targets
    for name in config["rule_files"]:
        shutil.copy(PROMETHEUS_DIR / name, tmp_path / name)
    path = tmp_path / "prometheus.yml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


class Prometheus:
    def __init__(self, binary: str, config: Path, tmp_path: Path):
        self.port = free_port()
        self.log = open(tmp_path / "prometheus.log", "w")
        self.proc = subprocess.Popen(
            [
                binary,
                f"--config.file={config}",
                f"--storage.tsdb.path={tmp_path / 'tsdb'}",
                f"--web.listen-address={LOOPBACK}:{self.port}",
            ],
            stdin=subprocess.DEVNULL,
            stdout=self.log,
            stderr=subprocess.STDOUT,
        )
        self.log_path = tmp_path / "prometheus.log"

    def api(self, path: str, **params) -> dict:
        url = f"http://{LOOPBACK}:{self.port}/api/v1/{path}"
        if params:
            url += "?" + urllib.parse.urlencode(params)
        with urllib.request.urlopen(url, timeout=5) as response:
            body = json.load(response)
        assert body["status"] == "success", body
        return body["data"]

    def query(self, expr: str) -> list[dict]:
        return self.api("query", query=expr)["result"]

    def try_query(self, expr: str) -> list[dict]:
        try:
            return self.query(expr)
        except OSError:
            return []

    def close(self) -> None:
        end_process(self.proc)
        self.log.close()


def by_side(result: list[dict]) -> dict[str, float]:
    return {series["metric"].get("side", ""): float(series["value"][1]) for series in result}


#: The pairs the test runs side by side: the shipped config's pair, and a second one with other
#: losses, scraped by the same Prometheus (README: "Copy the targets for each pair you run").
FIRST_PAIR = "station-valley"
SECOND_PAIR = "hilltop-relay"
SECOND_LINK_LOSS = 0.05


def dashboard_query(expr: str, pair: str, instances: str = ".+") -> str:
    """A panel query as Grafana sends it: $pair the chosen pair, $instance the "All" value
    (the variable's allValue, ``.+``) or a chosen daemon, regex-escaped with its backslashes
    doubled for the PromQL string (as Grafana's Prometheus data source escapes values)."""
    return expr.replace("$pair", pair).replace("$instance", instances)


@pytest.mark.slow
def test_dashboard_rules_and_alerts_return_data_from_a_real_pair(tmp_path):
    binary = require("prometheus")
    fec = {"block_size": 8, "repair": 2, "flush_ms": 20}
    (tmp_path / FIRST_PAIR).mkdir()
    (tmp_path / SECOND_PAIR).mkdir()
    pair = Pair(
        tmp_path / FIRST_PAIR,
        forward=iid_loss(LINK_LOSS, SEED),
        record=True,
        echo=True,
        sender_fec=fec,
        receiver_fec=fec,
    )
    second = None
    prometheus = None
    try:
        second = Pair(
            tmp_path / SECOND_PAIR,
            forward=iid_loss(SECOND_LINK_LOSS, SEED + 1),
            echo=True,
            sender_fec=fec,
            receiver_fec=fec,
        )
        ports = {
            name: {"sender": p.sender.metrics_port, "receiver": p.receiver.metrics_port}
            for name, p in ((FIRST_PAIR, pair), (SECOND_PAIR, second))
        }
        prometheus = Prometheus(binary, scrape_config_for(ports, tmp_path), tmp_path)
        # Traffic starts only once all daemons were scraped (every counter still 0): see above.
        ready = wait_until(
            lambda: len(prometheus.try_query('up{job="fecproxy"} == 1')) == 4, PROMETHEUS_READY_TIMEOUT, interval=0.2
        )
        assert ready, "Prometheus did not scrape all four daemons:\n" + prometheus.log_path.read_text()[-3000:]
        clients = [pair.client(1), second.client(1)]
        send_paced(lambda data: [client.send(data) for client in clients], DATAGRAMS, RATE)
        drain(pair, DATAGRAMS)
        drain(second, DATAGRAMS)
        time.sleep(0.6)  # the last repair and the hold timer's verdicts
        final = {side: daemon.metrics() for side, daemon in (("sender", pair.sender), ("receiver", pair.receiver))}
        # Two more scrapes and rule evaluations after the counters stopped moving.
        scraped = time.time()
        wait_until(
            lambda: all(
                float(s["value"][0]) > scraped + 2.5
                for s in prometheus.try_query("instance:fecproxy_source_packets_lost_per_expected:ratio_rate5m")
            ),
            10.0,
            interval=0.2,
        )

        # Every rule is loaded and evaluates without error.
        groups = prometheus.api("rules")["groups"]
        rules = [rule for group in groups for rule in group["rules"]]
        shipped = sum(
            len(group["rules"])
            for path in PROMETHEUS_DIR.glob("*.yml")
            if path.name != "prometheus.yml"
            for group in yaml.safe_load(path.read_text())["groups"]
        )
        assert len(rules) == shipped
        for rule in rules:
            assert rule["health"] == "ok", (rule["name"], rule.get("lastError"))

        # Every recording rule has data.
        for rule in rules:
            if rule["type"] == "recording":
                assert prometheus.query(rule["name"]), f"recording rule {rule['name']} has no data"

        # Every alert expression has data once its comparisons return 0/1 instead of filtering.
        auth_counted = any(
            labels == (("reason", "auth"),)
            for name, labels in final["receiver"]
            if name == "fecproxy_packets_dropped_total"
        )
        for rule in rules:
            if rule["type"] != "alerting":
                continue
            result = prometheus.query(COMPARISON.sub(r"\1 bool", rule["query"]))
            if rule["name"] == "FecproxyAuthOrReplayDrops" and not auth_counted:
                # This build does not count auth/replay drops yet: the rule must match nothing.
                print("FecproxyAuthOrReplayDrops: no auth/replay series in this build; expression is empty as intended")
                assert result == []
                continue
            assert result, f"alert {rule['name']} expression has no data: {rule['query']}"

        # The dashboard's variables: the pair list names both pairs, each pair's daemon list its two.
        dashboard = json.loads(DASHBOARD.read_text())
        variables = {variable["name"]: variable for variable in dashboard["templating"]["list"]}
        pair_selector = re.fullmatch(r"label_values\((.*), pair\)", variables["pair"]["query"]["query"]).group(1)
        assert set(prometheus.api("label/pair/values", **{"match[]": pair_selector})) == {FIRST_PAIR, SECOND_PAIR}
        instance_selector = re.fullmatch(r"label_values\((.*), instance\)", variables["instance"]["query"]["query"])
        for name in (FIRST_PAIR, SECOND_PAIR):
            selector = instance_selector.group(1).replace("$pair", name)
            instances = prometheus.api("label/instance/values", **{"match[]": selector})
            assert sorted(instances) == sorted(f"{LOOPBACK}:{port}" for port in ports[name].values())

        # Every dashboard panel query has data for each pair on its own, and only that pair's:
        # with every daemon chosen (the "All" value) and with the receiver alone.
        assert dashboard["schemaVersion"] >= 1
        for name in (FIRST_PAIR, SECOND_PAIR):
            for instances in (
                variables["instance"]["allValue"],
                re.escape(f"{LOOPBACK}:{ports[name]['receiver']}").replace("\\", "\\\\"),
            ):
                for panel in dashboard["panels"]:
                    for target in panel["targets"]:
                        expr = dashboard_query(target["expr"], name, instances)
                        result = prometheus.query(expr)
                        if not result and instances != variables["instance"]["allValue"]:
                            continue  # a sender-only series (e.g. what the sender sends) for the receiver alone
                        assert result, f"pair {name}, panel {panel['title']!r}: {expr} has no data"
                        assert {series["metric"].get("pair") for series in result} == {name}, (expr, result)

        # The loss panel agrees with the relay: source packets it dropped / source packets sent.
        dropped_sources = sum(
            1 for _, dropped, data in pair.relay.forward.packets if dropped and parse_link_header(data)[0] == SOURCE
        )
        all_sources = sum(1 for _, _, data in pair.relay.forward.packets if parse_link_header(data)[0] == SOURCE)
        first = f'{{pair="{FIRST_PAIR}"}}'
        link = by_side(prometheus.query(f"instance:fecproxy_source_packets_lost_per_expected:ratio_rate5m{first}"))
        residual = by_side(
            prometheus.query(f"instance:fecproxy_datagrams_unrecovered_per_expected:ratio_rate5m{first}")
        )
        other = by_side(
            prometheus.query(f'instance:fecproxy_source_packets_lost_per_expected:ratio_rate5m{{pair="{SECOND_PAIR}"}}')
        )
        receiver = final["receiver"]
        lost = receiver[("fecproxy_source_packets_lost_total", ())]
        arrived = receiver[("fecproxy_link_packets_received_total", (("kind", "source"),))]
        unrecovered = receiver[("fecproxy_datagrams_unrecovered_total", ())]
        print(
            f"relay dropped {dropped_sources}/{all_sources} source packets; panel link loss {link['receiver']:.5f}, "
            f"residual {residual['receiver']:.5f}; the other pair's link loss {other['receiver']:.5f}"
        )
        assert lost <= dropped_sources and dropped_sources - lost <= 2 * 8  # at most a trailing block unseen
        assert link["receiver"] == pytest.approx(dropped_sources / all_sources, abs=0.005)
        assert link["receiver"] == pytest.approx(lost / (lost + arrived), rel=1e-6)
        assert residual["receiver"] == pytest.approx(unrecovered / (lost + arrived), rel=1e-6, abs=1e-12)
        assert link["sender"] == 0.0  # the echo path loses nothing
        # The second pair's figure is its own (5 % configured), not the first pair's (10 %).
        assert other["receiver"] == pytest.approx(SECOND_LINK_LOSS, abs=0.025)
        assert abs(other["receiver"] - link["receiver"]) > 0.02
    finally:
        if prometheus is not None:
            prometheus.close()
        codes = pair.close()
        if second is not None:
            second.close()
    assert codes == [0, 0]
