"""Whole-process soak of the most demanding combination, so CI guards it: keyed link, in-order
delivery both ways, pacing on a narrow rate, ``fecproxy impair`` with burst loss, jitter that
reorders, duplicates and a blackout, and a kill -9 / restart of the receiver mid-stream.

Invariants (issue 16's and 17's acceptance, together): no daemon dies or counts an
``internal_error``; the application sees 0 corrupted, 0 duplicated and 0 reordered datagrams
(replies included); the restarted receiver delivers again within a second of starting; the
counters agree with what the sink saw; metrics and ``/status.json`` answer throughout.

All on 127.0.0.1; every wait is bounded by a timeout, every load loop by a count (≤ 30 s).
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
import urllib.request
from collections import Counter

import pytest
from support.daemon_pair import LOOPBACK, AppServer, Client, DaemonProcess, wait_until, write_config
from support.keys import KEY_A, write_key

pytestmark = pytest.mark.slow

RATE = 100  # application datagrams per second (header + 1..255 B + digest: ~150 kbit/s on the air)
COUNT = 1100  # 11 s of traffic
KILL_AT = 7.0  # seconds into the traffic: the receiver is killed (SIGKILL) and started again
LINK_RATE = "256k"  # source + 25 % repair fit with room: the pacer queues bursts, drops no source
# Forward and return alike: 2 % loss in bursts of 2, 5 ± 3 ms with reordering, 2 % duplicates,
# a 1.5 s blackout 2 s after impair starts (during the traffic, before the kill).
IMPAIR = "--loss 0.02 --burst 2 --delay-ms 5 --jitter-ms 3 --reorder --duplicate 0.02 --blackout 1500ms/100s@2500ms"
BLACKOUT_DATAGRAMS = int(1.5 * RATE)


def _reordered(seqs: list[int]) -> int:
    return sum(1 for a, b in zip(seqs, seqs[1:], strict=False) if b < a)


def _answers(daemon: DaemonProcess) -> bool:
    """/metrics and /status.json both answer (bounded)."""
    try:
        daemon.metrics()
        url = f"http://{LOOPBACK}:{daemon.metrics_port}/status.json"
        with urllib.request.urlopen(url, timeout=3) as response:
            json.loads(response.read())
        return True
    except Exception:
        return False


def _config(tmp_path, name: str, document: dict) -> DaemonProcess:
    return DaemonProcess(write_config(tmp_path / f"{name}.yaml", document))


def test_keyed_in_order_paced_pair_through_reorder_blackout_and_a_receiver_restart(tmp_path):
    write_key(tmp_path / "sender.key", KEY_A)
    write_key(tmp_path / "receiver.key", KEY_A)
    common = {
        "fec": {"block_size": 16, "repair": 4, "flush_ms": 20},
        "decoder": {"hold_ms": 1500},
        "delivery": {"order": "in_order", "max_wait_ms": 300},
        "metrics": {"listen": f"{LOOPBACK}:0"},
        "log": {"level": "info", "format": "text"},
    }
    server = AppServer(echo=True)
    receiver_doc = {
        "role": "receiver",
        "forward": f"{LOOPBACK}:{server.address[1]}",
        "link": {"bind": f"{LOOPBACK}:0", "rate": LINK_RATE, "queue_ms": 1000},
        "auth": {"key_file": "receiver.key"},
        **common,
    }
    daemons: list[DaemonProcess] = []
    impair = None
    client = None
    try:
        receiver = _config(tmp_path, "receiver", receiver_doc)
        daemons.append(receiver)
        receiver.wait_started()
        receiver_link = receiver.link_address
        impair = subprocess.Popen(
            [sys.executable, "-m", "fecproxy", "impair", "--listen", f"{LOOPBACK}:0", "--to",
             f"{LOOPBACK}:{receiver_link[1]}", "--interval", "0", "--seconds", "60", "--seed", "5", *IMPAIR.split()],
            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
        )  # fmt: skip
        assert impair.stdout is not None
        line = impair.stdout.readline()  # "fecproxy impair: listening on HOST:PORT, relaying to ..."
        relay_port = int(line.split("listening on ")[1].split(",")[0].rsplit(":", 1)[1])
        sender = _config(
            tmp_path,
            "sender",
            {
                "role": "sender",
                "listen": f"{LOOPBACK}:0",
                "link": {"bind": f"{LOOPBACK}:0", "peer": f"{LOOPBACK}:{relay_port}", "rate": LINK_RATE},
                "auth": {"key_file": "sender.key"},
                **common,
            },
        )
        daemons.append(sender)
        sender.wait_started()
        client = Client(7, sender.listen_address)

        start = time.monotonic()
        unanswered = 0
        old_receiver_metrics = None
        killed_at = restarted_at = kill_seq = restart_seq = None
        resumed_after = None
        next_probe = start

        def restarted() -> bool:  # the new receiver said it listens (never blocks the traffic)
            nonlocal restarted_at, restart_seq
            if restarted_at is None and kill_seq is not None and receiver.events("started"):
                receiver.started = receiver.events("started")[0]
                restarted_at, restart_seq = time.monotonic(), i
            return restarted_at is not None

        def resumed() -> bool:  # a datagram sent after the new receiver started reached the sink
            nonlocal resumed_after
            if resumed_after is None and restarted() and server.received and server.received[-1][1] > restart_seq:
                resumed_after = time.monotonic() - restarted_at
            return resumed_after is not None

        for i in range(COUNT):
            ahead = start + i / RATE - time.monotonic()
            if ahead > 0.002:
                time.sleep(ahead)
            client.send(i)
            if i % 10 == 0:
                client.collect()
                resumed()
            now = time.monotonic()
            if now >= next_probe:  # the operator's views keep answering through every fault
                next_probe = now + 1.0
                unanswered += not _answers(sender)
                if kill_seq is None or restarted():
                    unanswered += not _answers(receiver)
            if kill_seq is None and now - start >= KILL_AT:
                old_receiver_metrics = receiver.metrics()
                at_kill = server.count()
                receiver.proc.send_signal(signal.SIGKILL)
                receiver.proc.wait(timeout=5)
                killed_at, kill_seq = time.monotonic(), i
                # The same link address again (impair relays there), a new process; the traffic
                # goes on meanwhile, as a real application's would.
                receiver = _config(tmp_path, "receiver", receiver_doc | {"link": receiver_doc["link"] | {
                    "bind": f"{LOOPBACK}:{receiver_link[1]}"}})  # fmt: skip
                daemons.append(receiver)
        if not restarted():
            receiver.wait_started()
            restarted()
        wait_until(resumed, 3.0)
        downtime = restarted_at - killed_at  # the new process' start-up: its imports on a busy box
        # Drain: the blackout's blocks expire (hold_ms) and what waits in order is released.
        wait_until(lambda: (client.collect(), len(client.replies) >= server.count())[1], 4.0)
        time.sleep(1.0)
        client.collect()

        assert sender.proc.poll() is None and receiver.proc.poll() is None
        new_receiver_metrics, sender_metrics = receiver.metrics(), sender.metrics()
        print(  # the figures, for a failing run's report
            f"sink {server.count()} of {COUNT}, replies {len(client.replies)}, down {downtime:.2f} s",
            f"resumed after {resumed_after}",
            {k: v for k, v in new_receiver_metrics.items() if v and "dropped" in k[0] or "gaps" in k[0]},
            {k: v for k, v in old_receiver_metrics.items() if v and ("dropped" in k[0] or "unrecovered" in k[0])},
            {k: v for k, v in sender_metrics.items() if v and ("dropped" in k[0] or "gaps" in k[0])},
        )
        # The daemons: alive, no internal error, no traceback.
        for name, samples in (("old receiver", old_receiver_metrics), ("receiver", new_receiver_metrics)):
            assert samples[("fecproxy_packets_dropped_total", (("reason", "internal_error"),))] == 0, name
        assert sender_metrics[("fecproxy_packets_dropped_total", (("reason", "internal_error"),))] == 0
        assert not [line for daemon in daemons for line in daemon.lines if "Traceback" in line]
        assert unanswered == 0

        # The application: intact, once each, in order, both ways.
        seqs = [seq for _, seq in server.received]
        assert server.corrupted == 0
        assert [seq for seq, n in Counter(seqs).items() if n > 1] == []
        assert _reordered(seqs) == 0
        replies = [seq for _, seq in (r for r in client.replies if r is not None)]
        assert len(replies) == len(client.replies), "a corrupted reply"
        assert [seq for seq, n in Counter(replies).items() if n > 1] == []
        assert _reordered(replies) == 0

        # Delivery: the blackout and the restart cost what they must, little more.
        delivered = len(set(seqs))
        missed = COUNT - delivered
        bound = BLACKOUT_DATAGRAMS + (downtime + 0.5) * RATE + COUNT * 0.03
        assert missed <= bound, f"delivered {delivered} of {COUNT} (receiver down {downtime:.1f} s)"
        assert resumed_after is not None and resumed_after < 1.0, f"resumed {resumed_after} s after the restart"

        # Counters: each receiver process delivered what the sink got from it; neither counts a
        # loss that never happened; the sender's pacer dropped no source and nothing it took in
        # is unaccounted for.
        delivered_old = old_receiver_metrics[("fecproxy_datagrams_delivered_total", ())]
        delivered_new = new_receiver_metrics[("fecproxy_datagrams_delivered_total", ())]
        assert delivered_old == pytest.approx(at_kill, abs=5)  # in flight to the sink at the kill
        assert delivered_old + delivered_new == pytest.approx(server.count(), abs=5)
        unrecovered = (
            old_receiver_metrics[("fecproxy_datagrams_unrecovered_total", ())]
            + new_receiver_metrics[("fecproxy_datagrams_unrecovered_total", ())]
        )
        assert unrecovered <= missed
        # In order: the restarted receiver joins the flow where it is, so the gaps it skips are
        # real losses, not the thousands of datagrams an earlier process delivered.
        gaps = sum(
            value for (name, _), value in new_receiver_metrics.items() if name.startswith("fecproxy_delivery_gaps")
        )
        assert gaps <= missed
        source_drops = sum(
            value
            for (name, labels), value in sender_metrics.items()
            if name == "fecproxy_link_queue_dropped_total" and ("kind", "source") in labels
        )
        assert source_drops == 0
        assert sender_metrics[("fecproxy_source_packets_sent_total", ())] == COUNT
        # The far end: heard again after the restart (the peer-silent state cleared).
        assert sender_metrics[("fecproxy_peer_silent", ())] == 0
    finally:
        if client is not None:
            client.close()
        for daemon in daemons:
            daemon.signal_stop()
        codes = [daemon.proc.wait(timeout=10) for daemon in daemons[-2:]]
        if impair is not None:
            impair.send_signal(signal.SIGTERM)
            try:
                impair.communicate(timeout=5)
            except subprocess.TimeoutExpired:
                impair.kill()
                impair.communicate()
        server.close()
    assert codes == [0, 0], f"exit codes after SIGTERM: {codes}"
