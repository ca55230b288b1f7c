"""UDP sockets for the trio shell, on the fast path measured for this project.

One ``await sock.recv()`` per datagram caps near 30 k datagrams/s here; a non-blocking stdlib
socket awaited with ``trio.lowlevel.wait_readable`` and drained with ``recvfrom_into`` into
preallocated buffers until ``BlockingIOError`` reaches about 100 k/s.  Runs of equal-size packets
to one destination (a block's repair packets, or a burst of same-size datagrams) go out in one
``sendmsg`` with Linux UDP GSO (``UDP_SEGMENT``); where the kernel lacks it we fall back to one
``sendto`` per packet and remember not to try again.
"""

from __future__ import annotations

import errno
import logging
import socket
import struct

import trio

log = logging.getLogger("fecproxy.udp")

#: linux/udp.h: setsockopt level SOL_UDP, option UDP_SEGMENT (Linux ≥ 4.18).
SOL_UDP = getattr(socket, "SOL_UDP", 17)
UDP_SEGMENT = getattr(socket, "UDP_SEGMENT", 103)
#: The kernel accepts at most 64 segments per GSO send (UDP_MAX_SEGMENTS in linux/udp.h).
GSO_MAX_SEGMENTS = 64
#: A GSO send is one UDP datagram to the kernel, so its total is bounded by 65 507 bytes.
GSO_MAX_BYTES = 65507
#: Datagrams drained per wake-up before yielding to other tasks, so one busy socket cannot
#: starve the timers (common practice, no source).
RECV_BATCH = 256
#: Largest UDP payload; receive buffers are this size so nothing is ever truncated silently.
MAX_UDP_PAYLOAD = 65535

Address = tuple  # (host, port) or (host, port, flowinfo, scope_id)


def open_udp_socket(host: str, port: int, *, receive_buffer: int = 0, send_buffer: int = 0) -> socket.socket:
    """A bound, non-blocking UDP socket; family chosen from the address."""
    infos = socket.getaddrinfo(host, port, type=socket.SOCK_DGRAM, flags=socket.AI_PASSIVE)
    family, _, _, _, sockaddr = infos[0]
    sock = socket.socket(family, socket.SOCK_DGRAM)
    try:
        if receive_buffer:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, receive_buffer)
        if send_buffer:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, send_buffer)
        sock.bind(sockaddr)
        sock.setblocking(False)
    except BaseException:
        sock.close()
        raise
    return sock


def resolve(host: str, port: int, family: int = 0) -> Address:
    infos = socket.getaddrinfo(host, port, family=family, type=socket.SOCK_DGRAM)
    return infos[0][4]


class DatagramReader:
    """Drains a socket in batches into preallocated buffers: no allocation per wake-up."""

    def __init__(self, sock: socket.socket, batch: int = RECV_BATCH, size: int = MAX_UDP_PAYLOAD):
        self.sock = sock
        self._buffers = [bytearray(size) for _ in range(batch)]
        self._views = [memoryview(b) for b in self._buffers]

    async def read_batch(self) -> list[tuple[bytes, Address]]:
        """Wait until readable, then return every datagram queued (up to the batch size)."""
        sock = self.sock
        out: list[tuple[bytes, Address]] = []
        while True:
            for view in self._views:
                try:
                    size, address = sock.recvfrom_into(view)
                except BlockingIOError:
                    break
                except ConnectionRefusedError:
                    # An ICMP port-unreachable from an earlier send: the peer is not up yet.
                    continue
                out.append((view[:size].tobytes(), address))
            if out:
                return out
            await trio.lowlevel.wait_readable(sock)


class DatagramWriter:
    """Sends lists of packets to one address, grouping equal sizes into GSO sends."""

    gso_supported: bool | None = None  # process-wide: None = not tried yet

    def __init__(self, sock: socket.socket):
        self.sock = sock
        self.send_errors = 0

    async def send(self, packets: list[bytes], address: Address) -> None:
        if not packets:
            return
        if DatagramWriter.gso_supported is not False and len(packets) > 1:
            await self._send_gso(packets, address)
        else:
            for data in packets:
                await self._sendto(data, address)

    async def _sendto(self, data: bytes, address: Address) -> None:
        while True:
            try:
                self.sock.sendto(data, address)
                return
            except BlockingIOError:
                await trio.lowlevel.wait_writable(self.sock)
            except OSError as error:
                # Unreachable peer, refused port, no route: UDP is best effort; count and go on.
                self.send_errors += 1
                log.debug("event=send_error address=%s error=%s", address, error)
                return

    async def _send_gso(self, packets: list[bytes], address: Address) -> None:
        start = 0
        count = len(packets)
        while start < count:
            size = len(packets[start])
            end = start + 1
            total = size
            while (
                end < count
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

    async def _sendmsg_gso(self, run: list[bytes], segment: int, address: Address) -> bool:
        control = [(SOL_UDP, UDP_SEGMENT, struct.pack("=H", segment))]
        while True:
            try:
                self.sock.sendmsg([b"".join(run)], control, 0, address)
                DatagramWriter.gso_supported = True
                return True
            except BlockingIOError:
                await trio.lowlevel.wait_writable(self.sock)
            except OSError as error:
                if error.errno in (errno.EINVAL, errno.ENOPROTOOPT, errno.EOPNOTSUPP, errno.EIO, errno.EMSGSIZE):
                    if DatagramWriter.gso_supported is None:
                        log.info("event=gso_unavailable error=%s fallback=sendto", error)
                        DatagramWriter.gso_supported = False
                    return False
                self.send_errors += 1
                log.debug("event=send_error address=%s error=%s", address, error)
                return True
