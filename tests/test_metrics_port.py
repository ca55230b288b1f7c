"""The metrics port: served from a trio task (no thread reads the cores' state), bounded in
connections, time and request size, and never in the data path's way.

Unit tests run the server in the test's own trio loop on 127.0.0.1; the whole-process tests run a
``fecproxy run`` pair (tests/support/daemon_pair.py).  Every load loop is bounded in count and time.
"""

from __future__ import annotations

import re
import socket
import threading
import time
import urllib.error
import urllib.request

import pytest
import trio
from prometheus_client import CollectorRegistry, Counter
from support.daemon_pair import LOOPBACK, send_paced, wait_until
from support.keys import keyed

from fecproxy.shell import http_server
from fecproxy.shell.metrics import serve


def _get(url: str, timeout: float = 5.0) -> tuple[int, str]:
    with urllib.request.urlopen(url, timeout=timeout) as response:
        return response.status, response.read().decode()


def _registry() -> CollectorRegistry:
    registry = CollectorRegistry(auto_describe=False)
    Counter("fecproxy_test_things", "Things.", registry=registry).inc(3)
    return registry


async def _started(nursery) -> http_server.HttpServer:
    server = serve(_registry(), LOOPBACK, 0)
    await nursery.start(server.run)
    return server


async def test_answers_metrics_status_and_head_with_connection_close(nursery):
    server = await _started(nursery)
    base = f"http://{LOOPBACK}:{server.port}"
    status, text = await trio.to_thread.run_sync(_get, base + "/metrics")
    assert status == 200 and "fecproxy_test_things_total 3.0" in text
    status, text = await trio.to_thread.run_sync(_get, base + "/status.json")
    assert status == 200 and '"fecproxy_test_things_total": 3.0' in text
    head = urllib.request.Request(base + "/", method="HEAD")  # the status page answers HEAD

    def head_request():
        with urllib.request.urlopen(head, timeout=5) as response:
            return response.headers, response.read()

    headers, body = await trio.to_thread.run_sync(head_request)
    assert body == b"" and headers["Connection"] == "close"
    server.stop()


async def test_oversized_request_head_is_refused(nursery):
    server = await _started(nursery)

    def oversized():
        with socket.create_connection((LOOPBACK, server.port), timeout=5) as sock:
            sock.sendall(
                b"GET /metrics HTTP/1.1\r\nX-Filler: " + b"a" * (http_server.MAX_HEAD_BYTES + 10) + b"\r\n\r\n"
            )
            return sock.recv(200)

    reply = await trio.to_thread.run_sync(oversized)
    assert reply.startswith(b"HTTP/1.1 431 ")
    assert server.stats.malformed == 1
    server.stop()


async def test_a_silent_connection_is_closed_at_the_timeout(nursery, monkeypatch):
    monkeypatch.setattr(http_server, "CONNECTION_TIMEOUT_S", 0.3)
    server = await _started(nursery)
    sock = trio.socket.socket()
    with sock:
        await sock.connect((LOOPBACK, server.port))
        await sock.send(b"GET /metr")  # and nothing more
        with trio.fail_after(5):
            assert await sock.recv(100) == b""  # closed by the server
    assert server.stats.timed_out == 1 and server.open_connections == 0
    server.stop()


async def test_idle_connections_beyond_the_cap_push_out_the_oldest_and_scrapes_still_answer(nursery):
    server = await _started(nursery)
    idle = []
    try:
        for _ in range(3 * http_server.MAX_CONNECTIONS):
            sock = trio.socket.socket()
            await sock.connect((LOOPBACK, server.port))
            idle.append(sock)
        await wait_until_trio(lambda: server.stats.accepted == len(idle))
        assert server.open_connections <= http_server.MAX_CONNECTIONS
        status, text = await trio.to_thread.run_sync(_get, f"http://{LOOPBACK}:{server.port}/metrics")
        assert status == 200 and "fecproxy_test_things_total" in text
        assert server.stats.evicted >= 2 * http_server.MAX_CONNECTIONS
    finally:
        for sock in idle:
            sock.close()
        server.stop()


