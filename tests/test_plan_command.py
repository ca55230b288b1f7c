"""``fecproxy plan``: its evaluation and plan modes, JSON and text, and ``--from-metrics``.

The planner's arithmetic behind it is checked in test_planner.py.
"""

from __future__ import annotations

import http.server
import json
import math
import threading

import pytest
from scipy.stats import binom

from fecproxy import cli
from fecproxy.commands.plan import parse_prometheus_text
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.planner import evaluate

# -- the command ---------------------------------------------------------------------------------------


def run_plan(capsys, *argv):
    code = cli.main(["plan", *argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_evaluation_mode_json(capsys):
    code, out, _ = run_plan(capsys, "--k", "16", "--m", "4", "--loss", "0.05", "--burst", "1", "--json")
    assert code == 0
    data = json.loads(out)
    exact = evaluate(GilbertElliott.from_loss_burst(0.05, 1), 16, 4)
    assert data["block_failure"] == exact.block_failure
    assert data["residual_loss"] == exact.residual_loss
    assert data["channel"]["mean_burst"] == pytest.approx(1.0)


def test_evaluation_mode_independent_loss_matches_scipy(capsys):
    # --loss alone = independent losses; scipy.stats.binom as oracle.
    code, out, _ = run_plan(capsys, "--k", "16", "--m", "4", "--loss", "0.05", "--json")
    data = json.loads(out)
    assert data["block_failure"] == pytest.approx(binom.sf(4, 20, 0.05), rel=1e-9)
    assert data["residual_loss"] == pytest.approx(0.05 * binom.sf(3, 19, 0.05), rel=1e-9)


def test_evaluation_mode_text_and_short_block(capsys):
    code, out, _ = run_plan(
        capsys, "--k", "32", "--m", "8", "--ge-p", "0.01", "--ge-r", "0.3", "--rate", "10", "--latency-ms", "1000"
    )
    assert code == 0
    assert "effective k 10" in out and "residual datagram loss" in out


def test_plan_table(capsys):
    # Demo scenario (invented): a hill-top radio relay carrying a weather station's telemetry at
    # 40 datagrams/s, 3 % loss in fades of about 2 packets, 0.8 s of latency allowed.
    code, out, _ = run_plan(
        capsys,
        "--loss",
        "0.03",
        "--burst",
        "2",
        "--rate",
        "40",
        "--latency-ms",
        "800",
        "--interleave",
        "1,2,4",
        "--target",
        "1e-3",
    )
    assert code == 0
    assert "recommended (*)" in out
    assert sum(1 for line in out.splitlines() if line.startswith("*")) == 1
    assert "span_ms" in out and "overhead" in out


def test_plan_table_shows_effective_code_for_short_blocks(capsys):
    argv = [
        "--loss",
        "0.03",
        "--burst",
        "2",
        "--rate",
        "14",
        "--latency-ms",
        "800",
        "--flush-ms",
        "500",
        "--target",
        "1e-2",
        "--max-overhead",
        "0.6",
    ]
    code, out, _ = run_plan(capsys, *argv)
    assert code == 0
    assert "k'" in out and "m'" in out and "proportional short-block rule" in out
    assert "blocks close short at this rate: k'=7" in out
    # Enough rate to fill every block: no k'/m' columns.
    code, out, _ = run_plan(
        capsys, "--loss", "0.03", "--burst", "2", "--rate", "1000", "--latency-ms", "50", "--k-values", "4-16"
    )
    assert "k'" not in out


def test_short_block_rule_option(capsys):
    base = ["--k", "16", "--m", "4", "--loss", "0.03", "--burst", "2", "--rate", "10", "--flush-ms", "500", "--json"]
    _, out, _ = run_plan(capsys, *base)
    proportional = json.loads(out)
    _, out, _ = run_plan(capsys, *base, "--short-block-repair", "full")
    full = json.loads(out)
    assert (proportional["k_effective"], proportional["m_effective"]) == (5, 2)
    assert (full["k_effective"], full["m_effective"]) == (5, 4)
    channel = GilbertElliott.from_loss_burst(0.03, 2)
    assert full["residual_loss"] == evaluate(channel, 5, 4).residual_loss
    assert proportional["residual_loss"] == evaluate(channel, 5, 2).residual_loss
    with pytest.raises(SystemExit) as exit_info:  # argparse's choices check
        run_plan(capsys, *base, "--short-block-repair", "some")
    assert exit_info.value.code == 2


def test_plan_json(capsys):
    code, out, _ = run_plan(
        capsys, "--loss", "0.03", "--burst", "2", "--rate", "40", "--latency-ms", "800", "--interleave", "1,2", "--json"
    )
    data = json.loads(out)
    assert code == 0 and data["recommended"]["acceptable"]
    assert {"k", "m", "depth", "overhead", "block_failure", "residual_loss", "block_span_ms"} <= set(
        data["candidates"][0]
    )


def test_plan_reports_no_solution_with_exit_1(capsys):
    code, out, _ = run_plan(
        capsys,
        "--loss",
        "0.3",
        "--burst",
        "10",
        "--rate",
        "50",
        "--latency-ms",
        "100",
        "--max-overhead",
        "0.2",
        "--target",
        "1e-6",
    )
    assert code == 1 and "no candidate meets" in out


@pytest.mark.parametrize(
    "argv,message",
    [
        (["--rate", "10"], "describe the link"),
        (["--loss", "0.1"], "--rate"),
        (["--loss", "0.1", "--ge-p", "0.1", "--ge-r", "0.2", "--rate", "5"], "not both"),
        (["--loss", "0.9", "--burst", "1", "--rate", "5"], "mean burst must be at least"),
        (["--loss", "0.1", "--k", "16"], "both --k and --m"),
        (["--loss", "0.1", "--k", "250", "--m", "10"], "255"),
        (["--loss", "0.1", "--rate", "5", "--k-values", "x"], "not a list"),
        (["--loss", "0.1", "--rate", "5", "--k-values", "300"], "k = 300 is out of range"),
        (["--from-metrics", "ftp://x", "--rate", "5"], "http"),
    ],
)
def test_plan_bad_input_is_a_clean_error(capsys, argv, message):
    code, out, err = run_plan(capsys, *argv)
    assert code == 2 and message in err


def test_help_states_the_convention(capsys):
    with pytest.raises(SystemExit):
        cli.main(["plan", "--help"])
    out = capsys.readouterr().out
    assert "Gilbert 1960" in out and "P(good→bad)" in out and "P(bad→good)" in out


# -- --from-metrics ---------------------------------------------------------------------------------

CANNED_PAGE = """\
# HELP fecproxy_link_loss_ratio link loss before recovery, estimated by the receiver
# TYPE fecproxy_link_loss_ratio gauge
fecproxy_link_loss_ratio{direction="forward"} 0.04
fecproxy_link_loss_ratio{direction="return"} 0.01
# HELP fecproxy_link_mean_burst_packets mean run of consecutive lost packets
# TYPE fecproxy_link_mean_burst_packets gauge
fecproxy_link_mean_burst_packets{direction="forward"} 2.5
fecproxy_link_mean_burst_packets{direction="return"} 1.2
fecproxy_other_total 12
"""


EMPTY_RECEIVER_PAGE = """\
# TYPE fecproxy_link_loss_ratio gauge
fecproxy_link_loss_ratio NaN
# TYPE fecproxy_link_mean_burst_packets gauge
fecproxy_link_mean_burst_packets NaN
"""


@pytest.fixture
def metrics_url(request):
    """A tiny HTTP server on 127.0.0.1 serving a canned Prometheus page (CANNED_PAGE unless the
    test is parametrized indirectly with another page)."""
    page = getattr(request, "param", CANNED_PAGE)

    class Handler(http.server.BaseHTTPRequestHandler):
        def do_GET(self):  # http.server calls the handler by this name
            body = page.encode()
            self.send_response(200 if self.path == "/metrics" else 404)
            self.send_header("Content-Type", "text/plain; version=0.0.4")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args):
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/metrics"
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)


