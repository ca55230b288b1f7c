"""The receiver's upstream sockets: one per conversation, a fresh one for a new generation of a
slot, none for a finished one, and a socket that cannot be created is a counted drop.

Real UDP sockets on 127.0.0.1 inside trio (pytest-trio), the flow table with a fake ``now``.
"""

from __future__ import annotations

import errno
import resource
import socket

import trio

from fecproxy.protocol.flows import PeerFlowTable, flow_id
from fecproxy.shell import upstream as upstream_module
from fecproxy.shell.fdlimit import FD_RESERVE
from fecproxy.shell.upstream import Upstreams

LOOPBACK = "127.0.0.1"


def table(max_flows: int = 8) -> PeerFlowTable:
    return PeerFlowTable(max_flows, first_exchange_timeout=30.0, idle_timeout=120.0, protect=0.0)


async def receive(server: trio.socket.SocketType) -> tuple[bytes, tuple]:
    with trio.fail_after(5):
        return await server.recvfrom(2048)


async def test_a_new_generation_gets_a_fresh_socket_and_the_old_one_is_dropped():
    server = trio.socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    await server.bind((LOOPBACK, 0))
    replies: list[tuple[bytes, int]] = []

    async def on_replies(batch, now):
        replies.extend(batch)

    flows = table()
    upstreams = Upstreams(server.getsockname(), flows, on_replies)
    old, new = flow_id(7, 0), flow_id(7, 1)
    async with trio.open_nursery() as nursery:
        upstreams.attach(nursery)
        await upstreams.writer_for(old, 1.0).send([b"first client"], upstreams.forward)
        _, old_port = await receive(server)
        await upstreams.writer_for(new, 2.0).send([b"second client"], upstreams.forward)
        data, new_port = await receive(server)
        # The slot's new client is a new conversation: its own source port, the old socket closed.
        assert data == b"second client" and new_port != old_port and len(upstreams) == 1
        assert flows.stats.replaced == 1
        # A late datagram of the old generation reaches nobody.
        assert upstreams.writer_for(old, 3.0) is None and upstreams.drops["unknown_flow"] == 1
        # Replies on the new socket go back under the new flow id.
        await server.sendto(b"answer", new_port)
        with trio.fail_after(5):
            while not replies:
                await trio.sleep(0.01)
        assert replies == [(b"answer", new)]
        # The sender restarted: every conversation ends, its socket closed.
        upstreams.close_ended(flows.clear())
        assert len(upstreams) == 0 and len(flows) == 0
        nursery.cancel_scope.cancel()
    upstreams.close_all()
    server.close()


async def test_a_socket_that_cannot_be_created_is_a_counted_drop(monkeypatch):
    def out_of_descriptors(*args, **kwargs):
        raise OSError(errno.EMFILE, "Too many open files")

    flows = table()

    async def on_replies(batch, now):
        pass

    upstreams = Upstreams((LOOPBACK, 9), flows, on_replies)
    async with trio.open_nursery() as nursery:
        upstreams.attach(nursery)
        monkeypatch.setattr(upstream_module.socket, "socket", out_of_descriptors)
        assert upstreams.writer_for(flow_id(1, 0), 1.0, count=3) is None
        assert upstreams.drops["no_socket"] == 3
        assert len(flows) == 0  # the flow is removed again: the next datagram tries afresh
        monkeypatch.undo()
        assert upstreams.writer_for(flow_id(1, 0), 2.0) is not None and len(flows) == 1
        nursery.cancel_scope.cancel()
    upstreams.close_all()


async def test_flow_sockets_stop_short_of_the_descriptors_reserved_for_the_rest():
    """Past ``max_sockets`` (the open-file limit less fdlimit.FD_RESERVE) a new flow is a counted
    ``no_socket`` drop: the link, the metrics port and the rest keep their descriptors."""
    flows = table()

    async def on_replies(batch, now):
        pass

    upstreams = Upstreams((LOOPBACK, 9), flows, on_replies, max_sockets=2)
    async with trio.open_nursery() as nursery:
        upstreams.attach(nursery)
        assert upstreams.writer_for(flow_id(1, 0), 1.0) is not None
        assert upstreams.writer_for(flow_id(2, 0), 1.0) is not None
        assert upstreams.writer_for(flow_id(3, 0), 1.0, count=2) is None
        assert upstreams.drops["no_socket"] == 2 and len(upstreams) == 2
        nursery.cancel_scope.cancel()
    upstreams.close_all()


def test_the_default_socket_budget_is_the_open_file_limit_less_the_reserve():
    soft, _ = resource.getrlimit(resource.RLIMIT_NOFILE)
    upstreams = Upstreams((LOOPBACK, 9), table(), None)
    assert upstreams.max_sockets == (None if soft == resource.RLIM_INFINITY else max(0, soft - FD_RESERVE))
