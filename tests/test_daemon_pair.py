"""Whole-process tests: ``fecproxy run`` pairs on 127.0.0.1 with a lossy relay between them.

The harness (daemon processes, relay, application endpoints and their self-checking datagrams)
is ``support/daemon_pair.py``; the ``pairs`` fixture that starts and stops pairs is in
``tests/conftest.py``.  Every wait is bounded by a timeout; every load loop by a count.
"""

from __future__ import annotations

import json
import math
import random
import signal
import socket
import struct
import subprocess
import time
from collections import Counter, defaultdict
from pathlib import Path

import pytest
from scipy.stats import binom, hypergeom
from support.daemon_pair import (
    DRAIN_TIMEOUT,
    LOOPBACK,
    REPAIR,
    SOURCE,
    STARTUP_TIMEOUT,
    drain,
    parse_link_header,
    receiver_config,
    send_paced,
    sender_config,
    wait_until,
    write_config,
)
from support.lossy_relay import drop_indices, iid_loss
from support.processes import run_to_exit

from fecproxy.commands import EXIT_CANNOT_START, EXIT_INVALID, EXIT_UNREADABLE
from fecproxy.protocol import wire

#: Exit bound required of a daemon after SIGTERM: "exit 0 within a second".
SIGTERM_EXIT_SECONDS = 1.0
#: A flush interval far longer than any test's traffic burst: blocks close only when full, so
#: link packet i of the forward direction is packet i % (k + m) of block i // (k + m).
NEVER_FLUSH_MS = 30_000

# --------------------------------------------------------------------------------------------
# Reading the link
# --------------------------------------------------------------------------------------------


