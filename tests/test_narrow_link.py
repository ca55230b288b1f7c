"""A narrow link, whole processes: README's trial pair through ``fecproxy impair`` with its rate cap,
with and without pacing (``link.rate``), figures printed side by side.

Topology: station (this test) -> sender (config/trial-sender.yaml) -> fecproxy impair (README's line:
3 % loss in bursts of 2, 40 ± 10 ms, 256 kbit/s, a 32-packet modem buffer) -> receiver
(config/trial-receiver.yaml) -> sink (this test).  Ports are the kernel's, read back from each
process's first lines; everything else is the shipped configs.

Traffic (README's trial): 20 readings a second of 100-300 bytes, and a camera still every 5 s —
50 datagrams of 1200 bytes sent back to back.  Counts, not times, are asserted; every wait is
bounded.  Run: ``pytest -m slow tests/test_narrow_link.py -s`` prints the table.
"""

from __future__ import annotations

import random
import re
import signal
import socket
import struct
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import yaml
from support.daemon_pair import LOOPBACK, DaemonProcess, wait_until, write_config

from fecproxy.linkmodel.loss_models import channel_from_figures
from fecproxy.linkmodel.planner import effective_code, evaluate

pytestmark = pytest.mark.slow

CONFIG = Path(__file__).resolve().parents[1] / "config"
#: README's impair line, the blackout kept (its first outage comes 60 s after impair starts).
IMPAIR = [
    "--loss", "0.03", "--burst", "2", "--delay-ms", "40", "--jitter-ms", "10", "--rate-kbps", "256",
    "--queue-packets", "32", "--blackout", "2s/60s", "--return-loss", "0", "--seed", "7",
]  # fmt: skip
READINGS_PER_S = 20
READING_BYTES = (100, 300)
STILL_DATAGRAMS, STILL_BYTES, STILL_EVERY_S = 50, 1200, 5.0
RUN_S = 60.0
HEAD = struct.Struct(">BI")  # stream (1 readings, 2 stills), sequence
#: Seconds before the blackout whose datagrams are counted apart: the pacer's queue (4 s) + margin.
BLACKOUT_MARGIN_S = 4.5


class Sink:
    def __init__(self) -> None:
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.bind((LOOPBACK, 0))
        self.sock.settimeout(0.2)
        self.seen: set[tuple[int, int]] = set()
        self._stop = False
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop:
            try:
                data = self.sock.recv(65535)
            except TimeoutError:
                continue
            except OSError:
                return
            if len(data) >= HEAD.size:
                self.seen.add(HEAD.unpack_from(data))

    def close(self) -> None:
        self._stop = True
        self._thread.join(2)
        self.sock.close()


def _config(name: str, **changes: dict | None) -> dict:
    document = yaml.safe_load((CONFIG / name).read_text())
    for section, values in changes.items():
        if values is None:
            document.pop(section, None)
        else:
            document.setdefault(section, {}).update(values)
    return document


