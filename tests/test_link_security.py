"""Whole-process tests of a link others can reach: keyed pairs refusing every bad packet, a
stranger's session changing nothing, restarts, and a forward address that refuses.

All on 127.0.0.1 with the harness of support/daemon_pair.py; every wait is bounded by a timeout
and every load loop by a count.
"""

from __future__ import annotations

import random
import socket
import time

import pytest
from support.daemon_pair import (
    DRAIN_TIMEOUT,
    LOOPBACK,
    DaemonProcess,
    drain,
    dropped,
    make_payload,
    parse_link_header,
    send_paced,
    wait_until,
)
from support.keys import KEY_A, KEY_B, keyed

from fecproxy.protocol import auth, keys, wire

pytestmark = pytest.mark.slow


@pytest.mark.parametrize("encrypt", [False, True])
def test_a_keyed_pair_refuses_forged_flipped_truncated_replayed_and_wrong_key_packets(pairs, tmp_path, encrypt):
    if encrypt:
        pytest.importorskip("cryptography")
    pair = pairs(echo=True, record=True, **keyed(tmp_path, encrypt=encrypt))
    client = pair.client(stream=50)
    send_paced(client.send, 32, rate=1000)
    drain(pair, 32)
    recorded = [data for _, _, data in pair.relay.forward.packets]
    assert all(data[1] & wire.FLAG_AUTH for data in recorded)
    _, session, _, _ = parse_link_header(recorded[0])
    # A genuine packet this receiver has not seen (a fresh sequence number): its damaged copies
    # must fail the tag.  (A damaged copy of a packet already received fails earlier, at the
    # replay query that comes first: counted as replay.)
    own_key = auth.Keyring(keys.MasterKey(bytes.fromhex(KEY_A)), encrypt=encrypt).current
    sample = auth.protect(wire.encode_source(session, 900, 0, 1, make_payload(99, 2)), own_key, (1 << 64) - 2)
    rng = random.Random(7)
    forged = []
    for _ in range(40):  # single bit flips anywhere
        flipped = bytearray(sample)
        flipped[rng.randrange(len(sample))] ^= 1 << rng.randrange(8)
        forged.append(bytes(flipped))
    forged += [sample[:cut] for cut in (0, 1, 10, 20, len(sample) - 1)]
    forged += [sample + b"\x00", sample + bytes(30)]
    forged.append(wire.encode_source(0x1234, 5, 0, 1, make_payload(99, 0)))  # no tag at all
    stranger = auth.Keyring(keys.MasterKey(bytes.fromhex(KEY_B)), encrypt=encrypt).current
    forged.append(auth.protect(wire.encode_source(0x1234, 5, 0, 1, make_payload(99, 1)), stranger, 1))
    replays = recorded[:10] + list(reversed(recorded[10:20]))  # in order and reordered
    auth_before, replay_before = dropped(pair.receiver, "auth"), dropped(pair.receiver, "replay")
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as attacker:
        attacker.bind((LOOPBACK, 0))
        for data in forged + replays:
            attacker.sendto(data, pair.receiver.link_address)

        # A damaged packet whose sequence field now reads as old fails at the replay query,
        # which comes before the tag check (RFC 4303 §3.4.3): either way it is refused.
        def refused() -> tuple[float, float]:
            return dropped(pair.receiver, "auth") - auth_before, dropped(pair.receiver, "replay") - replay_before

        total = len(forged) + len(replays)
        assert wait_until(lambda: sum(refused()) >= total, DRAIN_TIMEOUT, interval=0.1), refused()
        bad_tag, replayed = refused()
        assert bad_tag + replayed == total and replayed >= len(replays) and bad_tag >= 3
        # The real traffic goes on, both ways; nothing forged or replayed reached the server.
        send_paced(lambda i: client.send(32 + i), 32, rate=1000)
        drain(pair, 64)
        assert wait_until(lambda: (client.collect(), len(client.replies) >= 64)[1], DRAIN_TIMEOUT)
        assert pair.server.corrupted == 0
        assert sorted(pair.server.received) == [(50, seq) for seq in range(64)]
        attacker.setblocking(False)
        with pytest.raises(BlockingIOError):
            attacker.recv(65535)


def test_mismatched_keys_say_so_once_in_both_logs(pairs, tmp_path):
    pair = pairs(**keyed(tmp_path, sender_key=KEY_A, receiver_key=KEY_B))
    client = pair.client(stream=51)
    send_paced(client.send, 40, rate=1000)
    line = pair.receiver.wait_event("auth_failed", DRAIN_TIMEOUT)
    assert line["kind"] == "unknown_key" and "different key files" in line["detail"]
    assert KEY_A[:16] not in pair.receiver.log() and KEY_B[:16] not in pair.receiver.log()
    send_paced(lambda i: client.send(40 + i), 40, rate=1000)
    assert wait_until(lambda: dropped(pair.receiver, "auth") >= 80, DRAIN_TIMEOUT, interval=0.1)
    assert len(pair.receiver.events("auth_failed")) == 1  # once per interval, not per packet
    assert pair.server.received == []
    # The receiver's key check (sealed with its key) makes the sender say the same.
    line = pair.sender.wait_event("auth_failed", DRAIN_TIMEOUT)
    assert line["kind"] == "unknown_key" and "different key files" in line["detail"]
    assert len(pair.sender.events("auth_failed")) == 1
    assert KEY_A[:16] not in pair.sender.log() and KEY_B[:16] not in pair.sender.log()


