"""The daemon's status page: its JSON, its WSGI routes and package data, and the page itself in a
real headless browser against a running pair."""

from __future__ import annotations

import base64
import hashlib
import io
import json
import math
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import pytest
from prometheus_client import generate_latest, make_wsgi_app
from support.browser import HeadlessChromium, artifact_dir, find_chromium
from support.daemon_pair import drain, send_paced
from support.lossy_relay import iid_loss
from support.stand_in_view import StandInView

from fecproxy.protocol.decoder import DecoderStats
from fecproxy.protocol.encoder import EncoderStats
from fecproxy.shell import status, status_page
from fecproxy.shell.metrics import build_registry

REPO = Path(__file__).resolve().parent.parent


def _view(estimate: tuple[float, float] | None = (0.05, 2.0)) -> StandInView:
    """A receiver's view with counters a test sets."""
    return StandInView(
        encoder_stats=EncoderStats(
            source_packets=900, repair_packets=300, source_bytes=90_000, repair_bytes=31_000, blocks=75, short_blocks=2
        ),
        decoder_stats=DecoderStats(
            source_received=950,
            repair_received=310,
            lost=50,
            recovered=48,
            unrecovered=2,
            delivered=998,
            blocks={"complete": 40, "recovered": 30},
        ),
        block_shape=(12, 4),
        reloads={"applied": 1, "rejected": 0},
        drops={"late": 3, "duplicate": 1},
        flows=2,
        estimate=estimate,
        received_code=(12, 4),
    )


def _call(app, path: str, method: str = "GET"):
    """One WSGI request: (status line, headers dict, body bytes)."""
    captured = {}

    def start_response(status_line, headers):
        captured["status"], captured["headers"] = status_line, dict(headers)

    environ = {
        "PATH_INFO": path,
        "REQUEST_METHOD": method,
        "QUERY_STRING": "",
        "SERVER_NAME": "127.0.0.1",
        "SERVER_PORT": "0",
        "wsgi.input": io.BytesIO(),
        "wsgi.url_scheme": "http",
        "SERVER_PROTOCOL": "HTTP/1.1",
    }
    body = b"".join(app(environ, start_response))
    return captured["status"], captured["headers"], body


def _exposition(registry) -> dict[str, float | None]:
    """Samples of the registry's /metrics text, keyed the way status.json keys them."""
    from prometheus_client.parser import text_string_to_metric_families

    out: dict[str, float | None] = {}
    for family in text_string_to_metric_families(generate_latest(registry).decode()):
        for sample in family.samples:
            if sample.name != "fecproxy_info":
                # /status.json writes NaN (not yet known) as null, as JSON has no NaN.
                value = sample.value
                out[status.sample_key(sample.name, sample.labels)] = None if math.isnan(value) else value
    return out


# -- the JSON and the routes, no network --------------------------------------------------------------


def test_status_json_holds_exactly_what_metrics_exposes():
    registry, delay = build_registry(_view())
    delay.observe(0.04)
    app = status.status_app(registry, make_wsgi_app(registry))
    code, headers, body = _call(app, "/status.json")
    assert code.startswith("200") and headers["Content-Type"] == "application/json"
    document = json.loads(body)
    exposed = _exposition(registry)
    # The process's own series (CPU seconds, memory) move between the two reads; their keys match.
    assert document["samples"].keys() == exposed.keys()

    def steady(samples: dict) -> dict:
        return {key: value for key, value in samples.items() if not key.startswith("process_")}

    assert steady(document["samples"]) == steady(exposed)
    assert document["info"] == {
        "version": document["info"]["version"],
        "role": "receiver",
        "fec_code": "block",
        "k": "12",
        "m": "4",
        "interleave": "1",
        "size_classes": "le256,gt256",
    }
    assert document["samples"]['fecproxy_packets_dropped_total{reason="late"}'] == 3
    assert document["samples"]["fecproxy_link_loss_ratio"] == 0.05
    assert document["refresh_s"] == status.REFRESH_S


