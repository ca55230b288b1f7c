"""Whole-process: a recorded keyed session replayed to a restarted side delivers nothing, while a
genuine restart still flows within a second (protocol.freshness; RFC 4303 §3.3.3 says why a
static key's replay window alone cannot do it, RFC 7296 §2.10 how fresh nonces can).

All on 127.0.0.1; every wait is bounded by a timeout and every load loop by a count.
"""

from __future__ import annotations

import socket
import time

import pytest
from support.daemon_pair import LOOPBACK, DaemonProcess, drain, dropped, send_paced, wait_until
from support.keys import keyed

pytestmark = pytest.mark.slow


def replay(packets: list[bytes], destination) -> None:
    """Send a recording again, from an address of the attacker's own."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as sock:
        sock.bind((LOOPBACK, 0))
        for i, data in enumerate(packets):
            sock.sendto(data, destination)
            if i % 50 == 49:
                time.sleep(0.005)  # paced: no loss in a kernel buffer, every packet is judged


def restart(pair, which: str) -> DaemonProcess:
    old = getattr(pair, which)
    path = old.config_path
    assert old.terminate() == 0
    new = DaemonProcess(path)
    pair._closers.append(new.terminate)  # the fixture stops the new one too
    new.wait_started()
    setattr(pair, which, new)
    return new


def first_arrival_after(pair, send, already: int, timeout: float) -> float | None:
    """Send at 200/s until the server has more than ``already``; seconds it took."""
    start = time.monotonic()
    i = 0
    while time.monotonic() - start < timeout:
        send(i)
        i += 1
        time.sleep(0.005)
        if pair.server.count() > already:
            return time.monotonic() - start
    return None


def test_a_recording_replayed_to_a_restarted_receiver_delivers_nothing_and_a_live_sender_resumes(pairs, tmp_path):
    pair = pairs(record=True, **keyed(tmp_path))
    client = pair.client(stream=61)
    send_paced(client.send, 200, rate=1000)
    drain(pair, 190)
    recording = [data for _, _, data in pair.relay.forward.packets]
    assert len(recording) >= 200
    receiver = restart(pair, "receiver")
    pair.relay.target = receiver.link_address
    replay(recording, receiver.link_address)
    # Held (bounded) while its session is unproven, and the challenge went to the attacker.
    time.sleep(0.5)
    assert receiver.metric("fecproxy_datagrams_delivered_total") == 0
    before = pair.server.count()
    # The genuine sender (still the same session) answers the new receiver's challenge at once.
    took = first_arrival_after(pair, lambda i: client.send(1000 + i), before, timeout=3.0)
    assert took is not None and took < 1.0, f"first delivery after {took} s; log:\n{receiver.log()}"
    proven = receiver.events("session_proven")
    assert proven and proven[0]["young"] == "False"  # the sender is older than this receiver
    assert dropped(receiver, "unproven") >= min(len(recording), 128) - 5  # held, then refused
    # Replayed once more after the proof: still nothing (below the echo's sequence number).
    time.sleep(0.5)  # the genuine datagrams still in flight (and their block's flush) come first
    delivered = receiver.metric("fecproxy_datagrams_delivered_total")
    replay(recording, receiver.link_address)
    time.sleep(0.5)
    assert receiver.metric("fecproxy_datagrams_delivered_total") == delivered
    assert all(seq >= 1000 for stream, seq in pair.server.received[before:])


def test_replies_replayed_to_a_restarted_sender_are_not_delivered(pairs, tmp_path):
    pair = pairs(echo=True, record=True, **keyed(tmp_path))
    client = pair.client(stream=62)
    send_paced(client.send, 200, rate=1000)
    drain(pair, 190)
    assert wait_until(lambda: (client.collect(), len(client.replies))[1] >= 150, 5.0)
    replies = [data for _, _, data in pair.relay.back.packets]
    assert len(replies) >= 150
    sender = restart(pair, "sender")
    client = pair.client(stream=62)  # to the new sender's listen address
    # The new sender learns a flow for this client, so a replayed reply would have a conversation
    # to reach; the receiver (not restarted) is live and proves its session.
    took = first_arrival_after(pair, lambda i: client.send(5000 + i), pair.server.count(), timeout=3.0)
    assert took is not None and took < 1.0
    replay(replies, sender.link_address)
    time.sleep(0.5)
    client.collect()
    stale = [reply for reply in client.replies if reply is not None and reply[1] < 5000]
    assert stale == [], f"{len(stale)} recorded replies reached the client"
    assert dropped(sender, "unproven") + dropped(sender, "replay") >= len(replies) - 5


def test_a_restarted_keyed_sender_loses_nothing_and_its_replies_flow(pairs, tmp_path):
    pair = pairs(echo=True, **keyed(tmp_path))
    client = pair.client(stream=63)
    send_paced(client.send, 40, rate=1000)
    drain(pair, 40)
    restart(pair, "sender")
    client = pair.client(stream=63)  # to the new sender's listen address
    send_paced(lambda i: client.send(40 + i), 80, rate=1000)
    drain(pair, 120)
    # The new session started after the receiver: what it held while proving it is released.
    assert sorted(pair.server.received) == [(63, seq) for seq in range(120)]
    assert pair.receiver.metric("fecproxy_datagrams_unrecovered_total") == 0
    # Replies flow too (one may be lost at the hand-over between the sessions' flows, with or
    # without a key: the receiver adopts the new session only once the old one is quiet).
    assert wait_until(lambda: (client.collect(), len(client.replies) >= 78)[1], 5.0), len(client.replies)
