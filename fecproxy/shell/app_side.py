"""The application side of a daemon, one object per role, chosen once at start.

Both roles encode what they send on the link and decode what they receive from it (that part is
the daemon's); they differ only in where datagrams come from and go to:

* :class:`SenderSide`: applications send to ``listen``; every client address is a flow; decoded
  replies go back to the client through the same socket.
* :class:`ReceiverSide`: rebuilt datagrams go to ``forward`` from one upstream socket per flow
  (:mod:`fecproxy.shell.upstream`), so the server's replies come back on that socket and are
  encoded towards the sender with the flow's id.

The daemon calls the same methods on either (:class:`AppSide`); nothing else in it knows the role.
"""

from __future__ import annotations

import socket
from collections import defaultdict
from collections.abc import Awaitable, Callable, Mapping
from typing import Protocol

import trio

from fecproxy.config import Config
from fecproxy.config.addresses import format_sockaddr
from fecproxy.protocol.events import DropReason, SockAddr
from fecproxy.protocol.flows import ClientFlowTable, PeerFlowTable
from fecproxy.shell.udp import DatagramReader, DatagramWriter, open_udp_socket, resolve
from fecproxy.shell.upstream import Upstreams

#: Encode a batch of (datagram, flow) taken in at ``now`` and put it on the link.
EncodeAndSend = Callable[[list[tuple[bytes, int]], float], Awaitable[None]]


class AppSide(Protocol):
    """What the daemon needs of its application side."""

    @property
    def flows(self) -> ClientFlowTable | PeerFlowTable:
        """Sender: client addresses -> flow ids; receiver: the peer's flow ids -> conversations."""

    @property
    def drops(self) -> Mapping[str, int]:
        """Datagrams dropped on this side, by reason."""

    #: Whether its flows hold a socket each (the open-file limit depends on it).
    holds_flow_sockets: bool
    #: The bound ``listen`` address of a sender (None on a receiver, and before ``open``).
    address: SockAddr | None

    def open(self, buffers: dict[str, int]) -> None:
        """Open this side's sockets; raise OSError (with ``key``/``address`` set) on failure."""

    def start(self, nursery: trio.Nursery) -> None:
        """Start this side's tasks in the daemon's nursery."""

    async def deliver(self, by_flow: dict[int, list[bytes]], now: float) -> None:
        """Decoded datagrams from the link, by flow, to the application."""

    def peer_restarted(self) -> None:
        """The peer's sender restarted: its flow ids mean new conversations from now on."""

    def expire(self, now: float) -> None:
        """End the flows whose timeout passed."""

    def send_errors(self) -> int: ...

    def close(self) -> None: ...

    def log_fields(self) -> dict[str, str]:
        """What the "started" line says about this side."""


class SideOpenError(OSError):
    """An address of this side could not be bound or resolved; ``key`` names its config key."""

    def __init__(self, key: str, address: object, error: OSError):
        super().__init__(error.errno, error.strerror)
        self.key, self.address, self.error = key, address, error


