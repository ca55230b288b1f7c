"""A ``fecproxy run`` pair as separate processes, with a lossy relay and application endpoints.

Topology (all sockets on 127.0.0.1, ports chosen by the kernel and read back from each daemon's
``event=started`` log line, so no port is ever guessed)::

    clients --> sender proxy --> LossyRelay (support/lossy_relay.py) --> receiver proxy --> AppServer
            <--              <--                                     <--                <-- (echo)

Each application datagram carries a stream id, a sequence number, a deterministic filler of
varying length and an 8-byte BLAKE2b digest, so a corrupted, truncated, duplicated or misrouted
datagram is detected at once.  Every wait is bounded by a timeout; every load loop by a count.
The ``pairs`` fixture (tests/conftest.py) starts pairs and stops them at the end of a test.
"""

from __future__ import annotations

import hashlib
import json
import re
import signal
import socket
import struct
import subprocess
import sys
import threading
import time
import urllib.request
from collections import defaultdict
from collections.abc import Callable
from pathlib import Path

import yaml
from prometheus_client.parser import text_string_to_metric_families

from support.lossy_relay import LossyRelay, no_loss

LOOPBACK = "127.0.0.1"
#: Upper bound for a daemon to start (imports numpy, trio, prometheus-client) on a busy 2-core box.
STARTUP_TIMEOUT = 20.0
#: Upper bound for traffic already sent to drain through the pair.
DRAIN_TIMEOUT = 10.0

# --------------------------------------------------------------------------------------------
# Application payloads
# --------------------------------------------------------------------------------------------

_FILLER = bytes(range(256)) * 2
_HEAD = struct.Struct(">HI")  # stream id, sequence number
DIGEST_BYTES = 8


def make_payload(stream: int, seq: int) -> bytes:
    """A self-checking datagram of 1..255 filler bytes (lengths vary, so padding is exercised)."""
    length = 1 + (seq * 37 + stream * 11) % 255
    body = _HEAD.pack(stream, seq) + _FILLER[seq % 256 : seq % 256 + length]
    return body + hashlib.blake2b(body, digest_size=DIGEST_BYTES).digest()


def check_payload(data: bytes) -> tuple[int, int] | None:
    """(stream, seq) of an intact datagram, None for a corrupted one."""
    if len(data) < _HEAD.size + 1 + DIGEST_BYTES:
        return None
    body, digest = data[:-DIGEST_BYTES], data[-DIGEST_BYTES:]
    if hashlib.blake2b(body, digest_size=DIGEST_BYTES).digest() != digest:
        return None
    stream, seq = _HEAD.unpack_from(body)
    return (stream, seq) if make_payload(stream, seq) == data else None


# --------------------------------------------------------------------------------------------
# Application endpoints
# --------------------------------------------------------------------------------------------


def _udp_socket() -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    for option in (socket.SO_RCVBUF, socket.SO_SNDBUF):
        sock.setsockopt(socket.SOL_SOCKET, option, 4 * 1024 * 1024)
    sock.bind((LOOPBACK, 0))
    sock.settimeout(0.05)
    return sock


class AppServer:
    """The application server behind the receiver: checks every datagram; optionally echoes it."""

    def __init__(self, *, echo: bool = False):
        self.sock = _udp_socket()
        self.echo = echo
        self.received: list[tuple[int, int]] = []
        self.raw: list[bytes] = []
        self.sources: dict[int, set] = defaultdict(set)  # stream -> source addresses seen
        self.corrupted = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    @property
    def address(self) -> tuple[str, int]:
        return self.sock.getsockname()

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                data, address = self.sock.recvfrom(65535)
            except (TimeoutError, BlockingIOError):
                continue
            except OSError:
                return
            self.raw.append(data)
            ids = check_payload(data)
            if ids is None:
                self.corrupted += 1
                continue
            self.received.append(ids)
            self.sources[ids[0]].add(address)
            if self.echo:
                self.sock.sendto(data, address)

    def count(self) -> int:
        return len(self.received)

    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=2)
        self.sock.close()


class Client:
    """An application client in front of the sender; collects the replies it gets."""

    def __init__(self, stream: int, destination: tuple[str, int]):
        self.stream = stream
        self.destination = destination
        self.sock = _udp_socket()
        self.sock.setblocking(False)
        self.replies: list[tuple[int, int] | None] = []

    def send(self, seq: int) -> None:
        self.sock.sendto(make_payload(self.stream, seq), self.destination)

    def collect(self) -> None:
        while True:
            try:
                data = self.sock.recv(65535)
            except BlockingIOError:
                return
            self.replies.append(check_payload(data))

    def close(self) -> None:
        self.sock.close()