def test_a_stranger_flooding_a_made_up_session_changes_nothing_for_the_real_traffic(pairs):
    pair = pairs(echo=True, record=True)
    client = pair.client(stream=52)
    send_paced(client.send, 16, rate=1000)
    drain(pair, 16)
    _, session, _, _ = parse_link_header(pair.relay.forward.packets[0][2])
    made_up = session ^ 0x5A5A5A5A
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as attacker:
        attacker.bind((LOOPBACK, 0))
        for round_ in range(20):  # 20 × 50 packets of one made-up session, interleaved with real traffic
            for esi in range(50):
                # Flow 200: a flow the real client does not have, so no reply could reach it.
                forged = wire.encode_source(made_up, round_, esi, 200 << 8, make_payload(98, round_ * 50 + esi))
                attacker.sendto(forged, pair.receiver.link_address)
            send_paced(lambda i, r=round_: client.send(16 + r * 4 + i), 4, rate=1000)
        assert wait_until(lambda: sum(1 for item in pair.server.received if item[0] == 52) >= 96, DRAIN_TIMEOUT)
        real = sorted(item for item in pair.server.received if item[0] == 52)
        assert real == [(52, seq) for seq in range(96)]
        assert wait_until(lambda: (client.collect(), len(client.replies) >= 96)[1], DRAIN_TIMEOUT)
        assert sorted(client.replies) == [(52, seq) for seq in range(96)]  # replies still to the real sender
        attacker.setblocking(False)
        with pytest.raises(BlockingIOError):
            attacker.recv(65535)  # no reply was ever sent to the stranger
    assert pair.server.corrupted == 0


def test_sender_restart_mid_stream_resumes_delivery_at_once(pairs):
    pair = pairs()
    client = pair.client(stream=53)
    send_paced(client.send, 40, rate=1000)
    drain(pair, 40)
    assert pair.sender.terminate() == 0
    pair.sender = DaemonProcess(pair.sender_path)
    pair._closers.append(pair.sender.terminate)  # the fixture stops the new one too
    pair.sender.wait_started()
    client = pair.client(stream=53)  # to the new sender's listen address
    send_paced(lambda i: client.send(40 + i), 40, rate=1000)
    drain(pair, 80)
    assert sorted(pair.server.received) == [(53, seq) for seq in range(80)]
    assert pair.server.corrupted == 0


def test_receiver_restart_mid_stream_resumes_delivery_at_once(pairs):
    pair = pairs()
    client = pair.client(stream=54)
    send_paced(client.send, 40, rate=1000)
    drain(pair, 40)
    path = pair.receiver.config_path
    assert pair.receiver.terminate() == 0
    pair.receiver = DaemonProcess(path)
    pair._closers.append(pair.receiver.terminate)  # the fixture stops the new one too
    pair.receiver.wait_started()
    pair.relay.target = pair.receiver.link_address
    send_paced(lambda i: client.send(40 + i), 40, rate=1000)
    drain(pair, 80)
    assert sorted(pair.server.received) == [(54, seq) for seq in range(80)]
    assert pair.server.corrupted == 0


def test_a_refusing_forward_address_is_counted_logged_once_and_survived(pairs):
    closed = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    closed.bind((LOOPBACK, 0))
    port = closed.getsockname()[1]
    closed.close()  # nothing listens there: the kernel answers ICMP port-unreachable
    pair = pairs(receiver_extra={"forward": f"{LOOPBACK}:{port}"})
    client = pair.client(stream=55)
    deadline = time.monotonic() + DRAIN_TIMEOUT
    sent = 0
    while time.monotonic() < deadline and pair.receiver.metric("fecproxy_send_errors_total") < 5:
        send_paced(lambda i, base=sent: client.send(base + i), 20, rate=1000)  # bounded by the deadline
        sent += 20
    assert pair.receiver.metric("fecproxy_send_errors_total") >= 5
    assert len(pair.receiver.events("send_failed")) == 1
    assert pair.receiver.proc.poll() is None


def test_the_flood_benchmark_runs_and_prints_its_figures_against_the_targets(capsys):
    # A smoke run (3 000 hostile packets): the figures themselves are the benchmark's, printed
    # in the README from full runs; here only that it runs, keeps both daemons up and reports.
    from fecproxy import cli

    assert cli.main(["bench", "flood", "--auth", "mac", "--hostile", "3000"]) == 0
    out = capsys.readouterr().out
    assert "flood benchmark, auth mac: 3,000 hostile packets" in out
    assert "daemons alive                           yes" in out
    for figure in ("real datagrams delivered", "corrupted datagrams delivered", "receiver RSS growth"):
        assert figure in out