def test_status_json_says_where_the_daemon_sends_beside_the_metrics():
    # A peer address must never be a metric label (Prometheus naming guide: labels with small
    # fixed value sets only), so it travels beside the samples, read from the daemon at request time.
    registry, _ = build_registry(_view())
    peer = {"role": "receiver", "peer": None, "peer_from": "learned"}
    app = status.status_app(registry, make_wsgi_app(registry), facts=lambda: dict(peer))
    assert json.loads(_call(app, "/status.json")[2])["daemon"] == peer
    peer["peer"] = "127.0.0.1:40001"  # learned from the first valid packet
    assert json.loads(_call(app, "/status.json")[2])["daemon"]["peer"] == "127.0.0.1:40001"
    assert "daemon" not in json.loads(_call(status.status_app(registry, make_wsgi_app(registry)), "/status.json")[2])


def test_routes_page_json_and_everything_else_to_prometheus():
    registry, _ = build_registry(_view())
    app = status.status_app(registry, make_wsgi_app(registry))
    code, headers, page = _call(app, "/")
    assert code.startswith("200") and headers["Content-Type"].startswith("text/html")
    assert _call(app, "/index.html")[2] == page
    code, headers, metrics = _call(app, "/metrics")
    assert code.startswith("200") and b"fecproxy_source_packets_sent_total 900.0" in metrics
    assert _call(app, "/status.json", "POST")[0].startswith("405")
    assert _call(app, "/", "HEAD")[2] == b""


def test_missing_page_files_cost_the_page_but_never_metrics(monkeypatch):
    def missing():
        raise FileNotFoundError("page.html")

    monkeypatch.setattr(status.status_page, "load", missing)
    registry, _ = build_registry(_view())
    app = status.status_app(registry, make_wsgi_app(registry))
    code, _, body = _call(app, "/")
    assert code.startswith("500") and b"status page files missing" in body
    assert _call(app, "/metrics")[0].startswith("200") and _call(app, "/status.json")[0].startswith("200")


def test_page_is_self_contained_and_its_policy_admits_exactly_its_own_script_and_style():
    page = status_page.load()
    html = page.html
    # No CDN, no second request: nothing is loaded from elsewhere.
    assert not re.search(r"<(script|link|img|iframe)[^>]+(src|href)=", html)
    assert "//" not in re.sub(r'(href="[^"]*"|<script>.*?</script>)', "", html, flags=re.S).replace(
        "http://www.w3.org", ""
    )
    style = re.search(r"<style>(.*?)</style>", html, re.S).group(1)
    script = re.search(r"<script>(.*?)</script>", html, re.S).group(1)

    def digest(text):
        return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode()).digest()).decode() + "'"

    policy = page.content_security_policy
    assert f"script-src {digest(script)};" in policy and f"style-src {digest(style)};" in policy
    assert "default-src 'none'" in policy and "connect-src 'self'" in policy


def test_page_files_ship_with_the_package():
    """Every file of the page is declared package data, so ``pip install .`` installs it (checked
    by hand in a fresh virtual environment; building a wheel here would need the build tools)."""
    import fnmatch
    import tomllib

    folder = Path(status_page.__file__).parent
    data_files = sorted(p.name for p in folder.iterdir() if p.is_file() and p.suffix != ".py")
    assert {"page.html", "page.css", "page.js"} <= set(data_files)
    patterns = tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"]["package-data"][
        "fecproxy.shell.status_page"
    ]
    assert all(any(fnmatch.fnmatch(name, pattern) for pattern in patterns) for name in data_files)


class _Clock:
    def __init__(self):
        self.now = 1000.0

    def __call__(self):
        return self.now