def _impair(to: tuple[str, int], options: list[str] = IMPAIR) -> tuple[subprocess.Popen, tuple[str, int], float]:
    argv = [sys.executable, "-m", "fecproxy", "impair", "--listen", f"{LOOPBACK}:0", "--to", f"{to[0]}:{to[1]}"]
    proc = subprocess.Popen(argv + options, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 30
    assert proc.stdout is not None
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        if line.startswith("fecproxy impair: listening on"):
            port = int(line.split("listening on ")[1].split(",")[0].rsplit(":", 1)[1])
            return proc, (LOOPBACK, port), time.monotonic()
    proc.kill()
    raise AssertionError("fecproxy impair did not start")


def run_trial(tmp_path: Path, paced: bool, seconds: float = RUN_S) -> dict:
    """One trial; returns the delivered shares and the drops the sender and impair counted."""
    sink = Sink()
    receiver_link = {"bind": f"{LOOPBACK}:0"}
    receiver = _config(
        "trial-receiver.yaml",
        link=receiver_link,
        metrics={"listen": f"{LOOPBACK}:0"},
    )
    receiver["forward"] = f"{LOOPBACK}:{sink.sock.getsockname()[1]}"
    if not paced:
        receiver["link"] = {"bind": f"{LOOPBACK}:0"}
    receiver_proc = DaemonProcess(write_config(tmp_path / f"r{paced}.yaml", receiver))
    impair = sender_proc = None
    try:
        receiver_proc.wait_started()
        impair, relay, impair_start = _impair(receiver_proc.link_address)
        sender = _config("trial-sender.yaml", metrics={"listen": f"{LOOPBACK}:0"})
        link = {"bind": f"{LOOPBACK}:0", "peer": f"{relay[0]}:{relay[1]}"}
        if paced:
            link |= {k: v for k, v in sender["link"].items() if k in ("rate", "queue_ms")}
        sender["link"], sender["listen"] = link, f"{LOOPBACK}:0"
        sender_proc = DaemonProcess(write_config(tmp_path / f"s{paced}.yaml", sender))
        sender_proc.wait_started()
        sent, times = _station(sender_proc.listen_address, seconds)
        time.sleep(1.0)
        wait_until(lambda: False, 6.0, interval=0.5)  # the queue drains, the last blocks' verdicts
        metrics = sender_proc.metrics()
        impair.send_signal(signal.SIGINT)
        impair_out, _ = impair.communicate(timeout=20)
    finally:
        for proc in (sender_proc, receiver_proc):
            if proc is not None:
                proc.terminate()
        if impair is not None and impair.poll() is None:
            impair.kill()
            impair.communicate()
        sink.close()
    queue = [int(n) for n in re.findall(r"drops: queue (\d+)", impair_out)]
    got = {stream: sum(1 for s, _ in sink.seen if s == stream) for stream in (1, 2)}
    # README's line has a 2 s blackout every 60 s from 60 s: any 60 s run meets one, and a 2 s
    # outage is beyond what 600 ms blocks repair.  Datagrams sent from BLACKOUT_MARGIN_S before it
    # (they wait in the pacer's queue) to its end are counted apart.
    outage = (impair_start + 60.0 - BLACKOUT_MARGIN_S, impair_start + 62.5)
    clear = {key for key, at in times.items() if not outage[0] <= at <= outage[1]}
    got_clear = {stream: sum(1 for key in clear & sink.seen if key[0] == stream) for stream in (1, 2)}
    sent_clear = {stream: sum(1 for key in clear if key[0] == stream) for stream in (1, 2)}
    dropped = {
        labels: value for (name, labels), value in metrics.items() if name == "fecproxy_link_queue_dropped_total"
    }
    return {
        "readings": got[1] / sent[1],
        "stills": got[2] / sent[2],
        "readings_clear": got_clear[1] / sent_clear[1],
        "stills_clear": got_clear[2] / sent_clear[2],
        "sent_clear": sent_clear,
        "sent": sent,
        "modem_queue_drops": queue[0] if queue else -1,
        "pacer_drops_source": sum(v for labels, v in dropped.items() if ("kind", "source") in labels),
        "pacer_drops_repair": sum(v for labels, v in dropped.items() if ("kind", "repair") in labels),
    }


def _station(address: tuple[str, int], seconds: float) -> tuple[dict[int, int], dict[tuple[int, int], float]]:
    """README's traffic for ``seconds``; returns datagrams sent per stream and each one's send time."""
    rng = random.Random(17)
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sent = {1: 0, 2: 0}
    times: dict[tuple[int, int], float] = {}
    start = time.monotonic()
    next_still = start + 0.5
    try:
        for tick in range(int(seconds * READINGS_PER_S)):
            due = start + tick / READINGS_PER_S
            while (now := time.monotonic()) < due:
                time.sleep(due - now)
            size = rng.randint(*READING_BYTES)
            sock.sendto(HEAD.pack(1, sent[1]) + bytes(size - HEAD.size), address)
            times[(1, sent[1])] = time.monotonic()
            sent[1] += 1
            if time.monotonic() >= next_still:
                for _ in range(STILL_DATAGRAMS):  # back to back, as a camera sends a still
                    sock.sendto(HEAD.pack(2, sent[2]) + bytes(STILL_BYTES - HEAD.size), address)
                    times[(2, sent[2])] = time.monotonic()
                    sent[2] += 1
                next_still += STILL_EVERY_S
    finally:
        sock.close()
    return sent, times


def predicted_reading_residual() -> float:
    """The planner's residual loss for the readings with the trial sender's code, class by class:
    fec.size_classes [256] (the default) puts readings of 100-256 bytes in one class and those of
    257-300 bytes in the stills' class, each filling short blocks at its own rate (between stills,
    the large readings' blocks close on the flush timer alone)."""
    sender = yaml.safe_load((CONFIG / "trial-sender.yaml").read_text())["fec"]
    channel = channel_from_figures(loss=0.03, burst=2.0)
    low, high = READING_BYTES
    small = (256 - low + 1) / (high - low + 1)
    total = 0.0
    for share in (small, 1 - small):
        k_eff, m_eff = effective_code(
            sender["block_size"], sender["repair"], READINGS_PER_S * share, sender["flush_ms"] / 1000
        )
        total += share * evaluate(channel, k_eff, m_eff).residual_loss
    return total


def test_the_readme_trial_with_and_without_pacing(tmp_path):
    unpaced = run_trial(tmp_path, paced=False)
    paced = run_trial(tmp_path, paced=True)
    predicted = predicted_reading_residual()
    rows = [
        ("camera stills delivered", "stills", "{:.2%}"),
        ("readings delivered", "readings", "{:.2%}"),
        ("stills, outside the blackout", "stills_clear", "{:.2%}"),
        ("readings, outside the blackout", "readings_clear", "{:.2%}"),
        ("modem buffer drops (impair)", "modem_queue_drops", "{}"),
        ("pacer drops: source", "pacer_drops_source", "{:.0f}"),
        ("pacer drops: repair", "pacer_drops_repair", "{:.0f}"),
    ]
    print(f"\nREADME trial, {RUN_S:.0f} s, {unpaced['sent']} datagrams sent (1 readings, 2 stills)")
    print(f"{'':32} {'no pacing':>12} {'link.rate':>12}")
    for label, key, form in rows:
        print(f"{label:32} {form.format(unpaced[key]):>12} {form.format(paced[key]):>12}")
    readings = paced["sent_clear"][1]
    allowed = predicted + 3 * (predicted / readings) ** 0.5  # the prediction + 3 standard deviations
    print(f"readings residual loss predicted by the planner: {predicted:.2e} (allowed over {readings}: {allowed:.2e})")
    print(f"outside the blackout: {paced['sent_clear']} datagrams sent")
    assert paced["stills_clear"] >= 0.99
    assert 1 - paced["readings_clear"] <= allowed
    assert paced["modem_queue_drops"] <= unpaced["modem_queue_drops"]
    assert paced["pacer_drops_source"] == 0


# -- link.rate below what is offered: the published drop rule, counted, memory bounded ------------

K, M = 8, 4  # overhead 0.5
RATE = 200.0  # datagrams per second
COUNT = 2400  # 12 s
QUEUE_MS = 500
IPV4_UDP = 28


def offered_air_bytes() -> float:
    """Air bytes per second the pair is offered: every source packet, and each full block's m
    repair packets as long as the block's longest datagram (wire layout of protocol/wire.py:
    source header 14, repair header 12 + symbol prefix 5), IP/UDP headers counted."""
    from support.daemon_pair import make_payload

    sizes = [len(make_payload(1, seq)) for seq in range(COUNT)]
    source = sum(14 + size + IPV4_UDP for size in sizes)
    repair = sum(M * (12 + 5 + max(sizes[i : i + K]) + IPV4_UDP) for i in range(0, COUNT - K + 1, K))
    return (source + repair) / (COUNT / RATE)


def test_a_link_rate_below_the_offered_traffic_drops_repair_first_and_counts_add_up(tmp_path):
    from support.daemon_pair import drain, send_paced

    link_rate = 0.8 * offered_air_bytes() * 8  # 80 % of the offered traffic × (1 + overhead)
    sender_link = {"rate": round(link_rate), "queue_ms": QUEUE_MS}
    pair = _paced_pair(tmp_path, sender_link)
    try:
        client = pair.client(1)
        peaks = []
        sampler_stop = threading.Event()

        def sample() -> None:
            while not sampler_stop.is_set():
                peaks.append(pair.sender.metric("fecproxy_link_queue_bytes"))
                sampler_stop.wait(0.25)

        sampler = threading.Thread(target=sample, daemon=True)
        sampler.start()
        send_paced(client.send, COUNT, RATE)
        time.sleep(QUEUE_MS / 1000 + 1.0)  # the queue drains
        sampler_stop.set()
        sampler.join(2)
        drain(pair, COUNT)
        s, r = pair.sender, pair.receiver
        taken_in = s.metric("fecproxy_source_packets_sent_total")
        repair_made = s.metric("fecproxy_repair_packets_sent_total")
        dropped = {
            (dict(labels)["kind"], dict(labels)["reason"]): value
            for (name, labels), value in s.metrics().items()
            if name == "fecproxy_link_queue_dropped_total"
        }
        source_dropped = sum(v for (kind, _), v in dropped.items() if kind == "source")
        repair_dropped = sum(v for (kind, _), v in dropped.items() if kind == "repair")
        arrived_source = r.metric("fecproxy_link_packets_received_total", kind="source")
        arrived_repair = r.metric("fecproxy_link_packets_received_total", kind="repair")
        limit = link_rate / 8 * QUEUE_MS / 1000
        print(
            f"\nlink.rate {link_rate / 1000:.0f} kbit/s = 80 % of offered × 1.5; taken in {taken_in:.0f}, "
            f"source dropped {source_dropped:.0f}, repair made {repair_made:.0f}, repair dropped {repair_dropped:.0f} "
            f"({repair_dropped / repair_made:.0%}); queue peak {max(peaks):.0f} B of {limit:.0f} B"
        )
        assert taken_in == COUNT
        assert repair_dropped > 0 and source_dropped == 0  # repair before source
        assert arrived_source + source_dropped == taken_in  # no loss on this relay: every source counted
        assert arrived_repair + repair_dropped == repair_made
        assert max(peaks) <= limit + 64 * 1500  # the air-time bound (+ control's own cap)
        assert pair.server.count() == COUNT
        warning = s.events("queue_full")[0]  # says by how much the offered traffic exceeds link.rate
        assert "above link.rate" in warning["detail"] and int(warning["dropped_repair"]) > 0
        print(f"queue_full: {warning['detail']}")
    finally:
        pair.close()


def _paced_pair(tmp_path: Path, link: dict):
    """A Pair whose sender has ``link`` keys (link.rate, link.queue_ms) beside its bind and peer."""
    from support import daemon_pair

    original = daemon_pair.sender_config

    def paced_config(peer, **fec):
        document = original(peer, **fec)
        document["link"].update(link)
        return document

    daemon_pair.sender_config = paced_config
    try:
        return daemon_pair.Pair(tmp_path, sender_fec={"block_size": K, "repair": M, "flush_ms": 20})
    finally:
        daemon_pair.sender_config = original


# -- plan's burst delay against a paced pair ----------------------------------------------------------


def test_plan_reproduces_the_measured_queue_delay_of_a_burst(tmp_path):
    """A still (50 × 1200 bytes, back to back) into a sender paced at 256 kbit/s, through
    ``fecproxy impair --rate-kbps 256`` (no loss, no delay), nothing else on the link: the last
    datagram's wait at the application against ``plan --burst-datagrams``."""
    import contextlib
    import io
    import json

    from fecproxy.cli import main as cli_main

    burst, size, rate = 50, 1200, 256_000
    sink = Sink()
    receiver = _config("trial-receiver.yaml", metrics={"listen": f"{LOOPBACK}:0"})
    receiver["link"] = {"bind": f"{LOOPBACK}:0"}
    receiver["forward"] = f"{LOOPBACK}:{sink.sock.getsockname()[1]}"
    receiver_proc = DaemonProcess(write_config(tmp_path / "r.yaml", receiver))
    impair = sender_proc = None
    try:
        receiver_proc.wait_started()
        impair, relay, _ = _impair(receiver_proc.link_address, ["--rate-kbps", "256", "--queue-packets", "64"])
        sender = _config("trial-sender.yaml", metrics={"listen": f"{LOOPBACK}:0"})
        sender["link"] = {"bind": f"{LOOPBACK}:0", "peer": f"{relay[0]}:{relay[1]}", "rate": rate, "queue_ms": 4000}
        sender["listen"] = f"{LOOPBACK}:0"
        sender["fec"] |= {"block_size": K, "repair": M, "size_classes": []}
        sender_proc = DaemonProcess(write_config(tmp_path / "s.yaml", sender))
        sender_proc.wait_started()
        sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        time.sleep(0.5)
        for seq in range(burst):
            sock.sendto(HEAD.pack(2, seq) + bytes(size - HEAD.size), sender_proc.listen_address)
        sent_last = time.monotonic()
        sock.close()
        assert wait_until(lambda: (2, burst - 1) in sink.seen, 20.0, interval=0.001)
        measured = time.monotonic() - sent_last
        impair.send_signal(signal.SIGINT)
        impair_out, _ = impair.communicate(timeout=20)
    finally:
        for proc in (sender_proc, receiver_proc):
            if proc is not None:
                proc.terminate()
        if impair is not None and impair.poll() is None:
            impair.kill()
            impair.communicate()
        sink.close()
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        cli_main(
            ["plan", "--k", str(K), "--m", str(M), "--loss", "0.01", "--rate", "10", "--link-rate", str(rate),
             "--datagram-bytes", str(size), "--burst-datagrams", str(burst), "--queue-ms", "4000", "--json"]
        )  # fmt: skip
    planned = json.loads(out.getvalue())["burst_delay_ms"] / 1000
    queue = [int(n) for n in re.findall(r"drops: queue (\d+)", impair_out)]
    print(
        f"\nburst of {burst} × {size} B at {rate / 1000:g} kbit/s through fecproxy impair --rate-kbps 256: "
        f"planned {planned:.3f} s, measured {measured:.3f} s; impair buffer drops {queue}"
    )
    assert abs(measured - planned) <= 0.2 * planned
    assert queue and queue[0] == 0  # the proxy's pacing kept the modem's buffer from overflowing


# -- the far end, seen from the sender -------------------------------------------------------------


def test_a_stopped_receiver_is_reported_silent_within_three_report_intervals_and_a_restart_clears_it(tmp_path):
    """Reports every second (the default): the sender hears its receiver, the receiver stops, the
    sender logs peer_silent within 3 intervals of the last report; a new receiver clears it."""
    from support.daemon_pair import Pair

    interval = 1.0
    pair = Pair(tmp_path)
    new_receiver = None
    stop_feeding = threading.Event()
    try:
        client = pair.client(1)

        def feed() -> None:  # 50 datagrams a second, bounded: at most 60 s
            for seq in range(3000):
                if stop_feeding.wait(0.02):
                    return
                client.send(seq)

        feeder = threading.Thread(target=feed, daemon=True)
        feeder.start()
        sender = pair.sender
        assert wait_until(lambda: sender.metric("fecproxy_peer_silent") == 0, 15.0, interval=0.2)
        # The peer's reported loss on what we send: known once its reports cover 200 datagrams.
        assert wait_until(lambda: sender.metric("fecproxy_peer_link_loss_ratio") >= 0, 20.0, interval=0.2)
        before, after = (
            sender.metric("fecproxy_peer_link_loss_ratio"),
            sender.metric("fecproxy_peer_residual_loss_ratio"),
        )
        stopped = time.monotonic()
        pair.receiver.terminate()
        silent = sender.wait_event("peer_silent", 10.0)
        noticed = time.monotonic() - stopped
        # quiet_s counts from the last valid packet heard, which came before the stop.
        assert float(silent["quiet_s"]) <= 3 * interval
        assert sender.metric("fecproxy_peer_silent") == 1
        new_receiver = DaemonProcess(pair.receiver.config_path)
        new_receiver.wait_started()
        pair.relay.target = new_receiver.link_address
        heard = sender.wait_event("peer_heard", 15.0)
        assert wait_until(lambda: sender.metric("fecproxy_peer_silent") == 0, 10.0, interval=0.2)
        print(
            f"\npeer_silent logged {noticed:.2f} s after the receiver was stopped (quiet_s {silent['quiet_s']}, "
            f"threshold {2.5 * interval:g} s); peer_heard after a restart (silent_s {heard['silent_s']}); "
            f"peer's reported loss before the stop: {before:g} before, {after:g} after recovery"
        )
    finally:
        stop_feeding.set()
        if new_receiver is not None:
            new_receiver.terminate()
        pair.close()