def send_paced(send, count: int, rate: float) -> None:
    """Call ``send(i)`` for i < count at about ``rate`` per second (modest rates: nothing is lost
    in a kernel buffer, so every missing datagram is the relay's doing)."""
    start = time.monotonic()
    for i in range(count):
        ahead = start + i / rate - time.monotonic()
        if ahead > 0.002:
            time.sleep(ahead)
        send(i)


def wait_until(predicate, timeout: float, interval: float = 0.02) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(interval)
    return predicate()


# --------------------------------------------------------------------------------------------
# Daemon processes
# --------------------------------------------------------------------------------------------

_FIELD = re.compile(r'(\w+)=("(?:[^"\\]|\\.)*"|\S*)')


def metrics_port_of(started: dict[str, str]) -> int:
    """The port of a ``started`` line's ``metrics`` field (``http://HOST:PORT/metrics``)."""
    return int(started["metrics"].split("://", 1)[-1].split("/", 1)[0].rsplit(":", 1)[1])


def parse_log_line(line: str) -> dict[str, str]:
    return {key: json.loads(value) if value.startswith('"') else value for key, value in _FIELD.findall(line)}


class DaemonProcess:
    """``python -m fecproxy run CONFIG`` with its stderr collected line by line in a thread."""

    def __init__(self, config_path: Path):
        self.config_path = config_path
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "fecproxy", "run", str(config_path), "--log-format", "text"],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            text=True,
        )
        self.lines: list[str] = []
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()
        self.started: dict[str, str] = {}

    def _read(self) -> None:
        assert self.proc.stderr is not None  # opened with stderr=PIPE
        for line in self.proc.stderr:
            self.lines.append(line.rstrip("\n"))

    def events(self, name: str) -> list[dict[str, str]]:
        return [fields for fields in map(parse_log_line, list(self.lines)) if fields.get("event") == name]

    def wait_event(self, name: str, timeout: float, count: int = 1) -> dict[str, str]:
        ok = wait_until(lambda: len(self.events(name)) >= count or self.proc.poll() is not None, timeout)
        found = self.events(name)
        assert ok and len(found) >= count, f"no event={name} (x{count}) within {timeout}s; log:\n" + self.log()
        return found[count - 1]

    def wait_started(self) -> None:
        self.started = self.wait_event("started", STARTUP_TIMEOUT)

    def log(self) -> str:
        return "\n".join(self.lines)

    @staticmethod
    def _address(text: str) -> tuple[str, int]:
        host, _, port = text.rpartition(":")
        return host, int(port)

    @property
    def metrics_port(self) -> int:
        return metrics_port_of(self.started)

    @property
    def link_address(self) -> tuple[str, int]:
        return self._address(self.started["link"])

    @property
    def listen_address(self) -> tuple[str, int]:
        return self._address(self.started["listen"])

    def metrics(self) -> dict[tuple[str, tuple], float]:
        """Every sample on /metrics, keyed by (sample name, sorted label items)."""
        url = f"http://{LOOPBACK}:{self.metrics_port}/metrics"
        with urllib.request.urlopen(url, timeout=5) as response:
            text = response.read().decode()
        samples = {}
        for family in text_string_to_metric_families(text):
            for sample in family.samples:
                samples[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
        return samples

    def metric(self, name: str, **labels: str) -> float:
        return self.metrics()[(name, tuple(sorted(labels.items())))]

    def info(self) -> dict[str, str]:
        for (name, labels), _ in self.metrics().items():
            if name == "fecproxy_info":
                return dict(labels)
        raise AssertionError("no fecproxy_info on /metrics")

    def signal_stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)

    def terminate(self, timeout: float = 5.0) -> int:
        self.signal_stop()
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=5)
            raise AssertionError(f"{self.config_path.name} did not exit within {timeout}s of SIGTERM") from None
        finally:
            self._reader.join(timeout=2)


def write_config(path: Path, document: dict) -> Path:
    path.write_text(yaml.safe_dump(document, sort_keys=False))
    return path


#: One size class and no RFC 6363 §8.2 byte cut: these tests read the link as one stream of
#: block-aligned packets (link packet i is ESI i mod n of block i // n) whatever the datagram
#: sizes, so every block must carry its m repair packets (tests/test_interleave_classes.py covers
#: the classes and the byte cut).
ONE_CLASS = {"size_classes": [], "allow_repair_above_source": True}


