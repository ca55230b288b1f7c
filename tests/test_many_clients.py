"""Thousands of short-lived request/response clients, each from a new source port, through a pair.

Every client is a fresh UDP socket (on a loopback address of its own, so the kernel's reuse of
ports cannot make two clients one) that sends one request and waits for its echo, as a resolver or
a poller does.  With the flow tables smaller than the number of clients, the tables must recycle:
each new client takes the least recently active flow (counted as evicted), none is refused
(``flow_limit``), and a reply reaches only the client that asked (the payload names its client).
On a lossy link the share of clients answered must match the planner's exact figure for the code
actually sent in each direction, within a binomial bound.

Whole-process (``fecproxy run`` twice, support/daemon_pair.py, support/lossy_relay.py); loopback
only; every loop bounded in count and time; at most ``MAX_OPEN_CLIENTS`` client sockets open in
this process at once.
"""

from __future__ import annotations

import selectors
import socket
import time
from collections import deque

import pytest
from scipy.stats import binom
from support.daemon_pair import Pair, check_payload, make_payload
from support.lossy_relay import iid_loss

from fecproxy.linkmodel import planner

pytestmark = pytest.mark.slow

CLIENTS = 5_000
#: New clients a second: 10 s per run, well within both daemons' capacity on a busy 2-core box,
#: and under flows.max per protected interval, so the LRU flow is always evictable.
CLIENT_RATE = 500.0
#: Flow tables of both daemons: a fifth of the clients, so about 4 of 5 must come from recycling.
FLOWS_MAX = 1024
#: Whole seconds (the config key's unit): with CLIENT_RATE new clients a second, the flows active
#: within it (~500) are fewer than FLOWS_MAX, so nothing is refused.
PROTECT_S = 1
#: Longer than a run, so no flow expires on a timer: every recycled flow is an eviction.
TIMEOUT_S = 300
#: Client sockets open at once in this process (far below its file-descriptor limit).
MAX_OPEN_CLIENTS = 1_500
#: A client gives up this long after its request: well past a round trip plus the lossy test's
#: flush (1 s) and decoder hold.
ANSWER_TIMEOUT = 3.0
#: Upper bound for a whole run of clients (10 s of sending, then the last answers).
RUN_TIMEOUT = 40.0


def flows_config(max_flows: int = FLOWS_MAX) -> dict:
    return {
        "flows": {
            "max": max_flows,
            "protect_s": PROTECT_S,
            "idle_timeout_s": TIMEOUT_S,
            "first_exchange_timeout_s": TIMEOUT_S,
        }
    }


def client_host(client: int) -> str:
    """A loopback address of the client's own (127.1.0.1 on): the kernel reuses a closed socket's
    port for a later one, and a reused address is the same client to the sender, so distinct
    addresses make every client a new flow however the ports fall."""
    return f"127.1.{client // 250}.{client % 250 + 1}"


