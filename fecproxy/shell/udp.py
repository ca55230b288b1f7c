"""UDP sockets for the trio shell, on the fast path measured for this project.

One ``await sock.recv()`` per datagram caps near 30 k datagrams/s here; a non-blocking stdlib
socket awaited with ``trio.lowlevel.wait_readable`` and drained with ``recvfrom_into`` into
preallocated buffers until ``BlockingIOError`` reaches about 100 k/s.  Runs of equal-size packets
to one destination (a block's repair packets, or a burst of same-size datagrams) go out in one
``sendmsg`` with Linux UDP GSO (``UDP_SEGMENT``); where the kernel lacks it we fall back to one
``sendto`` per packet and remember not to try again.  The reader can also ask for UDP GRO
(``UDP_GRO``), so such a burst arrives as one buffer: one system call, one kernel queue entry and
one source address conversion for the whole burst instead of one per datagram.  The kernel
merges only equal-size datagrams of one flow (same addresses and ports) and reports the size, so
the split back into datagrams is exact; a peer that sends singly costs about what a plain read
costs.

This module is the one owner of the GSO/GRO socket options: other code that sends or reads
coalesced datagrams uses :func:`gso_control`, :func:`enable_coalescing`, :data:`GRO_CMSG_SPACE`,
:func:`gro_segment_size` and :func:`split_coalesced` from here.
"""

from __future__ import annotations

import errno
import logging
import socket
import struct
import sys
import time

import trio

from fecproxy.config.addresses import format_sockaddr
from fecproxy.protocol.events import SockAddr
from fecproxy.shell.logs import log_event

log = logging.getLogger("fecproxy.shell.udp")

#: linux/udp.h: setsockopt level SOL_UDP, option UDP_SEGMENT (Linux ≥ 4.18); the fallbacks hold
#: where Python's socket module lacks the names.
SOL_UDP = getattr(socket, "SOL_UDP", 17)
UDP_SEGMENT = getattr(socket, "UDP_SEGMENT", 103)
#: linux/udp.h: UDP_GRO (Linux ≥ 5.0); the segment size comes back as an int in a cmsg.
UDP_GRO = getattr(socket, "UDP_GRO", 104)
_GRO_SEGMENT = struct.Struct("=i")
_GSO_SEGMENT = struct.Struct("=H")
#: Ancillary buffer size to pass to ``recvmsg``/``recvmsg_into`` on a GRO socket.
GRO_CMSG_SPACE = socket.CMSG_SPACE(_GRO_SEGMENT.size)
#: Segments per GSO send.  The kernel's limit is UDP_MAX_SEGMENTS (include/linux/udp.h): 64 in
#: the kernels GSO first shipped in, 128 in recent ones (this machine's 6.18 accepts 128 and
#: refuses 129, measured).  64 is accepted everywhere, and a run of 64 already amortises the
#: system call.
GSO_MAX_SEGMENTS = 64
#: A GSO send is one UDP datagram to the kernel, so its total is bounded by the largest IPv4 UDP
#: payload, 65 535 − 20 (IPv4 header) − 8 (UDP header) = 65 507 bytes.
GSO_MAX_BYTES = 65507
#: Datagrams drained per wake-up before yielding to other tasks, so one busy socket cannot
#: starve the timers (common practice, no source).
RECV_BATCH = 256
#: Receive buffer size: 65 535 bytes, the most a 16-bit IP or UDP length field can describe, so
#: every datagram (at most 65 507 bytes of payload over IPv4, 65 527 over IPv6) and every
#: coalesced GRO buffer fits and nothing is ever truncated silently.
MAX_UDP_PAYLOAD = 65535


#: socket(7): Linux doubles the SO_RCVBUF/SO_SNDBUF value set (room for its bookkeeping) and
#: getsockopt reports the doubled figure; other systems report what was set.
BUFFER_REPORT_FACTOR = 2 if sys.platform.startswith("linux") else 1
#: (option, config key, the Linux sysctl that caps an unprivileged request) per buffer.
_BUFFERS = {
    "receive": (socket.SO_RCVBUF, "sockets.receive_buffer_bytes", "net.core.rmem_max"),
    "send": (socket.SO_SNDBUF, "sockets.send_buffer_bytes", "net.core.wmem_max"),
}
#: Buffer kinds already reported as capped: every socket of a daemon asks the same sizes, so
#: one line per kind says it all (a receiver opens a socket per flow).
_reported_caps: set[str] = set()


def granted_buffer(sock: socket.socket, kind: str) -> int:
    """The buffer the kernel actually gave (``kind`` "receive" or "send"), in the units asked."""
    return sock.getsockopt(socket.SOL_SOCKET, _BUFFERS[kind][0]) // BUFFER_REPORT_FACTOR