def sender_config(peer: tuple[str, int], **fec) -> dict:
    return {
        "role": "sender",
        "listen": f"{LOOPBACK}:0",
        "link": {"bind": f"{LOOPBACK}:0", "peer": f"{peer[0]}:{peer[1]}"},
        "fec": {"block_size": 16, "repair": 4, "flush_ms": 20, **ONE_CLASS, **fec},
        "metrics": {"listen": f"{LOOPBACK}:0"},
        "log": {"level": "info", "format": "text"},
    }


def receiver_config(forward: tuple[str, int], **fec) -> dict:
    return {
        "role": "receiver",
        "forward": f"{forward[0]}:{forward[1]}",
        "link": {"bind": f"{LOOPBACK}:0"},
        "fec": {"block_size": 16, "repair": 4, "flush_ms": 20, **ONE_CLASS, **fec},
        "metrics": {"listen": f"{LOOPBACK}:0"},
        "log": {"level": "info", "format": "text"},
    }


class Pair:
    """Application server, receiver, relay and sender, started in that order; closed in reverse."""

    def __init__(
        self,
        tmp_path: Path,
        *,
        sender_fec=None,
        receiver_fec=None,
        forward=no_loss,
        back=no_loss,
        record=False,
        echo=False,
        sender_extra=None,
        receiver_extra=None,
    ):
        self._closers: list[Callable[[], int | None]] = []
        try:
            self.server = AppServer(echo=echo)
            self._closers.append(self.server.close)
            self.relay = LossyRelay(forward=forward, back=back, record=record).__enter__()
            self._closers.append(self.relay.close)
            sender = sender_config(self.relay.address, **(sender_fec or {})) | (sender_extra or {})
            receiver = receiver_config(self.server.address, **(receiver_fec or {})) | (receiver_extra or {})
            self.sender_path = write_config(tmp_path / "sender.yaml", sender)
            receiver_path = write_config(tmp_path / "receiver.yaml", receiver)
            # Both daemons start at once (their imports dominate), then the relay learns its target.
            self.receiver = DaemonProcess(receiver_path)
            self._closers.append(self.receiver.terminate)
            self.sender = DaemonProcess(self.sender_path)
            self._closers.append(self.sender.terminate)
            self.receiver.wait_started()
            self.sender.wait_started()
            self.relay.target = self.receiver.link_address
        except BaseException:
            self.close()
            raise
        self.clients: list[Client] = []

    def client(self, stream: int) -> Client:
        client = Client(stream, self.sender.listen_address)
        self.clients.append(client)
        return client

    def close(self) -> list[int]:
        """Stop everything; returns the daemons' exit codes (sender first)."""
        codes: list[int | None] = []
        errors: list[Exception] = []
        for client in getattr(self, "clients", []):
            client.close()
        for daemon in (getattr(self, "sender", None), getattr(self, "receiver", None)):
            if daemon is not None:
                daemon.signal_stop()  # both stop at once; terminate() below collects them
        for closer in reversed(self._closers):
            try:
                codes.append(closer())
            except Exception as error:  # keep closing the rest, report afterwards
                errors.append(error)
        self._closers.clear()
        if errors:
            raise errors[0]
        return [code for code in codes if code is not None]


def drain(pair: Pair, expected: int, timeout: float = DRAIN_TIMEOUT) -> None:
    """Wait until the server has ``expected`` datagrams, or the receiver has accounted for every
    one of them as delivered or unrecovered (blocks that failed are reported after hold_ms)."""

    def settled() -> bool:
        if pair.server.count() >= expected:
            return True
        metrics = pair.receiver.metrics()
        done = (
            metrics[("fecproxy_datagrams_delivered_total", ())] + metrics[("fecproxy_datagrams_unrecovered_total", ())]
        )
        return done >= expected and pair.server.count() >= metrics[("fecproxy_datagrams_delivered_total", ())]

    assert wait_until(settled, timeout, interval=0.1), (
        f"server has {pair.server.count()} of {expected}; receiver log:\n{pair.receiver.log()}"
    )


def parse_link_header(data: bytes) -> tuple[int, int, int, int]:
    """(type, session, SBN, ESI) of a link packet, read from the wire layout documented in
    fecproxy/protocol/wire.py (version|type, flags, session 32, SBN 24 | ESI 8) without using its code."""
    version_type, _flags, session, sbn_esi = struct.unpack_from(">BBII", data)
    return version_type & 0x0F, session, sbn_esi >> 8, sbn_esi & 0xFF


SOURCE, REPAIR = 0, 1


def dropped(daemon: DaemonProcess, reason: str) -> float:
    """The daemon's fecproxy_packets_dropped_total for ``reason``, read from its /metrics."""
    return daemon.metric("fecproxy_packets_dropped_total", reason=reason)
