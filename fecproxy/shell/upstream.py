"""The receiver's sockets towards the application server: one per conversation, each with a reader.

One socket per flow, connected to ``forward``, makes the server see each client of the sender as
its own source address and port, and brings the server's replies back already sorted by flow:
whatever arrives on a flow's socket is encoded towards the sender with that flow's id.

The flow table (``protocol.flows.PeerFlowTable``) decides, per datagram from the link, whether it
belongs to the conversation a slot holds (its socket), to a new one (a fresh socket, after closing
the sockets of the conversations it ends: a replaced generation of the slot, or the least recently
active flow recycled to make room), or to a finished one (dropped, ``unknown_flow``).  A fresh
socket per new generation means the server never sees two clients on one source port, and a late
reply to the old client arrives on a closed socket and reaches nobody.
"""

from __future__ import annotations

import errno
import logging
import socket
from collections import defaultdict
from collections.abc import Awaitable, Callable, Iterable

import trio

from fecproxy.config.addresses import format_sockaddr
from fecproxy.protocol.events import DropReason, SockAddr
from fecproxy.protocol.flows import FlowClosed, Opened, PeerFlowTable, Verdict
from fecproxy.shell.fdlimit import flow_socket_budget
from fecproxy.shell.logs import log_event
from fecproxy.shell.udp import DatagramReader, DatagramWriter

# The daemon's logger: these events were always the daemon's, and log filters rely on the name.
log = logging.getLogger("fecproxy.shell.daemon")

#: Replies drained per wake-up on one flow's socket: a request/response server answers in small
#: bursts, and a smaller batch than the link's lets many flows take turns (common practice, no
#: source).
REPLY_BATCH = 64
#: socket() errors that mean "out of descriptors or memory", not "the server is unreachable":
#: counted as ``no_socket`` (socket(2): EMFILE per process, ENFILE system-wide, ENOBUFS/ENOMEM).
_RESOURCE_ERRORS = frozenset({errno.EMFILE, errno.ENFILE, errno.ENOBUFS, errno.ENOMEM})

#: ``max_sockets`` default: the open-file limit less fdlimit.FD_RESERVE, read at construction.
FROM_OPEN_FILE_LIMIT = -1

#: Called with a batch of (reply, flow) and the batch's ``now``: encode and send to the peer.
ReplyHandler = Callable[[list[tuple[bytes, int]], float], Awaitable[None]]


class _Upstream:
    """One flow's socket towards the application server, and the scope of its reader task.

    The reader task owns the socket and closes it as it ends: closing it from another task could
    catch the reader already woken for a datagram, which would then read a closed descriptor.
    """

    __slots__ = ("sock", "writer", "scope")

    def __init__(self, sock: socket.socket, writer: DatagramWriter, scope: trio.CancelScope):
        self.sock, self.writer, self.scope = sock, writer, scope

    def close(self) -> None:
        """End the reader task; it closes the socket at its next checkpoint."""
        self.scope.cancel()


