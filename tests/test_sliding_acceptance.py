"""Whole process: sliding-window code beside block code through ``fecproxy impair``, side by side.

``fecproxy run`` sender → ``fecproxy impair`` (seeded loss) → tap → ``fecproxy run`` receiver →
application server, all on 127.0.0.1, 1 000 datagrams/s, 25 % repair overhead for both codes:
block k=16, m=4 and sliding window (fec.window 32, one repair per 4 datagrams).  The tap after
the impairment sees which source packets survived the link, so the datagrams the server got but
the tap never saw are exactly the rebuilt ones; their delay is measured at the application (send
time in the payload, one monotonic clock).  The table is printed (``pytest -s``) for both links:
i.i.d. 5 % and Gilbert–Elliott 5 % with mean burst 3.

Asserted here (counts, with margins): every lost datagram is rebuilt or counted, and the sliding
code's residual loss is no worse than the block code's on both links.  The delays are printed,
not asserted: on a 2-core machine shared with other test runs, scheduling stalls of tens of ms
swamp millisecond delays (both chains run at once so the load falls on both alike, yet runs
differ by 2x); the delay criterion is asserted on the seeded fake-clock simulation instead
(``test_sliding_mean_delay_is_at_most_half_the_block_codes_on_the_iid_link``).  See README
"Sliding-window code" for why the burst link's mean delay is not half the block code's.
"""

from __future__ import annotations

import select
import socket
import struct
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from support.daemon_pair import DaemonProcess, write_config
from support.processes import end_process, read_line_starting

from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.sliding_sim import simulate
from fecproxy.protocol import wire

pytestmark = pytest.mark.slow

LOOPBACK = "127.0.0.1"
RATE = 1000.0
#: 8 s per run: ≈ 400 lost source datagrams at 5 %, enough for a mean and a p99 of their delay.
DATAGRAMS = 8000
PAYLOAD = struct.Struct(">Qq")  # sequence number, send time (ns, CLOCK_MONOTONIC)
PAYLOAD_BYTES = 100
CODES = {
    "block k=16 m=4": {"block_size": 16, "repair": 4, "flush_ms": 20, "size_classes": []},
    "sliding w=32 x=4": {"code": "sliding", "window": 32, "repair_interval": 4, "flush_ms": 20, "size_classes": []},
}
LINKS = {"iid 5%": ["--loss", "0.05"], "5%/burst 3": ["--loss", "0.05", "--burst", "3"]}


class Tap:
    """A two-way UDP relay between the impairment and the receiver that notes every source
    packet's application sequence number (the payload follows the 16-byte source header)."""

    def __init__(self, forward: tuple[str, int]):
        self.outer = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.outer.bind((LOOPBACK, 0))
        self.inner = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.inner.bind((LOOPBACK, 0))
        for sock in (self.outer, self.inner):
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
        self.forward = forward
        self.seen: set[int] = set()
        self._back: tuple[str, int] | None = None
        self._stop = False
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    @property
    def address(self) -> tuple[str, int]:
        return self.outer.getsockname()

    def _run(self) -> None:
        sources = (wire.SOURCE_TYPE_BYTE, wire.SLIDING_SOURCE_TYPE_BYTE)
        while not self._stop:
            ready, _, _ = select.select([self.outer, self.inner], [], [], 0.1)
            for sock in ready:
                data, address = sock.recvfrom(65535)
                if sock is self.outer:
                    self._back = address
                    if data[0] in sources and len(data) >= wire.SOURCE_HEADER_BYTES + PAYLOAD.size:
                        self.seen.add(PAYLOAD.unpack_from(data, wire.SOURCE_HEADER_BYTES)[0])
                    self.inner.sendto(data, self.forward)
                elif self._back is not None:
                    self.outer.sendto(data, self._back)

    def close(self) -> None:
        self._stop = True
        self._thread.join(timeout=2)
        self.outer.close()
        self.inner.close()