def test_from_metrics(capsys, metrics_url):
    code, out, err = run_plan(
        capsys,
        "--from-metrics",
        metrics_url,
        "--metrics-select",
        "direction=forward",
        "--k",
        "16",
        "--m",
        "4",
        "--json",
    )
    assert code == 0, err
    data = json.loads(out)
    assert data["channel"]["average_loss"] == pytest.approx(0.04)
    assert data["channel"]["mean_burst"] == pytest.approx(2.5)
    assert data["residual_loss"] == evaluate(GilbertElliott.from_loss_burst(0.04, 2.5), 16, 4).residual_loss


@pytest.mark.parametrize("form", ["host:port", "http://host:port", "http://host:port/metrics"])
def test_from_metrics_takes_an_address_as_watch_does(capsys, metrics_url, form):
    """``host:port`` (as in metrics.listen and ``fecproxy watch``) or a URL, with or without path."""
    address = metrics_url.removeprefix("http://").removesuffix("/metrics")
    given = {"host:port": address, "http://host:port": f"http://{address}", "http://host:port/metrics": metrics_url}
    code, out, err = run_plan(
        capsys,
        "--from-metrics",
        given[form],
        "--metrics-select",
        "direction=forward",
        "--k",
        "16",
        "--m",
        "4",
        "--json",
    )
    assert code == 0, err
    assert json.loads(out)["channel"]["average_loss"] == pytest.approx(0.04)


def test_from_metrics_needs_a_selector_when_ambiguous(capsys, metrics_url):
    code, _, err = run_plan(capsys, "--from-metrics", metrics_url, "--rate", "20")
    assert code == 2 and "--metrics-select" in err


@pytest.mark.parametrize("metrics_url", [EMPTY_RECEIVER_PAGE], indirect=True)
def test_from_metrics_before_any_traffic_says_so(capsys, metrics_url):
    code, _, err = run_plan(capsys, "--from-metrics", metrics_url, "--rate", "20")
    assert code == 2 and "no traffic measured yet" in err