def _set_buffer(sock: socket.socket, kind: str, size: int, purpose: str) -> None:
    """Ask for a buffer, read back what was granted, and say once when the kernel capped it."""
    option, key, sysctl = _BUFFERS[kind]
    sock.setsockopt(socket.SOL_SOCKET, option, size)
    granted = granted_buffer(sock, kind)
    if granted < size and kind not in _reported_caps:
        _reported_caps.add(kind)
        log_event(
            log,
            logging.WARNING,
            "socket_buffer_capped",
            socket=purpose,
            key=key,
            asked=size,
            granted=granted,
            fix=f"raise {sysctl} to at least {size} (sysctl -w {sysctl}={size}) or lower {key}",
        )


def open_udp_socket(
    host: str, port: int, *, receive_buffer: int = 0, send_buffer: int = 0, purpose: str = "socket"
) -> socket.socket:
    """A bound, non-blocking UDP socket; family chosen from the address.

    Buffer sizes of 0 keep the OS default; others are read back after setting, and a size the
    kernel capped is logged once per kind (``purpose`` names the socket, e.g. its config key).
    """
    infos = socket.getaddrinfo(host, port, type=socket.SOCK_DGRAM, flags=socket.AI_PASSIVE)
    family, _, _, _, sockaddr = infos[0]
    sock = socket.socket(family, socket.SOCK_DGRAM)
    try:
        if receive_buffer:
            _set_buffer(sock, "receive", receive_buffer, purpose)
        if send_buffer:
            _set_buffer(sock, "send", send_buffer, purpose)
        sock.bind(sockaddr)
        sock.setblocking(False)
    except BaseException:
        sock.close()
        raise
    return sock


def resolve(host: str, port: int, family: int = 0) -> SockAddr:
    infos = socket.getaddrinfo(host, port, family=family, type=socket.SOCK_DGRAM)
    return infos[0][4]


def gso_control(segment: int) -> list[tuple[int, int, bytes]]:
    """The ``sendmsg`` ancillary data that makes the kernel split one buffer into datagrams of
    ``segment`` bytes each (the last may be shorter)."""
    return [(SOL_UDP, UDP_SEGMENT, _GSO_SEGMENT.pack(segment))]


def gro_segment_size(ancillary: list, size: int) -> int:
    """The segment size of a ``recvmsg`` read of ``size`` bytes on a GRO socket: the size the
    kernel reported in ``ancillary``, or ``size`` when the read was not coalesced."""
    for level, kind, data in ancillary:
        if level == SOL_UDP and kind == UDP_GRO and len(data) >= _GRO_SEGMENT.size:
            return _GRO_SEGMENT.unpack_from(data)[0] or size
    return size


def split_coalesced(data: bytes, segment: int) -> list[bytes]:
    """A coalesced GRO read back as its datagrams: ``segment`` bytes each, the last possibly
    shorter (the kernel merges only equal-size datagrams, except for a shorter last one)."""
    if segment >= len(data) or segment <= 0:
        return [data]
    return [data[start : start + segment] for start in range(0, len(data), segment)]


def enable_coalescing(sock: socket.socket) -> bool:
    """Ask the kernel for UDP GRO on this socket (Linux ≥ 5.0): a burst sent with GSO, or
    consecutive equal-size datagrams of one flow, then arrives as one buffer plus its segment
    size, so one system call reads many datagrams.  False where the kernel lacks it."""
    try:
        sock.setsockopt(SOL_UDP, UDP_GRO, 1)
    except OSError:
        return False
    return True


class DatagramReader:
    """Drains a socket in batches through one preallocated buffer: each datagram is copied out
    as ``bytes`` at once, so a single buffer serves the whole batch.

    ``coalesce=True`` turns on UDP GRO (:func:`enable_coalescing`) and splits coalesced buffers
    back into datagrams.  The daemon uses it on every socket: measured with the pipeline
    benchmark, a sender's application socket fed by a GSO client cost ~1 µs less per datagram
    (one read and one address conversion per burst instead of per datagram).
    """

    def __init__(
        self, sock: socket.socket, batch: int = RECV_BATCH, size: int = MAX_UDP_PAYLOAD, *, coalesce: bool = False
    ):
        self.sock = sock
        self.batch = batch
        self._view = memoryview(bytearray(size))
        self.coalescing = coalesce and enable_coalescing(sock)

    async def read_batch(self) -> list[tuple[bytes, SockAddr]]:
        """Wait until readable, then return every datagram queued (up to about the batch size).

        Every call lets other tasks run at least once, even when the socket never empties:
        a busy socket must not starve the timers, the other direction or signal handling.
        """
        out: list[tuple[bytes, SockAddr]] = []
        waited = False
        while True:
            if self.coalescing:
                self._drain_coalesced(out)
            else:
                self._drain(out)
            if out:
                if not waited:
                    await trio.lowlevel.checkpoint()
                return out
            await trio.lowlevel.wait_readable(self.sock)
            waited = True

    def _drain(self, out: list) -> None:
        receive, view, append = self.sock.recvfrom_into, self._view, out.append
        for _ in range(self.batch):
            try:
                size, address = receive(view)
            except BlockingIOError:
                return
            except ConnectionRefusedError:
                # An ICMP port-unreachable from an earlier send: the peer is not up yet.
                continue
            append((view[:size].tobytes(), address))

    def _drain_coalesced(self, out: list) -> None:
        receive, view, append = self.sock.recvmsg_into, self._view, out.append
        buffers = [view]
        while len(out) < self.batch:
            try:
                size, ancillary, _, address = receive(buffers, GRO_CMSG_SPACE)
            except BlockingIOError:
                return
            except ConnectionRefusedError:
                continue
            data = view[:size].tobytes()
            segment = gro_segment_size(ancillary, size) if ancillary else size
            if segment >= size:
                append((data, address))
                continue
            for piece in split_coalesced(data, segment):  # one copy out, then bytes slices
                append((piece, address))


