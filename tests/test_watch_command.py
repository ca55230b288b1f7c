"""``fecproxy watch``: its rendering from known metrics text, and one whole-process run."""

from __future__ import annotations

import json
import re
import socket
import subprocess
import sys
import threading
from http.server import BaseHTTPRequestHandler, HTTPServer

import pytest

from fecproxy.commands import watch
from fecproxy.commands.watch import figures, histogram_quantile, metrics_url, parse_metrics, render

#: A receiver's /metrics as fecproxy serves it (trimmed to what watch reads), invented figures.
SNAPSHOT = """\
# TYPE fecproxy_source_packets_sent_total counter
fecproxy_source_packets_sent_total 200.0
# TYPE fecproxy_repair_packets_sent_total counter
fecproxy_repair_packets_sent_total 50.0
# TYPE fecproxy_source_bytes_sent_total counter
fecproxy_source_bytes_sent_total 20000.0
# TYPE fecproxy_repair_bytes_sent_total counter
fecproxy_repair_bytes_sent_total 8000.0
# TYPE fecproxy_link_packets_received_total counter
fecproxy_link_packets_received_total{kind="source"} 950.0
fecproxy_link_packets_received_total{kind="repair"} 230.0
# TYPE fecproxy_source_packets_lost_total counter
fecproxy_source_packets_lost_total 50.0
# TYPE fecproxy_datagrams_recovered_total counter
fecproxy_datagrams_recovered_total 48.0
# TYPE fecproxy_datagrams_unrecovered_total counter
fecproxy_datagrams_unrecovered_total 2.0
# TYPE fecproxy_packets_dropped_total counter
fecproxy_packets_dropped_total{reason="malformed"} 3.0
fecproxy_packets_dropped_total{reason="late"} 0.0
# TYPE fecproxy_flows gauge
fecproxy_flows 4.0
# TYPE fecproxy_link_loss_ratio gauge
fecproxy_link_loss_ratio 0.05
# TYPE fecproxy_link_mean_burst_packets gauge
fecproxy_link_mean_burst_packets 1.5
# TYPE fecproxy_info gauge
fecproxy_info{k="16",m="4",role="receiver",version="0.1.0"} 1.0
# TYPE fecproxy_recovery_delay_seconds histogram
fecproxy_recovery_delay_seconds_bucket{le="0.01"} 0.0
fecproxy_recovery_delay_seconds_bucket{le="0.1"} 40.0
fecproxy_recovery_delay_seconds_bucket{le="1.0"} 48.0
fecproxy_recovery_delay_seconds_bucket{le="+Inf"} 48.0
fecproxy_recovery_delay_seconds_count 48.0
fecproxy_recovery_delay_seconds_sum 2.4
"""


def test_totals_frame_shows_every_dashboard_figure():
    text = render([("http://127.0.0.1:11465/metrics", figures(parse_metrics(SNAPSHOT)))], "now")
    assert "role=receiver  code k=16 m=4" in text
    assert re.search(r"link loss \(before recovery\)\s+5\.000 %\s+50 of 1000 source packets", text)
    assert re.search(r"residual loss \(after\)\s+0\.200 %", text)
    assert re.search(r"recovered\s+48 total", text)
    assert re.search(r"repair overhead\s+25\.000 % packets\s+40\.000 % bytes", text)
    # 40 of 48 below 0.1 s: p50 at rank 24 lies 24/40 of the way through (0.01, 0.1].
    assert "p50 64.0 ms" in text
    assert re.search(r"drops\s+malformed 3 total$", text, re.M)  # zero reasons are left out
    assert re.search(r"flows\s+4$", text, re.M)
    assert "loss 5.000 %, mean burst 1.50 packets" in text


#: An in-order receiver's delivery figures (invented): 100 datagrams, 10 waited, 2 gaps skipped.
IN_ORDER = """\
# TYPE fecproxy_delivery_wait_seconds histogram
fecproxy_delivery_wait_seconds_bucket{le="0.0"} 90.0
fecproxy_delivery_wait_seconds_bucket{le="0.01"} 95.0
fecproxy_delivery_wait_seconds_bucket{le="0.1"} 100.0
fecproxy_delivery_wait_seconds_bucket{le="+Inf"} 100.0
fecproxy_delivery_wait_seconds_count 100.0
fecproxy_delivery_wait_seconds_sum 0.3
# TYPE fecproxy_delivery_held_total counter
fecproxy_delivery_held_total 10.0
# TYPE fecproxy_delivery_gaps_skipped_total counter
fecproxy_delivery_gaps_skipped_total{reason="max_wait"} 2.0
fecproxy_delivery_gaps_skipped_total{reason="given_up"} 0.0
"""


