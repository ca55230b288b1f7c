"""A bug after the decoder (in-order delivery, an event's handling) costs one socket read, never the
daemon: the link loop counts it as ``internal_error`` and goes on forwarding.

In-process daemons (the real trio shell) on 127.0.0.1, so the test can make one stage raise.
"""

from __future__ import annotations

import socket

import trio

from fecproxy.config import parse_config
from fecproxy.protocol.events import DropReason
from fecproxy.shell.daemon import Daemon

LOOPBACK = "127.0.0.1"
#: Datagrams sent before and after the fault; a few dozen cross loopback in milliseconds.
DATAGRAMS = 40


def _configs(sink: tuple, receiver_link: tuple | None = None):
    link: dict[str, str] = {"bind": f"{LOOPBACK}:0"}
    common = {"link": link, "fec": {"block_size": 4, "repair": 1, "flush_ms": 20}}
    if receiver_link is None:
        return parse_config(
            {"role": "receiver", "forward": f"{sink[0]}:{sink[1]}", "delivery": {"order": "in_order"}, **common},
            "test receiver",
        )
    link["peer"] = f"{receiver_link[0]}:{receiver_link[1]}"
    return parse_config({"role": "sender", "listen": f"{LOOPBACK}:0", **common}, "test sender")


async def test_a_failing_in_order_stage_costs_one_read_and_is_counted():
    sink = trio.socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    await sink.bind((LOOPBACK, 0))
    client = trio.socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    await client.bind((LOOPBACK, 0))
    received: list[bytes] = []

    async def drain() -> None:
        while True:
            received.append(await sink.recv(2048))

    with trio.fail_after(20):
        async with trio.open_nursery() as nursery:
            nursery.start_soon(drain)
            receiver: Daemon = await nursery.start(Daemon(_configs(sink.getsockname()), handle_signals=False).run)
            sender: Daemon = await nursery.start(
                Daemon(_configs(sink.getsockname(), receiver.link_address[:2]), handle_signals=False).run
            )
            assert receiver.order is not None
            push = receiver.order.push
            calls = {"n": 0}

            def fails_once(*args, **kwargs):
                calls["n"] += 1
                if calls["n"] == 1:
                    raise RuntimeError("a bug in the in-order stage")
                return push(*args, **kwargs)

            receiver.order.push = fails_once  # the fault under test
            for number in range(DATAGRAMS):
                await client.sendto(b"reading %d" % number, sender.listen_address[:2])
                await trio.sleep(0.005)
            while len(received) < DATAGRAMS - 8 and calls["n"] < DATAGRAMS:
                await trio.sleep(0.05)
            await trio.sleep(0.3)
            nursery.cancel_scope.cancel()
    assert receiver.counts.drops.get(DropReason.INTERNAL_ERROR, 0) >= 1
    # Everything after the failed read went on to the server.
    assert len(received) >= DATAGRAMS - 8, len(received)
