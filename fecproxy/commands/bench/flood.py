"""``fecproxy bench flood``: real traffic through a daemon pair while a stranger floods the
receiver's link port; prints what got through against the targets.  A benchmark, not a test.

Topology (all on 127.0.0.1)::

    generator --> sender --> tap --> receiver --> sink
                              |         ^
                              +-copies--+-- attacker (own socket): random bytes and mutated
                                            copies of real link packets

The tap forwards every link packet and keeps the latest ones, so the attacker can mutate real
packets: bit flips, truncation, extension, a header field overwritten with all-ones or
all-zeros, and exact replays.  Every real datagram carries a sequence number and a BLAKE2b
digest, so the sink counts intact and corrupted datagrams apart.  The receiver's resident memory
is read from /proc before and after.
"""

from __future__ import annotations

import argparse
import hashlib
import multiprocessing
import random
import socket
import struct
import tempfile
import threading
import time
from pathlib import Path

from fecproxy.commands.bench.options import positive
from fecproxy.commands.bench.pipeline import AUTH_MODES, BENCH_KEY_FILE, auth_section, write_bench_key
from fecproxy.commands.bench.processes import daemon_main
from fecproxy.protocol import wire

#: 10^6 hostile packets at ~12 000/s: the flood measured against the unprotected pair before.
DEFAULT_HOSTILE = 1_000_000
DEFAULT_HOSTILE_RATE = 12_000.0
#: Real traffic: a moderate telemetry/voice rate, far below the pair's capacity.
DEFAULT_REAL_RATE = 1_000.0
#: Real datagram size: a header (sequence) + filler + 8-byte digest.
REAL_BYTES = 200
_DIGEST = 8
_SEQ = struct.Struct(">Q")
#: Recent real link packets the tap keeps for the attacker to mutate.
TAP_MEMORY = 512
#: Targets: daemons alive; RSS growth; delivered share without and with a key.
TARGET_RSS_GROWTH_BYTES = 50 * 1024 * 1024
TARGET_DELIVERED_UNKEYED = 0.90
TARGET_DELIVERED_KEYED = 0.99
#: Time for the last real datagrams to drain after the flood.
DRAIN_S = 1.0
START_TIMEOUT_S = 30.0


def real_datagram(seq: int) -> bytes:
    body = _SEQ.pack(seq) + bytes((seq + i) & 0xFF for i in range(REAL_BYTES - _SEQ.size - _DIGEST))
    return body + hashlib.blake2b(body, digest_size=_DIGEST).digest()


def intact(data: bytes) -> int | None:
    """The sequence number of an intact real datagram, None for a corrupted one."""
    if len(data) != REAL_BYTES:
        return None
    body, digest = data[:-_DIGEST], data[-_DIGEST:]
    if hashlib.blake2b(body, digest_size=_DIGEST).digest() != digest:
        return None
    return _SEQ.unpack_from(body)[0]


def rss_bytes(pid: int) -> int | None:
    try:
        with open(f"/proc/{pid}/status") as status:
            for line in status:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


#: Header fields the attacker overwrites: (offset, length) from the wire module's layout.
_FIELDS = (
    (0, 1),  # version | type
    (1, 1),  # flags
    (2, 4),  # session
    (6, 4),  # SBN | ESI
    (wire.COMMON_HEADER.size, 2),  # type-specific: flow id + previous k, or k
)


