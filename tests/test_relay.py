"""The impairment relay (fecproxy.shell.relay) in-process on real loopback sockets.

127.0.0.1 only; every loop bounded in count and time.  The ``fecproxy impair`` command around it
is tested in test_impair_command.py.
"""

from __future__ import annotations

import socket

import pytest
import trio

from fecproxy.commands.impair import format_summary
from fecproxy.linkmodel.impairment import Blackout, LinkImpairment
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.shell.relay import RelayConfig, run_relay

LOOPBACK = "127.0.0.1"
TIMEOUT = 10.0  # seconds: generous upper bound for a shared 2-core machine


async def udp_socket():
    sock = trio.socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    await sock.bind((LOOPBACK, 0))
    return sock


async def echo_server(sock, *, task_status=trio.TASK_STATUS_IGNORED):
    """Replies 're:' + datagram to whoever sent it (the relay), forever."""
    task_status.started()
    while True:
        data, address = await sock.recvfrom(65535)
        await sock.sendto(b"re:" + data, address)


async def start_pair(nursery, forward=None, back=None, seed=1):
    forward = forward or LinkImpairment()
    server = await udp_socket()
    await nursery.start(echo_server, server)
    config = RelayConfig(
        listen=(LOOPBACK, 0), to=server.getsockname(), forward=forward, back=back or forward, seed=seed
    )
    relay = await nursery.start(run_relay, config)
    return relay, server


async def test_relay_carries_datagrams_and_replies():
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery)
        client = await udp_socket()
        replies = set()
        with trio.fail_after(TIMEOUT):
            for i in range(50):
                await client.sendto(b"m%d" % i, relay.listen_address)
                replies.add(await client.recv(65535))
        assert replies == {b"re:m%d" % i for i in range(50)}
        stats = relay.stats()
        assert stats["forward"].delivered == stats["return"].delivered == 50
        assert "forward: submitted 50" in format_summary(relay)
        nursery.cancel_scope.cancel()


async def test_replies_go_to_whoever_sent_last():
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery)
        first, second = await udp_socket(), await udp_socket()
        with trio.fail_after(TIMEOUT):
            await first.sendto(b"a", relay.listen_address)
            assert await first.recv(100) == b"re:a"
            await second.sendto(b"b", relay.listen_address)
            assert await second.recv(100) == b"re:b"
        with trio.move_on_after(0.2):
            await first.recv(100)
            pytest.fail("the earlier client got a reply meant for the later one")
        nursery.cancel_scope.cancel()


async def test_forward_loss_is_applied_and_counted():
    lossy = LinkImpairment(loss=GilbertElliott.from_loss_burst(0.3, 2))
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery, forward=lossy, back=LinkImpairment(), seed=7)
        client = await udp_socket()
        got = 0

        async def count_replies():
            nonlocal got
            while True:
                await client.recv(100)
                got += 1

        nursery.start_soon(count_replies)  # read as we go: a loopback receive buffer holds only ~250 datagrams
        with trio.fail_after(TIMEOUT):
            for i in range(400):
                await client.sendto(b"%d" % i, relay.listen_address)
                if i % 20 == 19:
                    await trio.sleep(0.005)
            while relay.stats()["forward"].lost + got < 400:  # each datagram is either lost or came back
                await trio.sleep(0.01)
        stats = relay.stats()
        assert stats["forward"].lost > 0 and stats["return"].lost == 0
        assert stats["forward"].delivered == got == stats["return"].delivered
        assert 0.15 < stats["forward"].measured_loss < 0.45  # wide: 400 packets of a bursty channel
        nursery.cancel_scope.cancel()


async def test_delay_applies_in_each_direction():
    slow = LinkImpairment(delay=0.05)
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery, forward=slow)
        client = await udp_socket()
        with trio.fail_after(TIMEOUT):
            start = trio.current_time()
            await client.sendto(b"t", relay.listen_address)
            assert await client.recv(100) == b"re:t"
            assert trio.current_time() - start >= 0.1 - 0.005  # 50 ms out and 50 ms back (clock granularity)
        nursery.cancel_scope.cancel()


async def test_blackout_and_rate_cap_through_the_relay():
    config = LinkImpairment(rate_pps=1000, queue_packets=4, blackout=Blackout(10.0, 100.0, 0.0))
    async with trio.open_nursery() as nursery:
        relay, _server = await start_pair(nursery, forward=config, back=LinkImpairment())
        client = await udp_socket()
        for i in range(10):
            await client.sendto(b"%d" % i, relay.listen_address)
        with trio.fail_after(TIMEOUT):
            while relay.stats()["forward"].submitted < 10:
                await trio.sleep(0.01)
        stats = relay.stats()["forward"]
        assert stats.delivered == 0 and stats.queue_drops + stats.blackout_drops == 10
        nursery.cancel_scope.cancel()


async def test_reply_without_a_client_is_counted():
    async with trio.open_nursery() as nursery:
        relay, server = await start_pair(nursery)
        await server.sendto(b"unsolicited", relay.out_address)
        with trio.fail_after(TIMEOUT):
            while relay.shell_drops[("return", "no_client")] == 0:
                await trio.sleep(0.01)
        nursery.cancel_scope.cancel()