class Chain:
    """One pipeline: server socket, receiver, tap, impairment, sender (started in that order)."""

    def __init__(self, tmp_path, name: str, fec: dict, link: list[str], seed: int):
        self.server = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.server.bind((LOOPBACK, 0))
        self.server.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
        self.received: dict[int, int] = {}
        self.sending_done = False
        self.processes: list[DaemonProcess] = []
        self.tap: Tap | None = None
        self.impair: subprocess.Popen | None = None
        receiver = DaemonProcess(
            write_config(
                tmp_path / f"{name}-receiver.yaml",
                {
                    "role": "receiver",
                    "forward": f"{LOOPBACK}:{self.server.getsockname()[1]}",
                    "link": {"bind": f"{LOOPBACK}:0"},
                    "fec": {"size_classes": []},
                    "log": {"level": "info", "format": "text"},
                },
            )
        )
        self.processes.append(receiver)
        receiver.wait_started()
        self.tap = Tap(receiver.link_address)
        self.impair = subprocess.Popen(
            [sys.executable, "-m", "fecproxy", "impair", "--listen", f"{LOOPBACK}:0", "--to", f"{LOOPBACK}:"
             f"{self.tap.address[1]}", "--seed", str(seed), "--interval", "0", *link],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )  # fmt: skip
        listening = read_line_starting(self.impair.stdout, "fecproxy impair: listening on", time.monotonic() + 30)
        impair_port = int(listening.split("listening on ")[1].split(",")[0].rsplit(":", 1)[1])
        sender = DaemonProcess(
            write_config(
                tmp_path / f"{name}-sender.yaml",
                {
                    "role": "sender",
                    "listen": f"{LOOPBACK}:0",
                    "link": {"bind": f"{LOOPBACK}:0", "peer": f"{LOOPBACK}:{impair_port}"},
                    "fec": fec,
                    "log": {"level": "info", "format": "text"},
                },
            )
        )
        self.processes.append(sender)
        sender.wait_started()
        self.target = sender._address(sender.started["listen"])
        self.reader = threading.Thread(target=self._collect, daemon=True)
        self.reader.start()

    def _collect(self) -> None:
        """Until close(): after the last datagram was sent, 3 s of silence ends the collection."""
        self.server.settimeout(0.5)
        quiet_since = None
        while True:
            try:
                data = self.server.recv(65535)
            except TimeoutError:
                if self.sending_done:
                    quiet_since = quiet_since or time.monotonic()
                    if time.monotonic() - quiet_since > 3.0:
                        return
                continue
            except OSError:
                return
            quiet_since = None
            seq, sent_ns = PAYLOAD.unpack_from(data)
            self.received[seq] = time.monotonic_ns() - sent_ns

    def close(self) -> dict:
        self.sending_done = True
        self.reader.join(timeout=15)
        for process in self.processes:
            process.terminate()
        if self.impair is not None:
            end_process(self.impair)
        seen: set[int] = set()
        if self.tap is not None:
            seen = set(self.tap.seen)
            self.tap.close()
        self.server.close()
        rebuilt = np.array([d for seq, d in self.received.items() if seq not in seen], dtype=float) / 1e6
        return {
            "residual": 1 - len(self.received) / DATAGRAMS,
            "lost": DATAGRAMS - len(seen & set(range(DATAGRAMS))),
            "rebuilt": rebuilt.size,
            "mean_ms": float(rebuilt.mean()) if rebuilt.size else 0.0,
            "p99_ms": float(np.percentile(rebuilt, 99)) if rebuilt.size else 0.0,
            "direct_ms": float(np.mean([d for seq, d in self.received.items() if seq in seen]) / 1e6),
        }


def run_side_by_side(tmp_path, link_name: str, link: list[str], seed: int) -> dict[str, dict]:
    """Both codes at once, each datagram sent to both senders together: the shared machine's load
    falls on both alike."""
    chains: dict[str, Chain] = {}
    try:
        for number, (code_name, fec) in enumerate(CODES.items()):
            name = f"{code_name.split()[0]}-{list(LINKS).index(link_name)}-{number}"
            chains[code_name] = Chain(tmp_path, name, fec, link, seed)
        client = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        padding = bytes(PAYLOAD_BYTES - PAYLOAD.size)
        sent, start = 0, time.monotonic()
        while sent < DATAGRAMS:  # paced: what is due is sent, bounded by DATAGRAMS
            due = min(DATAGRAMS, int((time.monotonic() - start) * RATE) + 1)
            while sent < due:
                for chain in chains.values():
                    client.sendto(PAYLOAD.pack(sent, time.monotonic_ns()) + padding, chain.target)
                sent += 1
            time.sleep(0.001)
        client.close()
    finally:
        results = {name: chain.close() for name, chain in chains.items()}
    return results


def test_sliding_beside_block_through_impair(tmp_path):
    results = {}
    for link_name, link in LINKS.items():
        for code_name, figures in run_side_by_side(tmp_path, link_name, link, seed=20).items():
            results[link_name, code_name] = figures
    header = f"{'link':<12} {'code':<18} {'lost':>5} {'rebuilt':>7} {'residual':>9} {'mean ms':>8} {'p99 ms':>7}"
    print()
    print(f"whole process through fecproxy impair, {RATE:g} datagrams/s, {DATAGRAMS} datagrams, 25 % overhead")
    print(header)
    for (link_name, code_name), r in results.items():
        print(
            f"{link_name:<12} {code_name:<18} {r['lost']:>5} {r['rebuilt']:>7} {r['residual']:>9.5f} "
            f"{r['mean_ms']:>8.2f} {r['p99_ms']:>7.2f}  (direct {r['direct_ms']:.2f} ms)"
        )
    for link_name in LINKS:
        block, sliding = results[link_name, "block k=16 m=4"], results[link_name, "sliding w=32 x=4"]
        assert block["rebuilt"] > 100 and sliding["rebuilt"] > 100
        # residual: no worse, with a margin of 3 datagrams of 8 000 for the statistical noise
        assert sliding["residual"] <= block["residual"] + 3 / DATAGRAMS, link_name


def test_sliding_mean_delay_is_at_most_half_the_block_codes_on_the_iid_link():
    """The same comparison on the fake clock (real encoder and decoder, no scheduling noise):
    seeded, 8 replications; the upper end of the sliding code's 95 % interval against half the
    lower end of the block code's."""
    for name, channel in (
        ("iid 5 %", GilbertElliott.bernoulli(0.05)),
        ("5 %/burst 3", GilbertElliott.from_loss_burst(0.05, 3)),
    ):
        block = simulate("block", {"block_size": 16, "repair": 4}, channel, RATE, datagrams=16_000)
        sliding = simulate("sliding", {"window": 32, "repair_interval": 4}, channel, RATE, datagrams=16_000)
        for code in (block, sliding):
            print(
                f"fake clock, {name}: {code.code}: mean {code.mean_delay.mean * 1e3:.2f} ms, "
                f"p99 {code.p99_delay.mean * 1e3:.2f} ms, residual {code.residual_loss.mean:.5f}"
            )
        if name == "iid 5 %":
            assert sliding.mean_delay.high <= block.mean_delay.low / 2
            assert sliding.p99_delay.mean <= block.p99_delay.mean
        assert sliding.residual_loss.mean <= block.residual_loss.mean
