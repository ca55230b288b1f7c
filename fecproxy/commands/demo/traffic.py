"""The demo's application traffic: a weather station's datagrams, the station itself and its server.

Why a module of its own: the demo measures loss, integrity and delay at the application, not from
the daemons' counters, so the datagram format (stream, sequence number, send time, checksum) and
the two endpoints that speak it are the demo's yardstick and are tested as such.  The scenario
and every figure here are invented for the demo; none is a measurement.
"""

from __future__ import annotations

import hashlib
import math
import struct
from array import array
from collections.abc import Container
from dataclasses import dataclass

import numpy as np
import trio

#: Sensor readings per second, each one datagram of 100–300 bytes (invented).
DEFAULT_TELEMETRY_RATE = 20.0
TELEMETRY_BYTES = (100, 300)
#: A camera still of 60 KB every 5 s, cut into 1200-byte datagrams (invented); 1200 stays under
#: the daemon's default max_datagram_bytes of 1400.
CAMERA_IMAGE_BYTES = 60_000
CAMERA_CHUNK_BYTES = 1200
CAMERA_INTERVAL_S = 5.0
#: First still soon after start, so even a 3-second run carries one.
CAMERA_FIRST_S = 0.5
#: Chunks are paced like a ~1 Mbit/s radio modem would (invented), not fired in one burst.
CAMERA_CHUNK_RATE = 100.0
#: The sink acknowledges each stream this often, so the reply path through the pair is exercised.
ACK_INTERVAL_S = 0.5

# --------------------------------------------------------------------------------------------
# The application datagram: stream, sequence number, send time, body, checksum.
# --------------------------------------------------------------------------------------------

STREAM_TELEMETRY = 1
STREAM_CAMERA = 2
STREAM_ACK = 3
STREAM_NAMES = {STREAM_TELEMETRY: "telemetry", STREAM_CAMERA: "camera", STREAM_ACK: "ack"}

APP_HEADER = struct.Struct(">BId")  # stream, sequence number, send time (trio clock, seconds)
CHECKSUM_BYTES = 8  # BLAKE2b-64: a corrupted datagram slipping through is ~2^-64 per datagram
APP_OVERHEAD_BYTES = APP_HEADER.size + CHECKSUM_BYTES
CAMERA_CHUNK_HEADER = struct.Struct(">IHH")  # image number, chunk index, chunk count
ACK_BODY = struct.Struct(">BI")  # acknowledged stream, highest sequence number received


def _checksum(data: bytes | memoryview) -> bytes:
    return hashlib.blake2b(data, digest_size=CHECKSUM_BYTES).digest()


def pack_datagram(stream: int, seq: int, sent: float, body: bytes) -> bytes:
    """One application datagram; the checksum covers header and body."""
    head = APP_HEADER.pack(stream, seq, sent) + body
    return head + _checksum(head)


@dataclass(frozen=True, slots=True)
class AppDatagram:
    stream: int
    seq: int
    sent: float
    body: bytes


def unpack_datagram(data: bytes) -> AppDatagram | None:
    """The datagram, or None when it is too short, unknown or fails its checksum (= corrupted)."""
    if len(data) < APP_OVERHEAD_BYTES:
        return None
    head, digest = data[:-CHECKSUM_BYTES], data[-CHECKSUM_BYTES:]
    if _checksum(head) != digest:
        return None
    stream, seq, sent = APP_HEADER.unpack_from(head)
    if stream not in STREAM_NAMES:
        return None
    return AppDatagram(stream, seq, sent, bytes(head[APP_HEADER.size :]))


def peek_id(data: bytes | memoryview) -> tuple[int, int] | None:
    """(stream, seq) of a datagram without checking it: the tap's cheap look inside a packet."""
    if len(data) < APP_HEADER.size:
        return None
    stream, seq, _ = APP_HEADER.unpack_from(data)
    return stream, seq


def camera_chunks(image_number: int, image: bytes, chunk_bytes: int = CAMERA_CHUNK_BYTES) -> list[bytes]:
    """Bodies of one still's datagrams: a small header each, then up to the chunk size of image."""
    room = chunk_bytes - APP_OVERHEAD_BYTES - CAMERA_CHUNK_HEADER.size
    count = max(1, math.ceil(len(image) / room))
    return [CAMERA_CHUNK_HEADER.pack(image_number, i, count) + image[i * room : (i + 1) * room] for i in range(count)]


# --------------------------------------------------------------------------------------------
# The endpoints
# --------------------------------------------------------------------------------------------