def run_clients(destination: tuple[str, int], count: int, rate: float) -> tuple[set[int], int]:
    """Start ``count`` clients at ``rate`` a second, each a new socket sending one request; return
    the clients answered with their own reply, and the number of replies that were someone else's."""
    selector = selectors.DefaultSelector()
    pending: deque[tuple[float, int, socket.socket]] = deque()  # in send order: (sent at, client, socket)
    answered: set[int] = set()
    misrouted = 0
    started = time.monotonic()
    deadline = started + RUN_TIMEOUT
    next_client = 0
    try:
        while (next_client < count or pending) and time.monotonic() < deadline:
            now = time.monotonic()
            while next_client < count and started + next_client / rate <= now and len(pending) < MAX_OPEN_CLIENTS:
                sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
                sock.bind((client_host(next_client), 0))
                sock.setblocking(False)
                sock.sendto(make_payload(next_client % 65_536, next_client // 65_536), destination)
                selector.register(sock, selectors.EVENT_READ, next_client)
                pending.append((now, next_client, sock))
                next_client += 1
            for key, _ in selector.select(timeout=0.002):
                client, fileobj = key.data, key.fileobj
                assert isinstance(fileobj, socket.socket)
                sock = fileobj
                try:
                    data = sock.recv(65_535)
                except BlockingIOError:
                    continue
                selector.unregister(sock)
                sock.close()
                if check_payload(data) == (client % 65_536, client // 65_536):
                    answered.add(client)
                else:
                    misrouted += 1
            while pending and (pending[0][2].fileno() == -1 or now - pending[0][0] > ANSWER_TIMEOUT):
                _, _, sock = pending.popleft()
                if sock.fileno() != -1:
                    selector.unregister(sock)
                    sock.close()
    finally:
        for _, _, sock in pending:
            if sock.fileno() != -1:
                selector.unregister(sock)
                sock.close()
        selector.close()
    assert next_client == count, f"only {next_client} of {count} clients started within {RUN_TIMEOUT}s"
    return answered, misrouted


def flow_counters(pair: Pair) -> dict[str, dict[str, float]]:
    out = {}
    for name, daemon in (("sender", pair.sender), ("receiver", pair.receiver)):
        out[name] = {
            "evicted": daemon.metric("fecproxy_flows_evicted_total"),
            "flows": daemon.metric("fecproxy_flows"),
            "flow_limit": daemon.metric("fecproxy_packets_dropped_total", reason="flow_limit"),
            "no_socket": daemon.metric("fecproxy_packets_dropped_total", reason="no_socket"),
            "unknown_flow": daemon.metric("fecproxy_packets_dropped_total", reason="unknown_flow"),
        }
    return out


def test_every_one_of_thousands_of_fresh_clients_is_answered_on_a_clean_link(tmp_path):
    pair = Pair(tmp_path, echo=True, sender_extra=flows_config(), receiver_extra=flows_config())
    try:
        answered, misrouted = run_clients(pair.sender.listen_address, CLIENTS, CLIENT_RATE)
        counters = flow_counters(pair)
        server_streams = len(pair.server.sources)
    finally:
        pair.close()
    assert misrouted == 0
    assert len(answered) == CLIENTS, f"{CLIENTS - len(answered)} clients unanswered; {counters}"
    assert server_streams == CLIENTS
    for side in ("sender", "receiver"):
        # No flow expires within a run (TIMEOUT_S), so each client beyond the table's size took
        # the least recently active flow: exactly that many evictions, and none refused.
        assert counters[side]["evicted"] == CLIENTS - FLOWS_MAX, counters
        assert counters[side]["flows"] == FLOWS_MAX, counters
        assert counters[side]["flow_limit"] == counters[side]["no_socket"] == 0, counters


#: Link loss each way, i.i.d. (support/lossy_relay.iid_loss).
LOSS = 0.10
#: k=4, m=2 in both directions.  Every block is full: requests (and their echoes) arrive at
#: CLIENT_RATE, so four fill a block within ~8 ms, long before the 1 s flush; only the last block
#: of a run may close short.  So the code actually sent each way is the (6, 4) code.
K, M = 4, 2
LOSSY_FEC = {"block_size": K, "repair": M, "flush_ms": 1000}
#: Above the peer's flush (1 s), as the decoder requires.
LOSSY_DECODER = {"hold_ms": 1500}
#: Two-sided tail probability of the acceptance interval: a correct implementation fails it about
#: once in 10 000 runs.
ALPHA = 1e-4


def test_answer_rate_through_a_lossy_link_matches_the_planner_and_nobody_is_refused(tmp_path):
    extra = flows_config() | {"decoder": LOSSY_DECODER}
    pair = Pair(
        tmp_path,
        echo=True,
        sender_fec=LOSSY_FEC,
        receiver_fec=LOSSY_FEC,
        forward=iid_loss(LOSS, seed=6363),
        back=iid_loss(LOSS, seed=6865),
        sender_extra=extra,
        receiver_extra=extra,
    )
    try:
        answered, misrouted = run_clients(pair.sender.listen_address, CLIENTS, CLIENT_RATE)
        counters = flow_counters(pair)
        blocks = {
            name: (d.metric("fecproxy_blocks_sent_total"), d.metric("fecproxy_short_blocks_sent_total"))
            for name, d in (("sender", pair.sender), ("receiver", pair.receiver))
        }
    finally:
        pair.close()
    assert misrouted == 0
    # The code actually sent: full (6, 4) blocks, bar a short last one per direction.
    for name, (sent, short) in blocks.items():
        assert sent > CLIENTS * 0.9 / K and short <= 2, (name, blocks)
    # Planner, exact for i.i.d. loss: residual loss per datagram of an (n, k) MDS code is
    # p · P[Binomial(n − 1, p) ≥ n − k] (shared design notes §4), checked here against scipy.
    residual = planner.iid_residual_loss(K, M, LOSS)
    assert residual == pytest.approx(LOSS * binom.sf(M - 1, K + M - 1, LOSS), rel=1e-9)
    # A client is answered when its request and the echo both survive, each in its own direction.
    answer_rate = (1 - residual) ** 2
    unanswered = CLIENTS - len(answered)
    # Bound: losses are independent across blocks but not within one (a failed block loses
    # about two datagrams together), so the count's variance is up to K times a binomial's.
    # Counting in blocks, unanswered / K has at most the variance of Binomial(CLIENTS / K, q)
    # with q = 1 − answer rate; its ALPHA quantiles (scipy.stats.binom.ppf) give the interval.
    q = 1 - answer_rate
    low = K * binom.ppf(ALPHA / 2, CLIENTS // K, q)
    high = K * binom.ppf(1 - ALPHA / 2, CLIENTS // K, q)
    print(f"unanswered {unanswered} of {CLIENTS}; planner expects {CLIENTS * q:.1f}, interval [{low:.0f}, {high:.0f}]")
    assert low <= unanswered <= high, (unanswered, (low, high), CLIENTS * q, counters)
    for side in ("sender", "receiver"):
        assert counters[side]["flow_limit"] == counters[side]["no_socket"] == 0, counters