async def wait_until_trio(predicate, timeout: float = 5.0) -> None:
    with trio.fail_after(timeout):
        while not predicate():
            await trio.sleep(0.01)


# ------------------------------------------------------------------------------ whole process

#: Flows opened and closed during the scrape-under-churn test: thousands, as the issue asks, and
#: a table of 64 so that nearly every one evicts another (sockets closed on the receiver).
CHURN_FLOWS = 3000
CHURN_TABLE = 64
#: Scrapes (of the four endpoints, in turn) that must overlap the churn, and a cap on the flows.
MIN_SCRAPES = 40
MAX_CHURN_FLOWS = 30_000
#: Upper bound for the churn, whatever the machine's load.
CHURN_TIMEOUT_S = 60.0


@pytest.mark.slow
def test_scrapes_in_a_tight_loop_never_fail_while_thousands_of_flows_open_and_close(pairs):
    flows = {"max": CHURN_TABLE, "protect_s": 0}
    pair = pairs(sender_extra={"flows": flows}, receiver_extra={"flows": flows}, echo=True)
    urls = [
        f"http://{LOOPBACK}:{daemon.metrics_port}{path}"
        for daemon in (pair.sender, pair.receiver)
        for path in ("/metrics", "/status.json")
    ]
    done = threading.Event()
    failures: list[str] = []
    scrapes = [0]

    def scrape() -> None:
        while not done.is_set():
            for url in urls:
                try:
                    status, _ = _get(url)
                    if status != 200:
                        failures.append(f"{url}: HTTP {status}")
                except (OSError, urllib.error.URLError) as error:
                    failures.append(f"{url}: {error}")
                scrapes[0] += 1

    scraper = threading.Thread(target=scrape, daemon=True)
    scraper.start()
    deadline = time.monotonic() + CHURN_TIMEOUT_S
    sent = 0
    try:
        # Churn until thousands of flows went through and the scraper read each endpoint often.
        while sent < CHURN_FLOWS or scrapes[0] < MIN_SCRAPES:
            if time.monotonic() > deadline or sent >= MAX_CHURN_FLOWS:
                break
            with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as client:  # a new source port: a new flow
                client.sendto(b"reading", pair.sender.listen_address)
            sent += 1
            if sent % 20 == 0:
                time.sleep(0.01)  # about 2 000 new flows a second: churn, not a flood
    finally:
        done.set()
        scraper.join(timeout=10)
    assert sent >= CHURN_FLOWS
    assert wait_until(lambda: pair.receiver.metric("fecproxy_flows_evicted_total") > CHURN_FLOWS / 2, 20)
    assert not failures, failures[:5]
    assert scrapes[0] >= MIN_SCRAPES, (scrapes[0], sent)


#: Idle connections held open while the pair forwards (the issue's figure).
IDLE_CONNECTIONS = 300
#: Forwarding latency is sampled with this many echo round trips per run.
LATENCY_SAMPLES = 400
LATENCY_RATE = 200.0


def _round_trips(pair, stream: int) -> list[float]:
    """Echo round-trip times through the pair (client -> sender -> receiver -> server -> back)."""
    client = pair.client(stream)
    sent_at: dict[int, float] = {}
    rtts: list[float] = []

    def send(seq: int) -> None:
        sent_at[seq] = time.monotonic()
        client.send(seq)
        collect()

    def collect() -> bool:
        before = len(client.replies)
        client.collect()
        now = time.monotonic()
        for reply in client.replies[before:]:
            if reply is not None and reply[1] in sent_at:
                rtts.append(now - sent_at.pop(reply[1]))
        return not sent_at

    send_paced(send, LATENCY_SAMPLES, LATENCY_RATE)
    wait_until(collect, 5, interval=0.001)
    return rtts


def _p99(values: list[float]) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(0.99 * len(ordered)))]


