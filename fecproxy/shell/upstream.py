"""The receiver's sockets towards the application server: one per flow, each with a reader task.

One socket per flow, connected to ``forward``, makes the server see each client of the sender as
its own source address and port, and brings the server's replies back already sorted by flow:
whatever arrives on a flow's socket is encoded towards the sender with that flow's id.
"""

from __future__ import annotations

import logging
import socket
from collections import defaultdict
from collections.abc import Awaitable, Callable

import trio

from fecproxy.config.addresses import format_sockaddr
from fecproxy.protocol.events import DropReason
from fecproxy.protocol.flows import FlowTable
from fecproxy.shell.logs import log_event
from fecproxy.shell.udp import Address, DatagramReader, DatagramWriter

# The daemon's logger: these events were always the daemon's, and log filters rely on the name.
log = logging.getLogger("fecproxy.shell.daemon")

#: Replies drained per wake-up on one flow's socket: a request/response server answers in small
#: bursts, and a smaller batch than the link's lets many flows take turns (common practice, no
#: source).
REPLY_BATCH = 64

#: Called with a batch of (reply, flow) and the batch's ``now``: encode and send to the peer.
ReplyHandler = Callable[[list[tuple[bytes, int]], float], Awaitable[None]]


class _Upstream:
    """One flow's socket towards the application server, and the scope of its reader task."""

    __slots__ = ("sock", "writer", "scope")

    def __init__(self, sock: socket.socket, writer: DatagramWriter, scope: trio.CancelScope):
        self.sock, self.writer, self.scope = sock, writer, scope

    def close(self) -> None:
        self.scope.cancel()
        trio.lowlevel.notify_closing(self.sock)
        self.sock.close()


class Upstreams:
    """Every flow's upstream socket.  :meth:`attach` the daemon's nursery before the first
    :meth:`writer_for` (the reader tasks live there, beside the daemon's loops, so stopping the
    daemon ends them too), and :meth:`close_all` when the daemon ends."""

    def __init__(self, forward: Address, flows: FlowTable, on_replies: ReplyHandler):
        self.forward = forward
        self.flows = flows
        self.on_replies = on_replies
        #: Deliveries dropped here, by reason ("flow_limit", "unreachable").
        self.drops: dict[str, int] = defaultdict(int)
        self._by_flow: dict[int, _Upstream] = {}
        self._nursery: trio.Nursery | None = None

    def attach(self, nursery: trio.Nursery) -> None:
        """The nursery that runs the reader tasks of the sockets opened from now on."""
        self._nursery = nursery

    def send_errors(self) -> int:
        return sum(upstream.writer.send_errors for upstream in self._by_flow.values())

    def writer_for(self, flow: int, now: float) -> DatagramWriter | None:
        """The writer of this flow's socket, opened (with its reader task) if new; None when the
        flow table is full or the socket cannot be opened (counted in ``drops``)."""
        entry = self._by_flow.get(flow)
        if entry is not None:
            self.flows.touch(flow, now)
            return entry.writer
        if self.flows.flow_for(flow, now, flow=flow) is None:
            self.drops[DropReason.FLOW_LIMIT] += 1
            return None
        family = socket.AF_INET6 if len(self.forward) == 4 else socket.AF_INET
        sock = socket.socket(family, socket.SOCK_DGRAM)
        try:
            sock.setblocking(False)
            # Connected: the kernel picks the source address towards the server, and only the
            # server's replies are accepted on this socket.
            sock.connect(self.forward)
        except OSError as error:
            sock.close()
            self.flows.remove(flow)
            self.drops[DropReason.UNREACHABLE] += 1
            log_event(log, logging.WARNING, "upstream_failed", forward=format_sockaddr(self.forward), error=str(error))
            return None
        entry = _Upstream(sock, DatagramWriter(sock), trio.CancelScope())
        self._by_flow[flow] = entry
        self._nursery.start_soon(self._read_replies, flow, entry)
        log_event(log, logging.DEBUG, "flow_opened", flow=flow, local=format_sockaddr(sock.getsockname()))
        return entry.writer

    def close(self, flow: int) -> None:
        """Close this flow's socket and end its reader task (the flow expired)."""
        entry = self._by_flow.pop(flow, None)
        if entry is not None:
            entry.close()

    def close_all(self) -> None:
        for entry in self._by_flow.values():
            entry.close()
        self._by_flow.clear()

    async def _read_replies(self, flow: int, upstream: _Upstream) -> None:
        """Replies from the application server on this flow's socket -> the reply handler."""
        with upstream.scope:
            reader = DatagramReader(upstream.sock, batch=REPLY_BATCH, coalesce=True)
            while True:
                batch = await reader.read_batch()
                now = trio.current_time()
                self.flows.touch(flow, now)  # once per batch: every datagram shares this `now`
                await self.on_replies([(data, flow) for data, _ in batch], now)