def mutate(packet: bytes, rng: random.Random) -> bytes:
    """One hostile packet made from a real one (or from nothing)."""
    kind = rng.randrange(6)
    if kind == 0 or not packet:
        return rng.randbytes(rng.randrange(0, 1500))
    if kind == 1:  # bit flips
        data = bytearray(packet)
        for _ in range(rng.randint(1, 4)):
            bit = rng.randrange(len(data) * 8)
            data[bit // 8] ^= 1 << (bit % 8)
        return bytes(data)
    if kind == 2:  # truncation
        return packet[: rng.randrange(len(packet))]
    if kind == 3:  # extension
        return packet + rng.randbytes(rng.randint(1, 64))
    if kind == 4:  # a field all-ones or all-zeros
        offset, length = rng.choice(_FIELDS)
        fill = b"\xff" if rng.random() < 0.5 else b"\x00"
        return packet[:offset] + fill * length + packet[offset + length :]
    return packet  # exact replay


class _Flood:
    def __init__(self, args):
        self.args = args
        self.received: set[int] = set()
        self.corrupted = 0
        self.duplicates = 0
        self.stop = threading.Event()
        self.recent: list[bytes] = []
        self.hostile_sent = 0
        self.processes = []

    def start_daemon(self, context, document: dict, key_dir: str | None):
        parent, child = context.Pipe()
        process = context.Process(target=daemon_main, args=(child, document, key_dir), daemon=True)
        process.start()
        child.close()
        self.processes.append(process)
        if not parent.poll(START_TIMEOUT_S):
            raise RuntimeError("a daemon did not start in time")
        return process, parent.recv()

    def sink(self, sock: socket.socket) -> None:
        sock.settimeout(0.2)
        while not self.stop.is_set():
            try:
                data = sock.recv(65535)
            except TimeoutError:
                continue
            except OSError:
                return
            seq = intact(data)
            if seq is None:
                self.corrupted += 1
            elif seq in self.received:
                self.duplicates += 1
            else:
                self.received.add(seq)

    def tap(self, sock: socket.socket, receiver: tuple) -> None:
        sock.settimeout(0.2)
        sender_address = None
        while not self.stop.is_set():
            try:
                data, address = sock.recvfrom(65535)
            except TimeoutError:
                continue
            except OSError:
                return
            if address == receiver:  # a reply towards the sender
                if sender_address is not None:
                    sock.sendto(data, sender_address)
                continue
            sender_address = address
            sock.sendto(data, receiver)
            recent = self.recent
            if len(recent) < TAP_MEMORY:
                recent.append(data)
            else:
                recent[random.randrange(TAP_MEMORY)] = data

    def attack(self, target: tuple, count: int, rate: float, seed: int) -> float:
        rng = random.Random(seed)
        sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        sock.bind(("127.0.0.1", 0))
        start = time.monotonic()
        sent = 0
        batch = 100
        try:
            while sent < count and not self.stop.is_set():
                due = start + sent / rate
                pause = due - time.monotonic()
                if pause > 0:
                    time.sleep(pause)
                for _ in range(min(batch, count - sent)):
                    recent = self.recent
                    original = recent[rng.randrange(len(recent))] if recent else b""
                    try:
                        sock.sendto(mutate(original, rng), target)
                    except OSError:
                        pass  # a full socket buffer: the packet is lost, as on a real link
                    sent += 1
                self.hostile_sent = sent
        finally:
            sock.close()
        return time.monotonic() - start

    def run(self) -> dict:
        args = self.args
        context = multiprocessing.get_context("spawn")
        key_dir = tempfile.TemporaryDirectory(prefix="fecproxy-flood-") if args.auth != "off" else None
        if key_dir is not None:
            write_bench_key(Path(key_dir.name) / BENCH_KEY_FILE)
        extra = auth_section(args.auth)
        sink = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        sink.bind(("127.0.0.1", 0))
        tap = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        tap.bind(("127.0.0.1", 0))
        for sock in (sink, tap):
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 * 1024 * 1024)
        threads = []
        try:
            dir_name = key_dir.name if key_dir is not None else None
            receiver, (receiver_link, _) = self.start_daemon(
                context,
                {
                    "role": "receiver",
                    "forward": f"127.0.0.1:{sink.getsockname()[1]}",
                    "link": {"bind": "127.0.0.1:0"},
                    "log": {"level": "error"},
                    **extra,
                },
                dir_name,
            )
            sender, (_, sender_listen) = self.start_daemon(
                context,
                {
                    "role": "sender",
                    "listen": "127.0.0.1:0",
                    "link": {"bind": "127.0.0.1:0", "peer": f"127.0.0.1:{tap.getsockname()[1]}"},
                    "log": {"level": "error"},
                    **(
                        {"fec": {"code": "sliding", "size_classes": []}}
                        if getattr(args, "code", "") == "sliding"
                        else {}
                    ),
                    **extra,
                },
                dir_name,
            )
            threads = [
                threading.Thread(target=self.sink, args=(sink,), daemon=True),
                threading.Thread(target=self.tap, args=(tap, tuple(receiver_link)), daemon=True),
            ]
            for thread in threads:
                thread.start()
            time.sleep(0.5)
            rss_before = rss_bytes(receiver.pid)
            flood_seconds = args.hostile / args.hostile_rate
            real_count = int(args.real_rate * flood_seconds)
            results: dict = {}
            attacker = threading.Thread(
                target=lambda: results.setdefault(
                    "attack_s", self.attack(tuple(receiver_link), args.hostile, args.hostile_rate, args.seed)
                ),
                daemon=True,
            )
            attacker.start()
            client = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            start = time.monotonic()
            for seq in range(real_count):
                due = start + seq / args.real_rate
                pause = due - time.monotonic()
                if pause > 0:
                    time.sleep(pause)
                client.sendto(real_datagram(seq), tuple(sender_listen))
            attacker.join(flood_seconds * 3 + 60)
            time.sleep(DRAIN_S)
            rss_after = rss_bytes(receiver.pid)
            alive = receiver.is_alive() and sender.is_alive()
            client.close()
        finally:
            self.stop.set()
            for thread in threads:
                thread.join(2)
            for process in self.processes:
                if process.is_alive():
                    process.terminate()
                process.join(5)
                if process.is_alive():
                    process.kill()
            sink.close()
            tap.close()
            if key_dir is not None:
                key_dir.cleanup()
        return dict(
            auth=args.auth,
            code=getattr(args, "code", "block"),
            hostile=self.hostile_sent,
            hostile_rate=self.hostile_sent / max(results.get("attack_s", 1e-9), 1e-9),
            real_sent=real_count,
            delivered=len(self.received),
            corrupted=self.corrupted,
            duplicates=self.duplicates,
            rss_before=rss_before,
            rss_after=rss_after,
            alive=alive,
        )