#: Rounds of (baseline, with the connections) the p99 comparison may take: a shared machine's
#: scheduling hiccup of 100 ms spoils one round's p99 now and then; a stall caused by the
#: connections would spoil every round (each opens and closes its own 300).
LATENCY_ROUNDS = 3


def _measure(pair, stream: int, connections: int) -> list[float]:
    """Round trips measured while ``connections`` connections to the receiver's metrics port open,
    sit idle and then all close at once; /metrics is read meanwhile either way (the test process
    does the same work in both runs, so only the connections differ)."""
    address = (LOOPBACK, pair.receiver.metrics_port)
    loaded: list[float] = []
    measure = threading.Thread(target=lambda: loaded.extend(_round_trips(pair, stream)), daemon=True)
    measure.start()
    idle: list[socket.socket] = []
    try:
        idle.extend(socket.create_connection(address, timeout=5) for _ in range(connections))
        # /metrics still answers (the oldest idle connections are pushed out to make room), and
        # the new flow opened its socket on the receiver: nothing dropped for want of one.
        # The measuring thread's first datagram may still be on its way when the connections are
        # open (a race, not a fault): read until its flow shows, for a few seconds at most.
        pages: list[tuple[int, str]] = []

        def measuring_flow_shows() -> bool:
            pages.append(_get(f"http://{LOOPBACK}:{pair.receiver.metrics_port}/metrics"))
            found = re.search(r"^fecproxy_flows (\S+)$", pages[-1][1], flags=re.MULTILINE)
            return pages[-1][0] == 200 and found is not None and float(found.group(1)) >= 2

        shown = wait_until(measuring_flow_shows, 5, interval=0.05)
        status, text = pages[-1]
        assert status == 200
        assert shown, "the measuring client's flow is in the table"
        assert 'fecproxy_packets_dropped_total{reason="no_socket"} 0.0' in text
    finally:
        for sock in idle:
            sock.close()
    measure.join(timeout=30)
    return loaded


@pytest.mark.slow
def test_300_idle_metrics_connections_leave_flows_metrics_and_forwarding_alone(pairs):
    pair = pairs(echo=True, sender_fec={"flush_ms": 5}, receiver_fec={"flush_ms": 5})
    pair.client(1).send(0)  # a first flow, so the measuring clients' are the second and later
    rounds = []
    for attempt in range(LATENCY_ROUNDS):
        baseline = _measure(pair, 10 + 2 * attempt, 0)
        loaded = _measure(pair, 11 + 2 * attempt, IDLE_CONNECTIONS)
        assert len(baseline) >= 0.95 * LATENCY_SAMPLES and len(loaded) >= 0.95 * LATENCY_SAMPLES
        p99_base, p99_loaded = _p99(baseline), _p99(loaded)
        rounds.append((round(p99_base * 1e3, 2), round(p99_loaded * 1e3, 2)))
        print(
            f"forwarding round-trip p99: without {p99_base * 1e3:.2f} ms, with 300 idle connections opened and "
            f"closed {p99_loaded * 1e3:.2f} ms, ratio {p99_loaded / p99_base:.2f}"
        )
        # Generous margins: the machine is shared; the old thread-per-connection server stalled 0.7 s.
        if p99_loaded <= max(3 * p99_base, p99_base + 0.03):
            break
    else:
        raise AssertionError(f"p99 (ms) without / with the connections, every round worse: {rounds}")


def test_the_started_line_names_the_metrics_url_and_the_key_plainly(pairs, tmp_path):
    pair = pairs(**keyed(tmp_path))
    for daemon in (pair.sender, pair.receiver):
        url, auth = daemon.started["metrics"], daemon.started["auth"]
        assert url == f"http://{LOOPBACK}:{daemon.metrics_port}/metrics"
        status, text = _get(url)  # the URL as printed answers
        assert status == 200 and "fecproxy_info" in text
        # The mode first, then the key id and fingerprint to compare with the peer's line: no
        # Python repr of an internal object.
        assert auth.startswith("MAC (not encrypted), key 0x") and "fingerprint" in auth and "Keyring" not in auth