def test_from_metrics_unreachable(capsys):
    code, _, err = run_plan(
        capsys, "--from-metrics", "http://127.0.0.1:9/metrics", "--rate", "20", "--metrics-timeout", "2"
    )
    assert code == 2 and "cannot fetch" in err


def test_prometheus_text_parser():
    samples = parse_prometheus_text('a_b{x="1",y="q\\"}"} 3.5\n# c\nbad line\nz NaN\nw 2 1700000000\n')
    assert samples[0] == ("a_b", {"x": "1", "y": 'q\\"}'}, 3.5)
    assert math.isnan(samples[1][2]) and samples[2] == ("w", {}, 2.0)


# -- interleave limit, bytes, config keys ------------------------------------------------------------


def test_plan_offers_no_interleave_deeper_than_the_sender_supports(capsys):
    from fecproxy.protocol.encoder import MAX_INTERLEAVE

    code, _, err = run_plan(
        capsys, "--loss", "0.05", "--burst", "4", "--rate", "500", "--interleave", f"1,{MAX_INTERLEAVE + 1}"
    )
    assert code == 2 and "fec.interleave" in err
    code, _, err = run_plan(capsys, "--loss", "0.05", "--k", "8", "--m", "2", "--interleave", f"{MAX_INTERLEAVE + 1}")
    assert code == 2 and "fec.interleave" in err


def test_recommendation_names_the_sender_config_keys(capsys):
    code, out, _ = run_plan(
        capsys, "--loss", "0.05", "--burst", "3", "--rate", "2000", "--interleave", "1,4", "--max-overhead", "0.5"
    )
    assert code == 0
    line = next(x for x in out.splitlines() if x.startswith("sender config:"))
    assert "fec.block_size:" in line and "fec.repair:" in line and "fec.interleave:" in line and "fec.flush_ms:" in line
    code, out, _ = run_plan(capsys, "--loss", "0.05", "--burst", "3", "--rate", "2000", "--interleave", "1,4", "--json")
    best = json.loads(out)["recommended"]
    assert best["config"] == {"fec.block_size": best["k"], "fec.repair": best["m"], "fec.interleave": best["depth"]}


def test_byte_overhead_budget_and_the_senders_byte_cut(capsys):
    # Mean 100 bytes, longest 1200: a repair packet is ~10 source packets' bytes.  Byte overhead
    # m'·(R + P + 1200)/(k'·(S + 100)) with R, S the repair and source headers and P the symbol
    # prefix; the sender's §8.2 byte rule allows m' ≤ k'·(P + 100)/(P + 1200).
    from fecproxy.protocol import wire

    head_r, head_s, prefix = wire.REPAIR_HEADER_BYTES, wire.SOURCE_HEADER_BYTES, wire.SYMBOL_PREFIX_BYTES
    args = (
        "--loss",
        "0.02",
        "--rate",
        "1000",
        "--k-values",
        "16,32",
        "--mean-bytes",
        "100",
        "--max-bytes",
        "1200",
        "--json",
    )
    code, out, _ = run_plan(capsys, *args)
    rows = json.loads(out)["candidates"]
    for row in rows:
        assert row["byte_overhead"] == pytest.approx(
            row["m_effective"] * (head_r + prefix + 1200) / (row["k_effective"] * (head_s + 100))
        )
        assert row["m_effective"] <= row["k_effective"] * (prefix + 100) // (prefix + 1200)
    code, out, _ = run_plan(capsys, *args, "--max-byte-overhead", "0.5")
    for row in json.loads(out)["candidates"]:
        assert row["byte_overhead"] <= 0.5 + 1e-9
    code, _, err = run_plan(capsys, "--loss", "0.02", "--rate", "1000", "--max-byte-overhead", "0.5")
    assert code == 2 and "sizes" in err


# A receiver's page: its info labels are the code it sends replies with (k=8 m=2), the
# received-code gauges the sender's code it decodes (k=16 m=4) — the one the estimate concerns.
INFO_PAGE = CANNED_PAGE.replace(
    "fecproxy_other_total 12",
    'fecproxy_info{interleave="1",k="8",m="2",role="receiver",version="x"} 1.0\n'
    "fecproxy_received_code_source_symbols 16.0\nfecproxy_received_code_repair_symbols 4.0",
)


@pytest.mark.parametrize("metrics_url", [INFO_PAGE], indirect=True)
def test_from_metrics_shows_the_running_code(capsys, metrics_url):
    code, out, err = run_plan(
        capsys, "--from-metrics", metrics_url, "--metrics-select", "direction=forward", "--rate", "500"
    )
    assert code in (0, 1), err
    assert "arriving now (the peer's code as the metrics page's daemon decodes it): k=16 m=4" in out
    assert "or let the sender choose m from its loss reports:" in out and "fec.adapt: {target_residual: 0.001" in out