def test_in_order_wait_is_shown_only_for_a_daemon_that_delivers_in_order():
    assert "in-order wait                — (delivering as available" in render(
        [("u", figures(parse_metrics(SNAPSHOT)))]
    )
    text = render([("u", figures(parse_metrics(SNAPSHOT + IN_ORDER)))])
    # 90 of 100 waited 0: p50 is 0; p99 at rank 99 lies 4/5 of the way through (0.01, 0.1].
    assert re.search(r"in-order wait\s+p50 0\.0 ms .* p99 82\.0 ms\s+held 10 total, gaps skipped 2 total", text)


def test_rates_between_two_reads_and_a_down_endpoint():
    before = parse_metrics(SNAPSHOT)
    later = parse_metrics(
        SNAPSHOT.replace("fecproxy_datagrams_recovered_total 48.0", "fecproxy_datagrams_recovered_total 68.0")
        .replace('kind="source"} 950.0', 'kind="source"} 1130.0')
        .replace("fecproxy_source_packets_lost_total 50.0", "fecproxy_source_packets_lost_total 70.0")
    )
    text = render(
        [
            ("sender", "ConnectionRefusedError: [Errno 111] Connection refused"),
            ("receiver", figures(later, before, 2.0)),
        ]
    )
    assert "sender\n  DOWN: ConnectionRefusedError" in text
    assert re.search(r"link loss \(before recovery\)\s+10\.000 %\s+20 of 200", text)
    assert re.search(r"recovered\s+10\.0/s", text)
    assert re.search(r"residual loss \(after\)\s+0\.000 %", text)
    assert "(last 2.0 s)" in text
    assert re.search(r"drops\s+none", text)


def test_histogram_quantile_matches_prometheus_rules():
    # Prometheus docs, "histogram_quantile()": linear interpolation within the bucket; a rank in
    # the +Inf bucket returns the highest finite upper bound.
    assert histogram_quantile(0.5, [(1.0, 10.0), (2.0, 20.0), (float("inf"), 20.0)]) == 1.0
    assert histogram_quantile(0.75, [(1.0, 10.0), (2.0, 20.0), (float("inf"), 20.0)]) == 1.5
    assert histogram_quantile(0.99, [(1.0, 10.0), (float("inf"), 20.0)]) == 1.0
    assert histogram_quantile(0.5, [(1.0, 0.0), (float("inf"), 0.0)]) is None


def test_metrics_url_forms():
    assert metrics_url("127.0.0.1:11464") == "http://127.0.0.1:11464/metrics"
    assert metrics_url("http://127.0.0.1:11464") == "http://127.0.0.1:11464/metrics"
    assert metrics_url("http://h:1/custom") == "http://h:1/custom"


#: What the same receiver's /status.json says beside its metrics (invented address).
STATUS = {"daemon": {"role": "receiver", "peer": "127.0.0.1:40001", "peer_from": "learned"}}


class _Snapshot(BaseHTTPRequestHandler):
    def do_GET(self):
        status = self.path.startswith("/status.json")
        body = json.dumps(STATUS).encode() if status else SNAPSHOT.encode()
        self.send_response(200)
        self.send_header("Content-Type", "application/json" if status else "text/plain; version=0.0.4")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *args):
        pass


@pytest.fixture
def snapshot_server():
    server = HTTPServer(("127.0.0.1", 0), _Snapshot)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    yield f"127.0.0.1:{server.server_address[1]}"
    server.shutdown()
    server.server_close()


def closed_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]  # closed again when the probe closes: nothing listens


def test_whole_process_two_frames_with_one_endpoint_down(snapshot_server):
    down = f"127.0.0.1:{closed_port()}"
    result = subprocess.run(
        [sys.executable, "-m", "fecproxy", "watch", snapshot_server, down, "--count", "2", "--interval", "0.1"],
        capture_output=True,
        text=True,
        timeout=60,
        stdin=subprocess.DEVNULL,
    )
    assert result.returncode == 0, result.stderr
    out = result.stdout
    assert out.count("fecproxy watch") == 2
    assert "(since start)" in out and "(last 0." in out  # the second frame shows rates
    assert out.count("DOWN: ") == 2 and "Connection refused" in out
    assert "link loss (before recovery)       5.000 %" in out
    assert out.count("peer address                 127.0.0.1:40001 (learned)") == 2


