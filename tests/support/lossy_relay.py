"""A small lossy UDP relay for whole-process tests, written here and independent of fecproxy.

It sits on the link between a sender proxy (side A) and a receiver proxy (side B)::

    sender proxy  --link-->  [A  relay  B]  --link-->  receiver proxy
                  <--------                 <--------

Packets from A's peer go to ``target`` (the receiver proxy's link address) from socket B, so the
receiver learns B as its peer; replies arriving on B go back to the last address seen on A.
Each direction has its own drop rule, a callable ``(index, data) -> bool`` where ``index`` counts
that direction's link packets from 0: :func:`iid_loss` (seeded Bernoulli drop) or
:func:`drop_indices` (a fixed set of link packet indices).  Everything runs in one thread over two
non-blocking sockets; only 127.0.0.0/8 addresses are used by the tests.
"""

from __future__ import annotations

import random
import selectors
import socket
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

DropRule = Callable[[int, bytes], bool]

#: Large enough to hold a few thousand small packets, so a paced test never loses one in the
#: kernel; Linux caps the request at net.core.rmem_max.
SOCKET_BUFFER_BYTES = 4 * 1024 * 1024
#: How often the relay thread checks whether it was asked to stop.
POLL_SECONDS = 0.05


def no_loss(index: int, data: bytes) -> bool:
    return False


def iid_loss(probability: float, seed: int) -> DropRule:
    """Drop each packet independently with the given probability (seeded, so runs repeat)."""
    rng = random.Random(seed)
    return lambda index, data: rng.random() < probability


def drop_indices(indices: Iterable[int]) -> DropRule:
    """Drop exactly the link packets with these indices (0 = the direction's first packet)."""
    chosen = frozenset(indices)
    return lambda index, data: index in chosen


@dataclass
class Direction:
    """One direction's record: what it carried and what it dropped."""

    rule: DropRule
    record: bool
    seen: int = 0
    forwarded: int = 0
    dropped: int = 0
    packets: list[tuple[int, bool, bytes]] = field(default_factory=list)  # (index, dropped, data)

    def decide(self, data: bytes) -> bool:
        index = self.seen
        self.seen += 1
        drop = bool(self.rule(index, data))
        if drop:
            self.dropped += 1
        else:
            self.forwarded += 1
        if self.record:
            self.packets.append((index, drop, data))
        return drop


def _udp_socket(host: str) -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    for option in (socket.SO_RCVBUF, socket.SO_SNDBUF):
        sock.setsockopt(socket.SOL_SOCKET, option, SOCKET_BUFFER_BYTES)
    sock.bind((host, 0))
    sock.setblocking(False)
    return sock


class LossyRelay:
    """Bidirectional relay in a background thread; use as a context manager."""

    def __init__(
        self, *, forward: DropRule = no_loss, back: DropRule = no_loss, record: bool = False, host: str = "127.0.0.1"
    ):
        self.forward = Direction(forward, record)  # sender proxy -> receiver proxy
        self.back = Direction(back, record)  # receiver proxy -> sender proxy
        self._a = _udp_socket(host)
        self._b = _udp_socket(host)
        self.target: tuple[str, int] | None = None  # the receiver proxy's link address
        self.sender_address: tuple[str, int] | None = None  # learned from the first packet on A
        self.strays = 0  # packets on B not from the target
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="lossy-relay", daemon=True)

    @property
    def address(self) -> tuple[str, int]:
        """Where the sender proxy's link.peer must point."""
        return self._a.getsockname()

    def __enter__(self) -> LossyRelay:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(timeout=2)
        self._a.close()
        self._b.close()

    def _run(self) -> None:
        with selectors.DefaultSelector() as selector:
            selector.register(self._a, selectors.EVENT_READ, self._from_sender)
            selector.register(self._b, selectors.EVENT_READ, self._from_receiver)
            while not self._stop.is_set():
                for key, _ in selector.select(POLL_SECONDS):
                    key.data()

    def _drain(self, sock: socket.socket):
        while True:
            try:
                yield sock.recvfrom(65535)
            except (BlockingIOError, InterruptedError):
                return
            except ConnectionRefusedError:
                continue  # ICMP from an earlier send to a port not yet open

    def _from_sender(self) -> None:
        for data, address in self._drain(self._a):
            self.sender_address = address
            if self.target is None or self.forward.decide(data):
                continue
            _send(self._b, data, self.target)

    def _from_receiver(self) -> None:
        for data, address in self._drain(self._b):
            if address != self.target:
                self.strays += 1
                continue
            if self.back.decide(data) or self.sender_address is None:
                continue
            _send(self._a, data, self.sender_address)


def _send(sock: socket.socket, data: bytes, address) -> None:
    """Best effort, as a link is; a full buffer waits briefly rather than dropping silently."""
    deadline = time.monotonic() + 1.0
    while True:
        try:
            sock.sendto(data, address)
            return
        except BlockingIOError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.0005)
        except ConnectionRefusedError:
            return
