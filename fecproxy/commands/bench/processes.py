"""The child processes of ``fecproxy bench pipeline``: generator, sink, plain relays, daemons.

Each runs in its own (spawned) process and talks to the orchestrator over a pipe.  The UDP
socket options (GSO on send, GRO on receive) come from :mod:`fecproxy.shell.udp`, the module
that owns them, so the benchmark uses exactly the daemon's I/O settings.
"""

from __future__ import annotations

import select
import socket
import struct
import sys
import time
from array import array

from fecproxy.shell.udp import SOL_UDP, UDP_GRO, UDP_SEGMENT

#: A typical media/telemetry payload that, with our repair header, symbol prefix and a room for
#: an authentication trailer, stays inside a 1500-byte Ethernet MTU.
DATAGRAM_BYTES = 1200
#: Payload header: trial id, sequence number, send time in ns of CLOCK_MONOTONIC.
PAYLOAD_HEADER = struct.Struct("=IIq")
#: Datagrams per generator send: one GSO sendmsg carries at most 64 segments and 65 507 bytes
#: (linux/udp.h), so 50 × 1200 = 60 000 bytes fits both.
GENERATOR_BATCH = 50
#: The generator wakes at most this often and sends whatever is due: 0.5 ms keeps batches at
#: ≤ 50 datagrams up to 100 000/s, without a busy loop stealing a core from the relays.
PACING_TICK_S = 0.0005
#: Socket buffers of every process: the kernel's default net.core.rmem_max here (4 MiB), which
#: absorbs ~30 ms of 1200-byte datagrams at 100 000/s, so a scheduling hiccup is not a loss.
SOCKET_BUFFER_BYTES = 4 * 1024 * 1024
#: The sink reads with UDP_GRO, so a relay's GSO burst arrives as one buffer: the measuring
#: end then costs little CPU on a 2-core box.  Largest coalesced buffer is one UDP payload.
SINK_BUFFER_BYTES = 65535


def _buffered_socket(host: str = "127.0.0.1", port: int = 0, *, blocking: bool) -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, SOCKET_BUFFER_BYTES)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, SOCKET_BUFFER_BYTES)
    sock.bind((host, port))
    sock.setblocking(blocking)
    return sock


def generator_main(conn) -> None:
    """Send paced batches on command: ("run", target, rate, count, trial) -> (sent, seconds)."""
    sock = _buffered_socket(blocking=True)
    buffer = bytearray(GENERATOR_BATCH * DATAGRAM_BYTES)
    view = memoryview(buffer)
    control = [(SOL_UDP, UDP_SEGMENT, struct.pack("=H", DATAGRAM_BYTES))]
    gso = True
    pack_into = PAYLOAD_HEADER.pack_into
    monotonic_ns = time.monotonic_ns
    conn.send("ready")
    while True:
        command = conn.recv()
        if command is None:
            return
        _, target, rate, count, trial = command
        sent = 0
        start = time.monotonic()
        while sent < count:
            now = time.monotonic()
            due = min(count, int((now - start) * rate) + 1)
            while sent < due:
                n = min(due - sent, GENERATOR_BATCH)
                stamp = monotonic_ns()
                for i in range(n):
                    pack_into(buffer, i * DATAGRAM_BYTES, trial, sent + i, stamp)
                if n > 1 and gso:
                    try:
                        sock.sendmsg([view[: n * DATAGRAM_BYTES]], control, 0, target)
                    except OSError:
                        gso = False  # no UDP_SEGMENT here: one sendto per datagram below
                if n == 1 or not gso:
                    for i in range(n):
                        sock.sendto(view[i * DATAGRAM_BYTES : (i + 1) * DATAGRAM_BYTES], target)
                sent += n
            if sent < count:
                next_due = start + sent / rate
                time.sleep(max(next_due - time.monotonic(), PACING_TICK_S))
        conn.send((sent, time.monotonic() - start))