def test_once_with_every_endpoint_down_exits_1():
    result = subprocess.run(
        [sys.executable, "-m", "fecproxy", "watch", f"127.0.0.1:{closed_port()}", "--once"],
        capture_output=True,
        text=True,
        timeout=60,
        stdin=subprocess.DEVNULL,
    )
    assert result.returncode == 1
    assert "DOWN: " in result.stdout


IMPAIR_PAGE = """\
# TYPE fecproxy_impair_datagrams_sent_total counter
fecproxy_impair_datagrams_sent_total{direction="forward"} 10.0
"""


def test_an_endpoint_that_is_not_a_daemon_says_what_it_is():
    from fecproxy.commands.watch import not_a_daemon

    impair = not_a_daemon(parse_metrics(IMPAIR_PAGE))
    assert impair is not None and "fecproxy impair's endpoint" in impair.text
    other = not_a_daemon(parse_metrics("# TYPE node_load1 gauge\nnode_load1 0.5\n"))
    assert other is not None and "no fecproxy_info" in other.text
    assert not_a_daemon(parse_metrics(SNAPSHOT)) is None
    frame = render([("http://127.0.0.1:1/metrics", impair)])
    assert "NOT A DAEMON: this is fecproxy impair's endpoint" in frame and "link loss" not in frame


def test_whole_process_watch_pointed_at_impair_says_so_and_exits_1():
    from support.processes import Child, fecproxy

    far = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    far.bind(("127.0.0.1", 0))
    relay = Child(
        fecproxy(
            "impair", "--listen", "127.0.0.1:0", "--to", f"127.0.0.1:{far.getsockname()[1]}",
            "--metrics", "127.0.0.1:0", "--seconds", "30",
        )
    )  # fmt: skip
    try:
        url = relay.wait_for(r"^metrics: (\S+)").group(1)
        result = subprocess.run(
            [sys.executable, "-m", "fecproxy", "watch", url, "--once"],
            capture_output=True,
            text=True,
            timeout=60,
            stdin=subprocess.DEVNULL,
        )
    finally:
        relay.stop()
        far.close()
    assert result.returncode == 1
    assert "NOT A DAEMON: this is fecproxy impair's endpoint" in result.stdout


def test_event_lines_and_the_status_url():
    from fecproxy.commands.watch import event_line, status_url

    event = {"ts": "2026-12-03T18:46:52.120Z", "level": "warning", "event": "peer_silent", "fields": {"quiet_s": 5}}
    assert event_line(event) == "18:46:52 warning peer_silent quiet_s=5"
    assert status_url("http://127.0.0.1:11465/metrics", 7) == "http://127.0.0.1:11465/status.json?events_since=7"


def test_whole_process_watch_events_shows_a_running_daemons_history(pairs):
    pair = pairs()
    result = subprocess.run(
        [sys.executable, "-m", "fecproxy", "watch", f"127.0.0.1:{pair.receiver.metrics_port}", "--once", "--events"],
        capture_output=True,
        text=True,
        timeout=60,
        stdin=subprocess.DEVNULL,
    )
    assert result.returncode == 0, result.stderr
    assert re.search(r"^    \d\d:\d\d:\d\d info    started version=", result.stdout, flags=re.MULTILINE), result.stdout


def test_far_end_tells_reports_arriving_from_no_reports():
    """Reports that cover too few datagrams for a ratio are not "no loss report yet"."""
    nan = float("nan")
    base = {
        ("fecproxy_peer_silent", ()): 0.0,
        ("fecproxy_peer_last_heard_seconds", ()): 0.2,
        ("fecproxy_peer_link_loss_ratio", ()): nan,
        ("fecproxy_peer_residual_loss_ratio", ()): nan,
    }
    assert watch._far_end(base).startswith("no loss report yet")
    arriving = {**base, ("fecproxy_reports_received_total", ()): 3.0}
    assert watch._far_end(arriving).startswith("loss reports arriving, under 200 datagrams")