def format_figures(figures: dict) -> str:
    keyed = figures["auth"] != "off"
    share = figures["delivered"] / max(figures["real_sent"], 1)
    target = TARGET_DELIVERED_KEYED if keyed else TARGET_DELIVERED_UNKEYED
    growth = None
    if figures["rss_before"] is not None and figures["rss_after"] is not None:
        growth = figures["rss_after"] - figures["rss_before"]

    def verdict(ok: bool) -> str:
        return "met" if ok else "MISSED"

    lines = [
        f"flood benchmark, auth {figures['auth']}: {figures['hostile']:,} hostile packets at "
        f"{figures['hostile_rate']:,.0f}/s to the receiver's link port, "
        f"real traffic {figures['real_sent']:,} datagrams ({figures.get('code', 'block')} code)",
        f"  daemons alive                  {'yes' if figures['alive'] else 'NO':>12}   target yes            "
        f"{verdict(figures['alive'])}",
        f"  real datagrams delivered       {share:>12.2%}   target ≥ {target:.0%}          {verdict(share >= target)}",
        f"  corrupted datagrams delivered  {figures['corrupted']:>12,}   target {'0' if keyed else '-'}"
        f"             {verdict(figures['corrupted'] == 0) if keyed else ''}",
        f"  duplicates delivered           {figures['duplicates']:>12,}",
    ]
    if growth is not None:
        lines.append(
            f"  receiver RSS growth            {growth / 2**20:>10.1f} MiB   target ≤ 50 MiB       "
            f"{verdict(growth <= TARGET_RSS_GROWTH_BYTES)}   ({figures['rss_before'] / 2**20:.1f} → "
            f"{figures['rss_after'] / 2**20:.1f} MiB)"
        )
    return "\n".join(lines)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--auth", choices=AUTH_MODES, default="off", help="the pair's packet protection")
    parser.add_argument(
        "--code",
        choices=("block", "sliding"),
        default="block",
        help="the sender's fec.code (the receiver decodes either): the flood meets that code's packets",
    )
    parser.add_argument("--hostile", type=positive(int), default=DEFAULT_HOSTILE, help="hostile packets to send")
    parser.add_argument(
        "--hostile-rate", type=positive(float), default=DEFAULT_HOSTILE_RATE, help="hostile packets per second"
    )
    parser.add_argument(
        "--real-rate", type=positive(float), default=DEFAULT_REAL_RATE, help="real datagrams per second"
    )
    parser.add_argument("--seed", type=int, default=6363, help="seed of the hostile packets")
    parser.add_argument(
        "--quick", action="store_true", help="20 000 hostile packets (a smoke run, not the measurement)"
    )


def main(args: argparse.Namespace) -> int:
    if args.quick:
        args.hostile = min(args.hostile, 20_000)
    print(format_figures(_Flood(args).run()))
    return 0