def sink_main(conn) -> None:
    """Count a trial's datagrams exactly.

    ("begin", trial, count, keep_delays) -> "ok"; ("end",) -> dict of counts (and delays).
    """
    sock = _buffered_socket(blocking=False)
    try:
        sock.setsockopt(SOL_UDP, UDP_GRO, 1)
    except OSError:
        pass  # no GRO: one datagram per read, still exact
    buffer = bytearray(SINK_BUFFER_BYTES)
    ancillary = socket.CMSG_SPACE(4)
    unpack_from = PAYLOAD_HEADER.unpack_from
    monotonic_ns = time.monotonic_ns
    trial = -1
    count = 0
    seen = bytearray()
    received = duplicates = strays = 0
    delays: array | None = None
    conn.send(sock.getsockname())
    while True:
        try:
            size, ancdata, _, _ = sock.recvmsg_into([buffer], ancillary)
        except BlockingIOError:
            readable, _, _ = select.select([sock, conn], [], [], 1.0)
            if conn not in readable:
                continue
            command = conn.recv()
            if command is None:
                return
            if command[0] == "begin":
                _, trial, count, keep = command
                seen = bytearray(count)
                received = duplicates = strays = 0
                delays = array("q") if keep else None
                conn.send("ok")
            else:
                conn.send(
                    dict(
                        received=received,
                        duplicates=duplicates,
                        strays=strays,
                        delays=delays.tobytes() if delays is not None else None,
                    )
                )
                trial = -1
            continue
        arrived = monotonic_ns()
        segment = size
        for level, kind, data in ancdata:
            if level == SOL_UDP and kind == UDP_GRO:
                segment = int.from_bytes(data[:4], sys.byteorder)
        for offset in range(0, size, segment or size):
            if size - offset < PAYLOAD_HEADER.size:
                strays += 1
                continue
            their_trial, sequence, stamp = unpack_from(buffer, offset)
            if their_trial != trial or sequence >= count:
                strays += 1  # late datagrams of an earlier trial, or foreign traffic
                continue
            if seen[sequence]:
                duplicates += 1
                continue
            seen[sequence] = 1
            received += 1
            if delays is not None:
                delays.append(arrived - stamp)


def link_channel(loss: float, burst: float | None):
    """The loss model of the impaired link: independent loss, or Gilbert bursts of mean length B."""
    from fecproxy.linkmodel.loss_models import GilbertElliott

    return GilbertElliott.bernoulli(loss) if burst is None else GilbertElliott.from_loss_burst(loss, burst)


def relay_main(conn, forward: tuple, impairment: tuple | None = None) -> None:
    """A relay: the same reader/writer as the daemon, no FEC.  Stops on SIGTERM.

    Both plain relays read with UDP GRO (``coalesce=True``), as the daemon reads its application
    and link sockets, so both pipelines use the same I/O.  With ``impairment = (loss, burst,
    seed)`` the relay is the lossy link between the pair's sender and receiver: every datagram
    goes through the sans-IO link model of :mod:`fecproxy.linkmodel.impairment` (seeded, loss
    only, no delay), so the pair meets a reproducible loss pattern at any rate.
    """
    import trio

    from fecproxy.shell.udp import DatagramReader, DatagramWriter, open_udp_socket

    link = None
    if impairment is not None:
        from fecproxy.linkmodel.impairment import ImpairedLink, LinkImpairment

        loss, burst, seed = impairment
        link = ImpairedLink(LinkImpairment(loss=link_channel(loss, burst)), seed=seed, start=time.monotonic())

    async def relay() -> None:
        buffers = SOCKET_BUFFER_BYTES
        inbound = open_udp_socket("127.0.0.1", 0, receive_buffer=buffers, send_buffer=buffers)
        outbound = open_udp_socket("127.0.0.1", 0, receive_buffer=buffers, send_buffer=buffers)
        reader, writer = DatagramReader(inbound, coalesce=True), DatagramWriter(outbound)
        conn.send(inbound.getsockname())
        while True:
            batch = await reader.read_batch()
            if link is None:
                await writer.send([data for data, _ in batch], forward)
                continue
            now = time.monotonic()
            for data, _ in batch:
                link.submit(data, now)
            passed = link.due(now)  # no delay configured: what survived is due at once
            if passed:
                await writer.send(passed, forward)

    try:
        trio.run(relay)
    except KeyboardInterrupt:
        pass


def daemon_main(conn, document: dict, key_dir: str | None = None) -> None:
    """One fecproxy daemon from a config document (key files, if any, relative to ``key_dir``);
    reports (link, listen) addresses."""
    import logging
    from pathlib import Path

    import trio

    from fecproxy.config import parse_config
    from fecproxy.config.loading import load_keys
    from fecproxy.shell.daemon import Daemon

    logging.basicConfig(level=logging.WARNING, stream=sys.stderr)
    config = parse_config(document, "<bench>")
    if key_dir is not None:
        config = load_keys(config, "<bench>", Path(key_dir))
    daemon = Daemon(config, handle_signals=True)

    async def run() -> None:
        async with trio.open_nursery() as nursery:
            await nursery.start(daemon.run)
            conn.send((daemon.link_address, daemon.listen_address))

    try:
        trio.run(run)
    except KeyboardInterrupt:
        pass