def exact_residual(packets, k: int, m: int) -> tuple[int, int]:
    """(source packets lost on the link, source datagrams no decoder can rebuild), computed from
    the relay's own record of the forward direction, with blocks aligned as NEVER_FLUSH_MS makes
    them: an MDS code rebuilds a block exactly when at most m of its k + m packets are lost."""
    n = k + m
    lost_sources = 0
    residual = 0
    per_block: dict[int, list[int]] = defaultdict(list)
    for index, dropped, _ in packets:
        if dropped:
            per_block[index // n].append(index % n)
    for positions in per_block.values():
        sources = sum(1 for p in positions if p < k)
        lost_sources += sources
        if len(positions) > m:
            residual += sources
    return lost_sources, residual


def assert_aligned(packets, k: int, m: int) -> None:
    """Link packet i is ESI i % n of block i // n: the premise of ``exact_residual``."""
    n = k + m
    for index, _, data in packets:
        kind, _, sbn, esi = parse_link_header(data)
        assert (sbn, esi) == (index // n, index % n), f"packet {index} is {sbn}/{esi}"
        assert kind == (SOURCE if esi < k else REPAIR)


# --------------------------------------------------------------------------------------------
# The data path
# --------------------------------------------------------------------------------------------


def test_no_corrupted_or_duplicated_datagram_is_ever_delivered(pairs):
    """20 % i.i.d. loss: many blocks are rebuilt, many fail; whatever arrives is bit-exact."""
    count = 1600
    pair = pairs(sender_fec={"flush_ms": NEVER_FLUSH_MS}, forward=iid_loss(0.20, seed=7), record=True)
    client = pair.client(stream=1)
    send_paced(client.send, count, rate=2000)
    drain(pair, count)
    assert pair.server.corrupted == 0
    received = Counter(pair.server.received)
    assert max(received.values()) == 1, "a datagram was delivered twice"
    assert set(received) <= {(1, seq) for seq in range(count)}
    metrics = pair.receiver.metrics()
    assert metrics[("fecproxy_datagrams_recovered_total", ())] > 0
    assert metrics[("fecproxy_datagrams_unrecovered_total", ())] > 0
    assert metrics[("fecproxy_datagrams_delivered_total", ())] == len(received)
    assert len(received) + metrics[("fecproxy_datagrams_unrecovered_total", ())] == count


def test_every_datagram_arrives_when_each_block_loses_at_most_m(pairs):
    """Deterministic pattern: block b loses b % (m + 1) of its k + m packets, sources and repair
    alike, at positions drawn by a seeded generator.  MDS: any k of n rebuild the block."""
    k, m, blocks = 16, 4, 100
    n = k + m
    rng = random.Random(3)
    dropped = {b * n + position for b in range(blocks) for position in rng.sample(range(n), b % (m + 1))}
    pair = pairs(sender_fec={"flush_ms": NEVER_FLUSH_MS}, forward=drop_indices(dropped), record=True)
    client = pair.client(stream=2)
    send_paced(client.send, blocks * k, rate=2000)
    drain(pair, blocks * k)
    assert pair.relay.forward.dropped == len(dropped)
    assert_aligned(pair.relay.forward.packets, k, m)
    assert sorted(pair.server.received) == [(2, seq) for seq in range(blocks * k)]
    assert pair.server.corrupted == 0
    lost_sources = sum(1 for i in dropped if i % n < k)
    # Loss is final a hold time after a block's first packet (protocol.loss_ledger).
    assert wait_until(lambda: pair.receiver.metric("fecproxy_source_packets_lost_total") >= lost_sources, 5.0)
    metrics = pair.receiver.metrics()
    assert metrics[("fecproxy_source_packets_lost_total", ())] == lost_sources
    assert metrics[("fecproxy_datagrams_recovered_total", ())] == lost_sources
    assert metrics[("fecproxy_datagrams_unrecovered_total", ())] == 0
    assert metrics[("fecproxy_link_packets_received_total", (("kind", "source"),))] == blocks * k - lost_sources
    sent = pair.sender.metrics()
    assert sent[("fecproxy_source_packets_sent_total", ())] == blocks * k
    assert sent[("fecproxy_repair_packets_sent_total", ())] == blocks * m
    assert sent[("fecproxy_blocks_sent_total", ())] == blocks


@pytest.mark.slow
def test_residual_loss_on_iid_link_matches_the_mds_formula(pairs):
    """Seeded i.i.d. 5 % link, k=16, m=4, 1250 full blocks (20 000 datagrams).

    Oracle (design notes §4, the standard MDS erasure result): a source datagram is lost after
    decoding when it is lost and at least n − k of the other n − 1 packets of its block are lost
    too, so the residual loss per datagram is p · P[Binomial(n − 1, p) ≥ n − k]; scipy.stats.binom
    computes it.  Losses inside a block are correlated, so the statistical unit is the block:
    X_b = source datagrams block b cannot rebuild, with L ~ Binomial(n, p) packets lost and the
    lost sources given L hypergeometric (scipy.stats.hypergeom); E[X]/k must equal the formula.
    Tolerance: the total of 1250 independent X_b lies within 4 standard deviations of its mean
    (normal approximation; one-sided tail 3e-5 when it holds).  With ~13 expected residual losses
    the lower bound is 0, so the check is "FEC leaves at most ~45 of the ~1000 the link drops".
    """
    k, m, p, blocks = 16, 4, 0.05, 1250
    n = k + m
    # scipy.stats.binom and scipy.stats.hypergeom as oracles.
    formula = p * binom.sf(n - k - 1, n - 1, p)  # P[Bin(n-1, p) ≥ n-k] = sf(n-k-1)
    mean_x = second_x = 0.0
    for lost in range(m + 1, n + 1):
        weight = binom.pmf(lost, n, p)
        for sources in range(lost + 1):  # population n, k of them sources, `lost` drawn
            both = weight * hypergeom.pmf(sources, n, k, lost)
            mean_x += both * sources
            second_x += both * sources**2
    assert math.isclose(mean_x / k, formula, rel_tol=1e-9)
    sigma = math.sqrt(blocks * (second_x - mean_x**2))
    expected = blocks * mean_x

    pair = pairs(sender_fec={"flush_ms": NEVER_FLUSH_MS}, forward=iid_loss(p, seed=2024), record=True)
    client = pair.client(stream=3)
    count = blocks * k
    send_paced(client.send, count, rate=3000)
    drain(pair, count, timeout=20)

    packets = pair.relay.forward.packets
    assert len(packets) == blocks * n
    assert_aligned(packets, k, m)
    link_lost_sources, residual = exact_residual(packets, k, m)
    # The relay's own loss rate is a binomial sample too: within 4 sigma of n·blocks·p.
    link_packets = blocks * n
    assert abs(pair.relay.forward.dropped - link_packets * p) <= 4 * math.sqrt(link_packets * p * (1 - p))
    assert residual <= expected + 4 * sigma, (residual, expected, sigma)
    assert residual >= expected - 4 * sigma

    # The pair's own counts agree exactly with what the relay did, and with the server's count.
    missing = count - len(set(pair.server.received))
    assert pair.server.corrupted == 0
    assert missing == residual
    metrics = pair.receiver.metrics()
    assert metrics[("fecproxy_source_packets_lost_total", ())] == link_lost_sources
    assert metrics[("fecproxy_datagrams_unrecovered_total", ())] == residual
    assert metrics[("fecproxy_datagrams_recovered_total", ())] == link_lost_sources - residual
    print(f"residual {residual} (expected {expected:.1f} ± {sigma:.1f}), link lost {link_lost_sources} sources")


def test_replies_reach_the_right_client(pairs):
    """Four clients at once; the server echoes each datagram; each client gets exactly its own.

    The reply direction loses 2 of every 12 link packets (blocks of k=8, m=4 that close only
    when full), so rebuilt replies must find their client through the flow id carried inside
    the repair symbol (RFC 6363 §4), not through a source packet header.
    """
    clients_count, per_client = 4, 50
    k, m = 8, 4
    blocks = clients_count * per_client // k
    rng = random.Random(5)
    back_losses = {b * (k + m) + position for b in range(blocks) for position in rng.sample(range(k + m), 2)}
    pair = pairs(
        echo=True,
        receiver_fec={"block_size": k, "repair": m, "flush_ms": NEVER_FLUSH_MS},
        back=drop_indices(back_losses),
    )
    clients = [pair.client(stream=10 + i) for i in range(clients_count)]

    def send(i: int) -> None:
        clients[i % clients_count].send(i // clients_count)

    send_paced(send, clients_count * per_client, rate=1000)

    def all_replied() -> bool:
        for client in clients:
            client.collect()
        return all(len(client.replies) >= per_client for client in clients)

    assert wait_until(all_replied, DRAIN_TIMEOUT), [len(c.replies) for c in clients]
    time.sleep(0.1)  # anything extra or misrouted would show up now
    for client in clients:
        client.collect()
        assert sorted(client.replies) == [(client.stream, seq) for seq in range(per_client)]
    # The receiver talks to the server from one socket per flow, so each client has its own port.
    assert all(len(pair.server.sources[c.stream]) == 1 for c in clients)
    assert len({next(iter(pair.server.sources[c.stream])) for c in clients}) == clients_count
    assert pair.sender.metric("fecproxy_flows") == clients_count
    assert pair.receiver.metric("fecproxy_flows") == clients_count
    assert pair.relay.back.dropped == len(back_losses)
    rebuilt = sum(1 for i in back_losses if i % (k + m) < k)
    assert pair.sender.metric("fecproxy_datagrams_recovered_total") == rebuilt > 0
    assert pair.sender.metric("fecproxy_datagrams_unrecovered_total") == 0


def test_empty_and_largest_datagrams_are_rebuilt_exactly_and_oversize_is_counted(pairs):
    """Zero-length and max_datagram_bytes datagrams survive loss and rebuilding byte for byte
    (RFC 6363 §4: the length travels inside the source symbol); one byte more is dropped and
    counted at the sender, and takes no place in a block."""
    k, m = 4, 2
    pair = pairs(
        sender_fec={"block_size": k, "repair": m, "flush_ms": NEVER_FLUSH_MS},
        forward=drop_indices({0, 1, 6 + 0, 6 + 1}),
        record=True,
    )
    # Losses: block 0 its empty and its largest datagram, block 1 its largest and one empty.
    blocks = [[b"", b"\x00" * 1400, b"a", b"\xff" * 700], [b"z" * 1400, b"", b"", b"q"]]
    client = pair.client(stream=50)
    for i, data in enumerate(blocks[0] + blocks[1]):
        client.sock.sendto(data, client.destination)
        if i == 2:
            client.sock.sendto(b"o" * 1401, client.destination)  # oversize, between two datagrams
    assert wait_until(lambda: len(pair.server.raw) >= 8, DRAIN_TIMEOUT), pair.server.raw
    time.sleep(0.05)
    assert Counter(pair.server.raw) == Counter(blocks[0] + blocks[1])
    assert pair.receiver.metric("fecproxy_datagrams_recovered_total") == 4
    assert pair.sender.metric("fecproxy_packets_dropped_total", reason="oversize") == 1
    assert pair.sender.metric("fecproxy_source_packets_sent_total") == 8
    assert_aligned(pair.relay.forward.packets, k, m)


def test_consecutive_empty_datagrams_are_all_delivered(pairs):
    """Two empty datagrams rebuilt from the same block reach the server as two datagrams."""
    pair = pairs(sender_fec={"block_size": 4, "repair": 2, "flush_ms": NEVER_FLUSH_MS}, forward=drop_indices({0, 1}))
    client = pair.client(stream=51)
    for data in (b"", b"", b"a", b"b"):
        client.sock.sendto(data, client.destination)
    assert wait_until(lambda: pair.receiver.metric("fecproxy_datagrams_delivered_total") == 4, DRAIN_TIMEOUT)
    time.sleep(0.1)
    assert Counter(pair.server.raw) == Counter([b"", b"", b"a", b"b"])


def test_flow_table_limit_and_idle_expiry(pairs):
    """flows.max bounds the sender's table (the extra client's datagram is counted as
    flow_limit); idle flows expire on both sides and their ids are reused."""
    flows = {"max": 2, "idle_timeout_s": 1}
    pair = pairs(echo=True, sender_extra={"flows": flows}, receiver_extra={"flows": {"idle_timeout_s": 1}})
    clients = [pair.client(stream=60 + i) for i in range(3)]
    for client in clients:
        client.send(0)
        time.sleep(0.01)
    assert wait_until(lambda: pair.server.count() >= 2, DRAIN_TIMEOUT)
    assert wait_until(lambda: pair.sender.metric("fecproxy_packets_dropped_total", reason="flow_limit") == 1, 5)
    assert sorted(pair.server.received) == [(60, 0), (61, 0)]
    assert pair.sender.metric("fecproxy_flows") == 2
    assert wait_until(lambda: pair.sender.metric("fecproxy_flows") == 0, 5, interval=0.1)
    assert wait_until(lambda: pair.receiver.metric("fecproxy_flows") == 0, 5, interval=0.1)
    # The third client now gets a flow (a reused id) and its reply.
    clients[2].send(1)
    assert wait_until(lambda: (clients[2].collect(), clients[2].replies)[1] == [(62, 1)], DRAIN_TIMEOUT)
    assert pair.sender.metric("fecproxy_flows") == 1


# --------------------------------------------------------------------------------------------
# Signals
# --------------------------------------------------------------------------------------------


def _source_and_repair(packets, start: int = 0) -> tuple[int, int]:
    kinds = Counter(parse_link_header(data)[0] for _, _, data in packets[start:])
    return kinds[SOURCE], kinds[REPAIR]


def test_sighup_changes_k_and_m_live_and_keeps_flows(pairs, tmp_path):
    pair = pairs(sender_fec={"flush_ms": NEVER_FLUSH_MS}, echo=True, record=True)
    client = pair.client(stream=20)
    assert pair.sender.info()["k"] == "16" and pair.sender.info()["m"] == "4"
    send_paced(client.send, 32, rate=1000)
    drain(pair, 32)
    assert _source_and_repair(pair.relay.forward.packets) == (32, 8)

    # A valid new config: k=8, m=4 from the next block on.
    document = sender_config(pair.relay.address, block_size=8, repair=4, flush_ms=NEVER_FLUSH_MS)
    document["listen"] = f"{LOOPBACK}:0"  # unchanged: port 0 as before
    write_config(pair.sender_path, document)
    pair.sender.proc.send_signal(signal.SIGHUP)
    reloaded = pair.sender.wait_event("reloaded", 5)
    assert (reloaded["k"], reloaded["m"]) == ("8", "4")
    assert pair.sender.info()["k"] == "8" and pair.sender.info()["m"] == "4"
    assert pair.sender.metric("fecproxy_config_reloads_total", result="applied") == 1
    before = len(pair.relay.forward.packets)
    send_paced(lambda i: client.send(32 + i), 32, rate=1000)
    drain(pair, 64)
    assert wait_until(lambda: len(pair.relay.forward.packets) >= before + 32 + 16, 5)
    assert _source_and_repair(pair.relay.forward.packets, before) == (32, 16)  # 4 blocks of 8 + 4

    # An invalid new config is logged and the old one kept.
    document["fec"]["repair"] = 300
    write_config(pair.sender_path, document)
    pair.sender.proc.send_signal(signal.SIGHUP)
    rejected = pair.sender.wait_event("reload_rejected", 5)
    assert "fec.repair" in rejected["errors"]
    assert pair.sender.metric("fecproxy_config_reloads_total", result="rejected") == 1
    assert pair.sender.info()["k"] == "8" and pair.sender.info()["m"] == "4"

    # The flow survived both reloads: same client, same flow, replies still come back.
    send_paced(lambda i: client.send(64 + i), 8, rate=1000)
    drain(pair, 72)
    assert wait_until(lambda: (client.collect(), len(client.replies) >= 72)[1], DRAIN_TIMEOUT)
    assert sorted(client.replies) == [(20, seq) for seq in range(72)]
    assert pair.sender.metric("fecproxy_flows") == 1
    assert pair.sender.proc.poll() is None


def test_sigterm_sends_the_open_blocks_repair_and_exits_0_within_a_second(pairs):
    """A block of 5 datagrams, one lost on the link, would wait 30 s for its flush timer; SIGTERM
    closes it at once: its ceil(4·5/16) = 2 repair packets go out and the receiver rebuilds."""
    pair = pairs(sender_fec={"flush_ms": NEVER_FLUSH_MS}, forward=drop_indices({2}), record=True)
    client = pair.client(stream=30)
    for seq in range(5):
        client.send(seq)
    assert wait_until(lambda: pair.relay.forward.seen >= 5, DRAIN_TIMEOUT)
    time.sleep(0.05)
    assert _source_and_repair(pair.relay.forward.packets) == (5, 0)
    started = time.monotonic()
    pair.sender.proc.send_signal(signal.SIGTERM)
    code = pair.sender.proc.wait(timeout=5)
    elapsed = time.monotonic() - started
    assert code == 0
    assert elapsed < SIGTERM_EXIT_SECONDS, f"exit took {elapsed:.2f}s"
    print(f"sender exited {elapsed * 1000:.0f} ms after SIGTERM")
    assert _source_and_repair(pair.relay.forward.packets) == (5, 2)
    drain(pair, 5)
    assert sorted(pair.server.received) == [(30, seq) for seq in range(5)]
    assert pair.receiver.metric("fecproxy_datagrams_recovered_total") == 1
    pair.sender._reader.join(timeout=2)
    assert pair.sender.events("stopping")[0]["signal"] == "SIGTERM"
    assert pair.sender.events("stopped")[0]["repair_sent"] == "2"
    # The receiver stops on SIGINT just the same, and stop signals repeated while it shuts down
    # (an impatient operator, a supervisor's retry) still end in a clean exit 0, not death by signal.
    for signum in (signal.SIGINT, signal.SIGINT, signal.SIGTERM):
        pair.receiver.proc.send_signal(signum)
        time.sleep(0.01)
    assert pair.receiver.proc.wait(timeout=5) == 0
    pair.receiver._reader.join(timeout=2)
    assert len(pair.receiver.events("stopping")) == 1


# --------------------------------------------------------------------------------------------
# Start-up failures
# --------------------------------------------------------------------------------------------


def _run_to_exit(config_path: Path, timeout: float = STARTUP_TIMEOUT) -> subprocess.CompletedProcess:
    return run_to_exit("run", str(config_path), timeout=timeout)


def test_invalid_config_exits_2_with_the_message(tmp_path):
    document = receiver_config((LOOPBACK, 9), block_size=10, repair=20, allow_repair_above_source=False)
    document["fec"]["flsh_ms"] = 5
    path = write_config(tmp_path / "bad.yaml", document)
    result = _run_to_exit(path)
    assert result.returncode == 2
    assert f"{path}" in result.stderr
    assert "fec.repair" in result.stderr and "block_size" in result.stderr
    assert "did you mean fec.flush_ms?" in result.stderr
    assert "Traceback" not in result.stderr
    missing = _run_to_exit(tmp_path / "absent.yaml")
    # The same status as `fecproxy check` for the same fault (fecproxy.commands.EXIT_UNREADABLE).
    assert missing.returncode == EXIT_UNREADABLE == 1 and "cannot read" in missing.stderr
    assert run_to_exit("check", str(tmp_path / "absent.yaml")).returncode == EXIT_UNREADABLE
    assert run_to_exit("check", str(path)).returncode == EXIT_INVALID == result.returncode


@pytest.mark.parametrize("busy_key", ["listen", "link.bind", "metrics.listen"])
def test_busy_port_exits_3_with_a_log_event_naming_the_key(tmp_path, busy_key):
    kind = socket.SOCK_STREAM if busy_key == "metrics.listen" else socket.SOCK_DGRAM
    with socket.socket(socket.AF_INET, kind) as holder:
        holder.bind((LOOPBACK, 0))
        if kind == socket.SOCK_STREAM:
            holder.listen()
        busy = f"{LOOPBACK}:{holder.getsockname()[1]}"
        document = sender_config((LOOPBACK, 9))
        if busy_key == "listen":
            document["listen"] = busy
        elif busy_key == "link.bind":
            document["link"]["bind"] = busy
        else:
            document["metrics"]["listen"] = busy
        path = write_config(tmp_path / "busy.yaml", document)
        result = _run_to_exit(path)
        as_json = run_to_exit("run", str(path), "--log-format", "json")
    assert result.returncode == EXIT_CANNOT_START == 3, result.stderr
    assert "event=cannot_start" in result.stderr and f"key={busy_key}" in result.stderr
    assert busy in result.stderr and "in use" in result.stderr
    assert "Traceback" not in result.stderr
    assert as_json.returncode == EXIT_CANNOT_START
    event = json.loads(as_json.stderr.strip().splitlines()[-1])
    assert (event["event"], event["key"], event["address"]) == ("cannot_start", busy_key, busy)


# --------------------------------------------------------------------------------------------
# Hostile input on the link
# --------------------------------------------------------------------------------------------


def test_malformed_and_forged_packets_are_counted_and_never_crash_the_receiver(pairs):
    pair = pairs(echo=True, record=True)
    client = pair.client(stream=40)
    send_paced(client.send, 32, rate=1000)
    drain(pair, 32)
    _, session, _, _ = parse_link_header(pair.relay.forward.packets[0][2])
    genuine_source = pair.relay.forward.packets[3][2]  # block 0 is finished by now

    def header(kind: int, flags: int, sbn: int, esi: int, version: int = wire.VERSION, sess: int = session) -> bytes:
        return struct.pack(">BBII", (version << 4) | kind, flags, sess, (sbn << 8) | esi)

    hostile = {
        "malformed": [
            b"",  # empty datagram
            b"\x20\x00\x00",  # shorter than the common header
            header(SOURCE, 0, 5, 0),  # source without its flow id and previous k
            header(REPAIR, 0, 5, 20) + b"\x00",  # repair without its k field
            header(REPAIR, 0, 5, 20) + struct.pack(">H", 0) + b"abc",  # k = 0
            header(REPAIR, 0, 5, 3) + struct.pack(">H", 16) + b"abc",  # ESI below k
            header(REPAIR, 0, 5, 255) + struct.pack(">H", 16) + b"abc",  # ESI 255 (n ≤ 255)
            header(REPAIR, 0, 5, 20) + struct.pack(">H", 16) + b"a",  # symbol shorter than its prefix
        ],
        "unsupported": [
            header(SOURCE, 0, 5, 0, version=wire.VERSION + 1) + b"\x00data",  # a future version
            header(SOURCE, 0, 5, 0, version=1) + b"\x00\x00data",  # the one-byte flow id of version 1
            header(SOURCE, 0x40, 5, 0) + b"\x00data",  # undefined flag
            header(7, 0, 5, 0) + b"\x00data",  # undefined type
        ],
        "oversize": [
            header(SOURCE, 0, 5, 0) + bytes(6) + bytes(1401),  # above max_datagram_bytes 1400
            header(REPAIR, 0, 5, 20) + struct.pack(">H", 16) + bytes(1408),  # 7-byte prefix + 1401
        ],
        "late": [genuine_source],  # replay of a datagram of a finished block
        "stale": [header(SOURCE, 0, (1 << 24) - 5000, 0) + bytes(6) + b"old"],  # far behind the window
    }
    before = {reason: pair.receiver.metric("fecproxy_packets_dropped_total", reason=reason) for reason in hostile}
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as attacker:
        attacker.bind((LOOPBACK, 0))
        for _ in range(3):  # bounded repetitions
            for packets in hostile.values():
                for data in packets:
                    attacker.sendto(data, pair.receiver.link_address)
        rng = random.Random(11)
        for _ in range(300):  # random bytes of random lengths, bounded
            junk = rng.randbytes(rng.randrange(0, 1600))
            if junk[0:1] in (bytes([wire.SOURCE_TYPE_BYTE]), bytes([wire.REPAIR_TYPE_BYTE])) and junk[1:2] in (
                b"\x00",
                b"\x01",
            ):
                continue  # could pass as a well-formed packet of a new session (see below)
            attacker.sendto(junk, pair.receiver.link_address)

        def counted() -> bool:
            metrics = pair.receiver.metrics()
            return all(
                metrics[("fecproxy_packets_dropped_total", (("reason", reason),))] - before[reason] >= 3 * len(packets)
                for reason, packets in hostile.items()
            )

        assert wait_until(counted, DRAIN_TIMEOUT, interval=0.1), pair.receiver.metrics()
        for reason, packets in hostile.items():
            assert pair.receiver.metric("fecproxy_packets_dropped_total", reason=reason) - before[reason] >= 3 * len(
                packets
            )
        assert pair.server.corrupted == 0
        assert pair.receiver.proc.poll() is None
        # Nothing hostile changed the learned peer: the pair still works both ways.
        send_paced(lambda i: client.send(32 + i), 32, rate=1000)
        drain(pair, 64)
        assert wait_until(lambda: (client.collect(), len(client.replies) >= 64)[1], DRAIN_TIMEOUT)
        assert sorted(client.replies) == [(40, seq) for seq in range(64)]
        attacker.setblocking(False)
        with pytest.raises(BlockingIOError):
            attacker.recv(65535)  # no reply was ever sent to the attacker
    assert pair.receiver.proc.poll() is None


def test_one_forged_packet_of_a_new_session_does_not_stop_the_genuine_stream(pairs):
    pair = pairs(record=True)
    client = pair.client(stream=41)
    send_paced(client.send, 16, rate=1000)
    drain(pair, 16)
    _, session, _, _ = parse_link_header(pair.relay.forward.packets[0][2])
    forged = wire.encode_source(session ^ 0xFFFFFFFF, 0, 0, 0, b"forged")
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as attacker:
        attacker.bind((LOOPBACK, 0))
        attacker.sendto(forged, pair.receiver.link_address)
        assert wait_until(lambda: len(pair.server.raw) >= 17, DRAIN_TIMEOUT)
    send_paced(lambda i: client.send(16 + i), 16, rate=1000)
    drain(pair, 32, timeout=1.5)
    assert sorted(pair.server.received) == [(41, seq) for seq in range(32)]