#: Seconds between two log lines about failed sends to one address (e.g. the forward address
#: answering ICMP port-unreachable): one line a minute says it without flooding the journal; the
#: fecproxy_send_errors counter carries the rate.
SEND_ERROR_LOG_INTERVAL_S = 60.0
#: Addresses remembered for that rate limit; beyond this the memory starts afresh.
_SEND_ERROR_MEMORY = 1024
_send_error_logged: dict[str, tuple[float, int]] = {}


def _note_send_error(address: SockAddr, error: OSError) -> None:
    """A WARNING line per address at most once per SEND_ERROR_LOG_INTERVAL_S, with the count of
    failures not logged since; each failure is counted by the writer either way."""
    shown = format_sockaddr(address)
    now = time.monotonic()
    last, suppressed = _send_error_logged.get(shown, (None, 0))
    if last is not None and now - last < SEND_ERROR_LOG_INTERVAL_S:
        _send_error_logged[shown] = (last, suppressed + 1)
        return
    if len(_send_error_logged) >= _SEND_ERROR_MEMORY:
        _send_error_logged.clear()
    _send_error_logged[shown] = (now, 0)
    log_event(log, logging.WARNING, "send_failed", address=shown, error=str(error), more_since_last=suppressed)


class DatagramWriter:
    """Sends lists of packets to one address, grouping equal sizes into GSO sends."""

    gso_supported: bool | None = None  # process-wide: None = not tried yet

    def __init__(self, sock: socket.socket):
        self.sock = sock
        self.send_errors = 0
        self._wait_lock = trio.Lock()

    async def _wait_writable(self) -> None:
        """Wait for send-buffer space.  Several tasks share a writer (the receiver's timer and
        its per-flow reply tasks all send on the link socket), and trio allows only one waiter
        per socket, so the others queue on a lock instead of raising BusyResourceError."""
        async with self._wait_lock:
            await trio.lowlevel.wait_writable(self.sock)

    async def send(self, packets: list[bytes], address: SockAddr) -> None:
        if not packets:
            return
        if DatagramWriter.gso_supported is not False and len(packets) > 1:
            await self._send_gso(packets, address)
        else:
            for data in packets:
                await self._sendto(data, address)

    async def _sendto(self, data: bytes, address: SockAddr) -> None:
        while True:
            try:
                self.sock.sendto(data, address)
                return
            except BlockingIOError:
                await self._wait_writable()
            except OSError as error:
                # Unreachable peer, refused port, no route: UDP is best effort; count and go on.
                self.send_errors += 1
                _note_send_error(address, error)
                return

    async def _send_gso(self, packets: list[bytes], address: SockAddr) -> None:
        start = 0
        count = len(packets)
        while start < count:
            size = len(packets[start])
            end = start + 1
            total = size
            while (
                size  # a GSO segment size of 0 would merge empty datagrams into one: send them singly
                and end < count
                and len(packets[end]) == size
                and end - start < GSO_MAX_SEGMENTS
                and total + size <= GSO_MAX_BYTES
            ):
                total += size
                end += 1
            if end - start == 1:
                await self._sendto(packets[start], address)
            elif not await self._sendmsg_gso(packets[start:end], size, address):
                for data in packets[start:end]:
                    await self._sendto(data, address)
            start = end

    async def _sendmsg_gso(self, run: list[bytes], segment: int, address: SockAddr) -> bool:
        control = gso_control(segment)
        while True:
            try:
                self.sock.sendmsg([b"".join(run)], control, 0, address)
                DatagramWriter.gso_supported = True
                return True
            except BlockingIOError:
                await self._wait_writable()
            except OSError as error:
                if error.errno in (errno.EINVAL, errno.ENOPROTOOPT, errno.EOPNOTSUPP, errno.EIO, errno.EMSGSIZE):
                    if DatagramWriter.gso_supported is None:
                        log_event(log, logging.INFO, "gso_unavailable", error=str(error), fallback="sendto")
                        DatagramWriter.gso_supported = False
                    return False
                self.send_errors += 1
                _note_send_error(address, error)
                return True