def test_plan_is_cached_and_recomputed_only_when_its_rounded_inputs_change():
    daemon, clock, calls = _view(), _Clock(), []
    registry, _ = build_registry(daemon)

    def planner(loss, burst, rate):
        calls.append((loss, burst, rate))
        return {"recommended": None, "note": "test", "command": status.plan_command(loss, burst, rate)}

    source = status.StatusSource(registry, clock=clock, planner=planner)
    assert source.document()["plan"]["note"].startswith("no datagram rate yet")  # no time has passed
    clock.now += 5
    daemon.decoder_stats.source_received += 1000
    doc = source.document()
    assert calls == [(0.05, 2.0, 200.0)]  # 1000 more source datagrams in 5 s
    assert doc["plan"]["command"] == "fecproxy plan --loss 0.05 --burst 2 --rate 200"
    daemon.estimate = (0.09, 3.0)  # a new link, but too soon after the last plan
    clock.now += 1
    daemon.decoder_stats.source_received += 200
    assert source.document()["plan"]["command"] == "fecproxy plan --loss 0.05 --burst 2 --rate 200"
    daemon.estimate = (0.0504, 2.01)  # the same as planned, to two digits: no new plan, however late
    clock.now += status.PLAN_MIN_INTERVAL_S
    daemon.decoder_stats.source_received += 2000
    source.document()
    assert len(calls) == 1
    daemon.estimate = (0.09, 3.0)  # a new link, long enough after the last plan
    clock.now += 1
    daemon.decoder_stats.source_received += 200
    source.document()
    assert calls[-1] == (0.09, 3.0, 200.0) and len(calls) == 2


def test_rate_window_follows_a_change_of_traffic():
    daemon, clock = _view(), _Clock()
    source = status.StatusSource(build_registry(daemon)[0], clock=clock, planner=lambda *a: {})
    for _ in range(int(status.RATE_WINDOW_S) * 2):  # a minute at 10/s after the 1000 at start
        clock.now += 1
        daemon.decoder_stats.source_received += 10
        rate = source.document()["source_rate"]
    assert rate == pytest.approx(10.0)


def test_a_failing_planner_costs_the_recommendation_only():
    daemon, clock = _view(), _Clock()

    def broken(*inputs):
        raise ZeroDivisionError("bug")

    source = status.StatusSource(build_registry(daemon)[0], clock=clock, planner=broken)
    clock.now += 5
    daemon.decoder_stats.source_received += 500
    document = source.document()
    assert document["plan"]["recommended"] is None and "ZeroDivisionError: bug" in document["plan"]["note"]
    assert document["samples"]["fecproxy_datagrams_recovered_total"] == 48


def test_without_an_estimate_the_page_says_why_there_is_no_plan():
    source = status.StatusSource(build_registry(_view(estimate=None))[0], clock=_Clock())
    assert source.document()["plan"] == {
        "recommended": None,
        "note": "no link estimate yet: no block has arrived from the peer",
    }


def test_an_estimate_without_a_burst_yet_is_valid_json_and_planned_as_isolated_losses():
    daemon, clock, calls = _view(estimate=(0.0, math.nan)), _Clock(), []
    source = status.StatusSource(build_registry(daemon)[0], clock=clock, planner=lambda *a: calls.append(a) or {})
    clock.now += 5
    daemon.decoder_stats.source_received += 500
    registry_app = status.status_app(source.registry, make_wsgi_app(source.registry))
    document = json.loads(_call(registry_app, "/status.json")[2])  # NaN is not JSON: sent as null
    assert document["samples"]["fecproxy_link_mean_burst_packets"] is None
    source.document()
    assert calls == [(0.0, 1.0, 300.0)]  # first read: 1500 source datagrams in the 5 s since start


@pytest.mark.slow
def test_recommendation_is_what_fecproxy_plan_prints_for_the_same_command():
    for loss, burst, rate in ((0.03, 2.0, 30.0), (0.2, 6.0, 30.0), (0.0, 1.0, 50.0)):
        page = status.recommend(loss, burst, rate)
        command = page["command"].split()[1:]
        completed = subprocess.run(
            [sys.executable, "-m", "fecproxy", *command, "--json"], capture_output=True, text=True, timeout=60
        )
        assert completed.returncode in (0, 1), completed.stderr
        assert json.loads(completed.stdout)["recommended"] == page["recommended"], (command, page)