class SenderSide:
    """Applications' datagrams in from ``listen``, replies back to the client they belong to."""

    holds_flow_sockets = False

    def __init__(self, config: Config, flows: ClientFlowTable, encode_and_send: EncodeAndSend):
        self.config = config
        self.flows: ClientFlowTable = flows
        self.drops: dict[str, int] = defaultdict(int)
        self._encode_and_send = encode_and_send
        self._sock: socket.socket | None = None
        self._writer: DatagramWriter | None = None
        self.address: SockAddr | None = None

    def open(self, buffers: dict[str, int]) -> None:
        listen = self.config.listen
        assert listen is not None  # the config schema requires it of a sender
        try:
            self._sock = open_udp_socket(listen.host, listen.port, **buffers, purpose="listen")
        except OSError as error:
            raise SideOpenError("listen", listen, error) from error
        self._writer = DatagramWriter(self._sock)
        self.address = self._sock.getsockname()

    def start(self, nursery: trio.Nursery) -> None:
        nursery.start_soon(self._client_loop)

    async def _client_loop(self) -> None:
        """Applications' datagrams -> flows -> encoder -> link."""
        assert self._sock is not None
        reader = DatagramReader(self._sock, coalesce=True)
        flows = self.flows
        unseen = object()  # a client not yet looked up in this batch (None = every flow protected)
        while True:
            batch = await reader.read_batch()
            now = trio.current_time()
            # One flow-table lookup per client per batch: all of a batch shares one `now`, so
            # repeating it per datagram would only redo the same bookkeeping.
            flow_of: dict[SockAddr, object] = {}
            items: list[tuple[bytes, int]] = []
            for data, address in batch:
                flow = flow_of.get(address, unseen)
                if flow is unseen:
                    flow = flow_of[address] = flows.request(address, now)
                if flow is None:
                    self.drops[DropReason.FLOW_LIMIT] += 1
                    continue
                items.append((data, flow))  # type: ignore[arg-type]  # an int: neither unseen nor None
            await self._encode_and_send(items, now)

    async def deliver(self, by_flow: dict[int, list[bytes]], now: float) -> None:
        assert self._writer is not None
        for flow, datagrams in by_flow.items():
            client = self.flows.reply(flow, now)  # the client whose conversation this is now
            if client is None:
                self.drops[DropReason.UNKNOWN_FLOW] += len(datagrams)
                continue
            await self._writer.send(datagrams, client)

    def peer_restarted(self) -> None:
        pass  # the flows are our clients': a restarted receiver changes nothing about them

    def expire(self, now: float) -> None:
        self.flows.expire(now)

    def send_errors(self) -> int:
        return self._writer.send_errors if self._writer is not None else 0

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()

    def log_fields(self) -> dict[str, str]:
        return {"listen": format_sockaddr(self.address), "forward": "-", "sends": "datagrams"}


class ReceiverSide:
    """Rebuilt datagrams out to ``forward``, one socket per conversation; its replies back in."""

    holds_flow_sockets = True

    def __init__(self, config: Config, flows: PeerFlowTable, encode_and_send: EncodeAndSend):
        self.config = config
        self.flows: PeerFlowTable = flows
        self._encode_and_send = encode_and_send
        self.upstreams: Upstreams | None = None
        self.address: SockAddr | None = None  # no listening socket on this side

    @property
    def drops(self) -> Mapping[str, int]:
        return self.upstreams.drops if self.upstreams is not None else {}

    def open(self, buffers: dict[str, int]) -> None:
        forward = self.config.forward
        assert forward is not None  # the config schema requires it of a receiver
        try:
            address = resolve(forward.host, forward.port)
        except OSError as error:
            raise SideOpenError("forward", forward, error) from error
        self.upstreams = Upstreams(address, self.flows, self._encode_and_send)

    def start(self, nursery: trio.Nursery) -> None:
        assert self.upstreams is not None
        self.upstreams.attach(nursery)

    async def deliver(self, by_flow: dict[int, list[bytes]], now: float) -> None:
        upstreams = self.upstreams
        assert upstreams is not None
        for flow, datagrams in by_flow.items():
            writer = upstreams.writer_for(flow, now, len(datagrams))  # this conversation's own socket
            if writer is None:
                continue  # counted in upstreams.drops
            await writer.send(datagrams, upstreams.forward)

    def peer_restarted(self) -> None:
        # A restarted sender numbers its flows afresh: what came before belongs to the old
        # conversations, which all end now.
        if self.upstreams is not None:
            self.upstreams.close_ended(self.flows.clear())

    def expire(self, now: float) -> None:
        expired = self.flows.expire(now)
        if self.upstreams is not None:
            self.upstreams.close_ended(expired)

    def send_errors(self) -> int:
        return self.upstreams.send_errors() if self.upstreams is not None else 0

    def close(self) -> None:
        if self.upstreams is not None:
            self.upstreams.close_all()

    def log_fields(self) -> dict[str, str]:
        return {"listen": "-", "forward": str(self.config.forward), "sends": "replies"}


def app_side(config: Config, flows: ClientFlowTable | PeerFlowTable, encode_and_send: EncodeAndSend) -> AppSide:
    """The application side for ``config.role``: the one place the role is looked at."""
    if config.role == "sender":
        assert isinstance(flows, ClientFlowTable)
        return SenderSide(config, flows, encode_and_send)
    assert isinstance(flows, PeerFlowTable)
    return ReceiverSide(config, flows, encode_and_send)