class Upstreams:
    """Every conversation's upstream socket.  :meth:`attach` the daemon's nursery before the first
    :meth:`writer_for` (the reader tasks live there, beside the daemon's loops, so stopping the
    daemon ends them too), and :meth:`close_all` when the daemon ends."""

    def __init__(
        self,
        forward: SockAddr,
        flows: PeerFlowTable,
        on_replies: ReplyHandler,
        max_sockets: int | None = FROM_OPEN_FILE_LIMIT,
    ):
        self.forward = forward
        #: Flow sockets open at once at most: the open-file limit less the reserve for the link,
        #: the metrics port and the rest (fdlimit.FD_RESERVE), read when the daemon starts (after
        #: it raised its limit); None = no limit of ours.
        self.max_sockets = flow_socket_budget() if max_sockets == FROM_OPEN_FILE_LIMIT else max_sockets
        self.flows = flows
        self.on_replies = on_replies
        #: Datagrams dropped here, by reason ("flow_limit", "unknown_flow", "no_socket", "unreachable").
        self.drops: dict[str, int] = defaultdict(int)
        self._by_flow: dict[int, _Upstream] = {}
        self._nursery: trio.Nursery | None = None
        self._failing = False  # the last socket creation failed: log again only after a success

    def attach(self, nursery: trio.Nursery) -> None:
        """The nursery that runs the reader tasks of the sockets opened from now on."""
        self._nursery = nursery

    def send_errors(self) -> int:
        return sum(upstream.writer.send_errors for upstream in self._by_flow.values())

    def __len__(self) -> int:
        return len(self._by_flow)

    def writer_for(self, flow: int, now: float, count: int = 1) -> DatagramWriter | None:
        """The writer for ``count`` datagrams from the link on ``flow``: its conversation's socket,
        opened (with its reader task) when the conversation is new.  None when they are dropped
        (counted in ``drops``: a finished conversation, a full table, no socket)."""
        verdict = self.flows.request(flow, now)
        if verdict is Verdict.CURRENT:
            entry = self._by_flow.get(flow)
            if entry is not None:
                return entry.writer
            # Held by the table but without a socket: cannot happen (a failed open removes the
            # flow), but if it did, opening one now is the right repair.
        elif verdict is Verdict.STALE:
            self.drops[DropReason.UNKNOWN_FLOW] += count
            return None
        elif verdict is Verdict.REFUSED:
            self.drops[DropReason.FLOW_LIMIT] += count
            return None
        else:
            assert isinstance(verdict, Opened)
            self.close_ended(verdict.closed)
        return self._open(flow, count)

    def _open(self, flow: int, count: int) -> DatagramWriter | None:
        if self._nursery is None:
            raise RuntimeError("Upstreams.attach(nursery) must come before the first datagram")
        family = socket.AF_INET6 if len(self.forward) == 4 else socket.AF_INET
        sock = None
        try:
            if self.max_sockets is not None and len(self._by_flow) >= self.max_sockets:
                raise OSError(errno.EMFILE, "flow sockets would take the descriptors reserved for the rest")
            sock = socket.socket(family, socket.SOCK_DGRAM)
            sock.setblocking(False)
            # Connected: the kernel picks the source address towards the server, and only the
            # server's replies are accepted on this socket.
            sock.connect(self.forward)
        except OSError as error:
            if sock is not None:
                sock.close()
            self.flows.remove(flow)
            no_socket = sock is None or error.errno in _RESOURCE_ERRORS
            reason = DropReason.NO_SOCKET if no_socket else DropReason.UNREACHABLE
            self.drops[reason] += count
            if not self._failing:
                self._failing = True
                hint = "raise the open-file limit (LimitNOFILE= / ulimit -n) or lower flows.max" if no_socket else ""
                log_event(
                    log,
                    logging.WARNING,
                    "upstream_failed",
                    forward=format_sockaddr(self.forward),
                    error=str(error),
                    reason=reason,
                    flows=len(self._by_flow),
                    hint=hint or "-",
                )
            return None
        self._failing = False
        entry = _Upstream(sock, DatagramWriter(sock), trio.CancelScope())
        self._by_flow[flow] = entry
        self._nursery.start_soon(self._read_replies, flow, entry)
        log_event(log, logging.DEBUG, "flow_opened", flow=f"{flow:06x}", local=format_sockaddr(sock.getsockname()))
        return entry.writer

    def close_ended(self, closed: Iterable[FlowClosed]) -> None:
        """Close the sockets of conversations the table ended (expired, evicted, replaced, or a
        restarted peer); a late reply to one of them then reaches nobody."""
        for ended in closed:
            entry = self._by_flow.pop(ended.flow, None)
            if entry is not None:
                entry.close()
            log_event(log, logging.DEBUG, "flow_closed", flow=f"{ended.flow:06x}", reason=ended.reason)

    def close_all(self) -> None:
        """The daemon ended (its nursery is done): close every socket still open."""
        for entry in self._by_flow.values():
            entry.scope.cancel()
            entry.sock.close()
        self._by_flow.clear()

    async def _read_replies(self, flow: int, upstream: _Upstream) -> None:
        """Replies from the application server on this flow's socket -> the reply handler."""
        try:
            with upstream.scope:
                reader = DatagramReader(upstream.sock, batch=REPLY_BATCH, coalesce=True)
                while True:
                    batch = await reader.read_batch()
                    now = trio.current_time()
                    # Once per batch: every datagram shares this `now`.
                    if not self.flows.reply(flow, now):
                        self.drops[DropReason.UNKNOWN_FLOW] += len(batch)
                        continue
                    await self.on_replies([(data, flow) for data, _ in batch], now)
        finally:
            upstream.sock.close()