# -- the page in a real browser against a running pair --------------------------------------------

#: Datagrams sent while the page is open: four seconds at 100/s fill the charts with a few points.
BROWSER_DATAGRAMS = 400
BROWSER_RATE = 100.0
#: Bound on waiting for the page's refreshes (it polls once a second).
REFRESH_TIMEOUT_S = 15.0
#: The page counts its completed refreshes on <body> (0 until the document has a body).
REFRESHES = "Number((document.body && document.body.dataset.refreshes) || 0)"

READ_PAGE = """(() => {
  const cells = {};
  for (const el of document.querySelectorAll("[data-metric]"))
    cells[el.dataset.metric] = [el.dataset.value, el.textContent];
  const pick = (id) => [document.getElementById(id).dataset.value, document.getElementById(id).textContent];
  const plan = document.getElementById("plan-code");
  return {
    refreshes: Number(document.body.dataset.refreshes), cells,
    loss: pick("estimate-loss"), burst: pick("estimate-burst"), k: pick("code-k"), m: pick("code-m"),
    role: document.getElementById("role").textContent,
    farAddress: document.getElementById("far-address").textContent,
    command: document.getElementById("plan-command").textContent,
    plan: plan ? [Number(plan.dataset.k), Number(plan.dataset.m)] : null,
    planText: document.getElementById("plan").textContent,
    chartLines: document.querySelectorAll("#chart-loss path").length,
    connection: document.getElementById("conn").className,
  };
})()"""


def _percent(value: float) -> str:
    """The page's percent format (page.js ``percent``)."""
    return "0 %" if value == 0 else f"{value * 100:.{2 if value >= 0.01 else 3}f} %"