class SeqSet:
    """Which sequence numbers of one stream were seen: a growing bitmap, one bit per datagram."""

    def __init__(self) -> None:
        self._bits = bytearray()
        self.count = 0

    def add(self, seq: int) -> bool:
        """Record seq; False when it was already there (a duplicate)."""
        byte, bit = divmod(seq, 8)
        if byte >= len(self._bits):
            self._bits.extend(bytes(byte + 1 - len(self._bits) + 1024))
        if self._bits[byte] >> bit & 1:
            return False
        self._bits[byte] |= 1 << bit
        self.count += 1
        return True

    def __contains__(self, seq: int) -> bool:
        byte, bit = divmod(seq, 8)
        return byte < len(self._bits) and bool(self._bits[byte] >> bit & 1)


class Station:
    """The weather station: telemetry at a steady rate and a camera still every few seconds."""

    def __init__(self, rate: float, seed: int) -> None:
        self.rate = rate
        self.rng = np.random.default_rng(seed)
        self.seq = {STREAM_TELEMETRY: 0, STREAM_CAMERA: 0}
        self.bytes = 0
        self.images_sent = 0
        self.image_chunks: dict[int, range] = {}  # image number -> its camera sequence numbers
        self.acks = 0
        self.corrupted_acks = 0

    @property
    def sent(self) -> int:
        return sum(self.seq.values())

    async def _send(self, sock, stream: int, body: bytes, address) -> None:
        data = pack_datagram(stream, self.seq[stream], trio.current_time(), body)
        await sock.sendto(data, address)
        self.seq[stream] += 1
        self.bytes += len(data)

    async def telemetry(self, sock, address) -> None:
        low, high = TELEMETRY_BYTES
        interval = 1.0 / self.rate
        next_send = trio.current_time()
        while True:
            size = int(self.rng.integers(low, high + 1))
            await self._send(sock, STREAM_TELEMETRY, self.rng.bytes(size - APP_OVERHEAD_BYTES), address)
            next_send += interval
            await trio.sleep_until(next_send)

    async def camera(self, sock, address) -> None:
        start = trio.current_time() + CAMERA_FIRST_S
        image_number = 0
        while True:
            await trio.sleep_until(start + image_number * CAMERA_INTERVAL_S)
            chunks = camera_chunks(image_number, self.rng.bytes(CAMERA_IMAGE_BYTES))
            first = self.seq[STREAM_CAMERA]
            next_send = trio.current_time()
            for body in chunks:
                await self._send(sock, STREAM_CAMERA, body, address)
                next_send += 1.0 / CAMERA_CHUNK_RATE
                await trio.sleep_until(next_send)
            self.image_chunks[image_number] = range(first, first + len(chunks))
            self.images_sent += 1
            image_number += 1

    async def receive_acks(self, sock) -> None:
        while True:
            data, _ = await sock.recvfrom(65536)
            datagram = unpack_datagram(data)
            if datagram is None or datagram.stream != STREAM_ACK:
                self.corrupted_acks += 1
            else:
                self.acks += 1


class Sink:
    """The station's server: checks every datagram, measures delay, acknowledges each stream."""

    def __init__(self, lost_on_link: Container[tuple[int, int]] = frozenset()) -> None:
        #: (stream, seq) of datagrams whose source packet the link lost (the tap's live set): an
        #: arrival among them was rebuilt by the receiver, which the sink times separately.
        self.lost_on_link = lost_on_link
        self.seen = {STREAM_TELEMETRY: SeqSet(), STREAM_CAMERA: SeqSet()}
        self.corrupted = 0
        self.duplicates = 0
        self.intact_delays = array("d")
        self.rebuilt_delays = array("d")
        self.recent_delays: list[float] = []  # since the live view last looked
        self.arrivals = 0
        self.reply_to: dict[int, tuple] = {}
        self.acks_sent = 0

    @property
    def delivered(self) -> int:
        return sum(s.count for s in self.seen.values())

    async def receive(self, sock) -> None:
        while True:
            data, address = await sock.recvfrom(65536)
            now = trio.current_time()
            datagram = unpack_datagram(data)
            if datagram is None or datagram.stream not in self.seen:
                self.corrupted += 1
                continue
            if not self.seen[datagram.stream].add(datagram.seq):
                self.duplicates += 1
                continue
            self.arrivals += 1
            self.reply_to[datagram.stream] = address
            delay = now - datagram.sent
            self.recent_delays.append(delay)
            if (datagram.stream, datagram.seq) in self.lost_on_link:
                self.rebuilt_delays.append(delay)
            else:
                self.intact_delays.append(delay)

    async def acknowledge(self, sock) -> None:
        """Every ACK_INTERVAL_S, one small datagram per stream back to where it came from."""
        while True:
            await trio.sleep(ACK_INTERVAL_S)
            for stream, address in list(self.reply_to.items()):
                body = ACK_BODY.pack(stream, self.seen[stream].count)
                await sock.sendto(pack_datagram(STREAM_ACK, self.acks_sent, trio.current_time(), body), address)
                self.acks_sent += 1