@pytest.mark.slow
def test_status_page_in_headless_chromium_shows_the_daemons_metrics(pairs, tmp_path):
    executable = find_chromium()
    if executable is None:
        reason = "chromium is not installed (Debian package `chromium`, installed by .ci/run)"
        if os.environ.get("CI", "").lower() in ("1", "true", "yes"):
            pytest.fail(reason)
        print(f"SKIPPED: {reason}")
        pytest.skip(reason)
    pair = pairs(forward=iid_loss(0.06, seed=11))
    url = f"http://127.0.0.1:{pair.receiver.metrics_port}/"
    began = time.monotonic()
    with HeadlessChromium(executable) as browser:
        browser.navigate(url)
        browser.wait_for(f"{REFRESHES} >= 1", REFRESH_TIMEOUT_S)
        client = pair.client(1)
        send_paced(client.send, BROWSER_DATAGRAMS, BROWSER_RATE)
        drain(pair, BROWSER_DATAGRAMS)
        # Traffic has stopped and every block is settled: from here the counters stand still.
        frozen = browser.evaluate(REFRESHES)
        browser.wait_for(f"{REFRESHES} >= {frozen + 2}", REFRESH_TIMEOUT_S)
        shown = browser.evaluate(READ_PAGE)
        metrics, info = pair.receiver.metrics(), pair.receiver.info()
        shots = [browser.screenshot(place / "status-page.png") for place in artifact_dir(tmp_path)]
        errors = list(browser.errors)
        # The daemon goes away: the page says so within a refresh or two and keeps what it drew.
        assert pair.receiver.terminate() == 0
        browser.wait_for("document.getElementById('conn').className === 'pill bad'", REFRESH_TIMEOUT_S)
        down = browser.evaluate(
            "[document.getElementById('conn').textContent, document.querySelectorAll('#chart-loss path').length]"
        )
    print(f"status page screenshot: {', '.join(map(str, shots))} ({time.monotonic() - began:.1f} s in the browser)")

    assert errors == [], errors
    assert down[0].startswith("no answer from the daemon") and down[1] == shown["chartLines"], down
    assert shown["connection"] == "pill ok"
    assert shown["chartLines"] >= 1  # the loss chart drew the traffic
    assert shown["role"] == "receiver"
    # The receiver learned its peer (the sender's link socket) from the first valid packet.
    assert re.fullmatch(r"127\.0\.0\.1:\d+ · learned from its packets", shown["farAddress"]), shown["farAddress"]
    assert shown["k"] == [info["k"], info["k"]] and shown["m"] == [info["m"], info["m"]]
    # Every counter the page shows equals the scrape, both as data and as the text a person reads.
    by_key = {status.sample_key(name, dict(labels)): value for (name, labels), value in metrics.items()}
    must_show = [
        "fecproxy_source_packets_lost_total",
        "fecproxy_datagrams_recovered_total",
        "fecproxy_datagrams_unrecovered_total",
        "fecproxy_datagrams_delivered_total",
        'fecproxy_link_packets_received_total{kind="source"}',
        'fecproxy_link_packets_received_total{kind="repair"}',
        "fecproxy_flows",
    ] + [key for key in by_key if key.startswith("fecproxy_packets_dropped_total{")]
    assert set(must_show) <= set(shown["cells"]), set(must_show) - set(shown["cells"])
    for key, (value, text) in shown["cells"].items():
        assert float(value) == by_key[key], key
        assert int(re.sub(r"\D", "", text.split(" (")[0])) == by_key[key], (key, text)
    assert by_key["fecproxy_source_packets_lost_total"] > 0 and by_key["fecproxy_datagrams_recovered_total"] > 0
    # The link estimate, exactly and as displayed.
    loss, burst = by_key["fecproxy_link_loss_ratio"], by_key["fecproxy_link_mean_burst_packets"]
    assert float(shown["loss"][0]) == loss and shown["loss"][1] == _percent(loss)
    assert float(shown["burst"][0]) == burst and shown["burst"][1] == f"{burst:.2f} packets"
    # The recommendation is what `fecproxy plan` prints for the command the page shows.
    command = shown["command"].removeprefix("$ ").split()
    # (Its inputs may be those of an estimate a few seconds old: plans are cached, status.PLAN_MIN_INTERVAL_S.)
    assert command[:2] == ["fecproxy", "plan"] and "--loss" in command and "--rate" in command
    completed = subprocess.run(
        [sys.executable, "-m", "fecproxy", *command[1:], "--json"], capture_output=True, text=True, timeout=60
    )
    recommended = json.loads(completed.stdout)["recommended"]
    if recommended is None:
        assert shown["plan"] is None and "no code meets" in shown["planText"]
    else:
        assert shown["plan"] == [recommended["k"], recommended["m"]]


def test_in_the_background_the_plan_is_computed_off_the_event_loop_and_shown_when_ready():
    """The daemon's loop answers /status.json; a 15–80 ms plan must not hold it up."""
    import threading

    daemon, clock = _view(), _Clock()
    release, threads = threading.Event(), []

    def slow_planner(loss, burst, rate):
        threads.append(threading.current_thread().name)
        release.wait(10)
        return {"recommended": None, "note": "planned", "command": status.plan_command(loss, burst, rate)}

    source = status.StatusSource(build_registry(daemon)[0], clock=clock, planner=slow_planner, background=True)
    clock.now += 5
    daemon.decoder_stats.source_received += 1000
    assert source.document()["plan"]["note"].startswith("computing")  # answered at once
    release.set()
    deadline = time.monotonic() + 10
    while source.document()["plan"].get("note") != "planned" and time.monotonic() < deadline:
        time.sleep(0.01)
    assert source.document()["plan"]["note"] == "planned"
    assert threads == ["fecproxy-plan"]  # one worker, not the caller's thread
