"""Whole pair through the impairment relay, in one trio nursery (the real shell, sockets on
127.0.0.1): a reordering loss-free link keeps fec.adapt at its floor with no loss reported, and a
10 s blackout is counted as the datagrams it really swallowed (protocol.loss_ledger).

Demo scenario: a hill-top relay's radio hop, 1 000 telemetry datagrams a second.
"""

from __future__ import annotations

import struct

import pytest
import trio

from fecproxy.config import parse_config
from fecproxy.linkmodel.impairment import Blackout, LinkImpairment
from fecproxy.shell.daemon import Daemon
from fecproxy.shell.relay import RelayConfig, run_relay

pytestmark = pytest.mark.slow

LOOPBACK = "127.0.0.1"
K = 16
BATCH, TICK = 10, 0.010  # 1 000 datagrams/s


def configs(sink, relay=None, *, repair=1, adapt=True):
    fec: dict = {"block_size": K, "repair": repair, "flush_ms": 50}
    if adapt:
        fec["adapt"] = {"target_residual": 1e-3, "min_repair": repair}
    common = {"link": {"bind": f"{LOOPBACK}:0"}, "fec": fec, "reports": {"interval_ms": 500}}
    if relay is None:
        return parse_config({"role": "receiver", "forward": f"{sink[0]}:{sink[1]}", **common}, "test receiver")
    common["link"]["peer"] = f"{relay[0]}:{relay[1]}"
    return parse_config({"role": "sender", "listen": f"{LOOPBACK}:0", **common}, "test sender")


async def run_pair(impairment: LinkImpairment, seconds: float, *, repair=1, adapt=True):
    """Send 1 000 datagrams/s for ``seconds`` through the relay; returns (datagrams sent, received
    by the server, the m the sender used at each tick, the receiver's decoder stats)."""
    received = 0
    ms = []
    async with trio.open_nursery() as nursery:
        sink = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
        app = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
        await sink.bind((LOOPBACK, 0))
        await app.bind((LOOPBACK, 0))

        async def drain():
            nonlocal received
            while True:
                await sink.recv(2048)
                received += 1

        nursery.start_soon(drain)
        receiver = await nursery.start(
            Daemon(configs(sink.getsockname(), repair=repair, adapt=adapt), handle_signals=False).run
        )
        relay = await nursery.start(
            run_relay,
            RelayConfig(listen=(LOOPBACK, 0), to=receiver.link_address[:2], forward=impairment, seed="hill-top"),
        )
        sender = await nursery.start(
            Daemon(
                configs(sink.getsockname(), relay.listen_address[:2], repair=repair, adapt=adapt), handle_signals=False
            ).run
        )
        start = trio.current_time()
        sequence = 0
        for tick in range(round(seconds / TICK)):
            for _ in range(BATCH):
                await app.sendto(struct.pack(">Q", sequence) + bytes(100), sender.listen_address)
                sequence += 1
            ms.append(sender.encoder.settings.repair)
            await trio.sleep_until(start + (tick + 1) * TICK)
        # Every loss is final a hold time after its block's first packet: wait for it.
        await trio.sleep(2 * receiver.decoder.settings.hold_time + 0.5)
        stats = receiver.decoder.stats
        nursery.cancel_scope.cancel()
    return sequence, received, ms, stats


async def test_a_reordering_loss_free_link_keeps_adapt_at_its_floor_and_reports_no_loss():
    # ±2 ms jitter with reordering: repair packets overtake their block's last source packets.
    link = LinkImpairment(delay=0.005, jitter=0.002, reorder=True)
    sent, received, ms, stats = await run_pair(link, 6.0)
    assert received == sent
    assert set(ms) == {1}, sorted(set(ms))  # min_repair, all along
    assert stats.lost == 0 and stats.unrecovered == 0


async def test_a_ten_second_blackout_is_counted_as_the_datagrams_it_swallowed():
    link = LinkImpairment(blackout=Blackout(duration=10.0, period=100.0, offset=2.0))
    sent, received, ms, stats = await run_pair(link, 14.0, repair=4, adapt=False)
    really_lost = sent - received
    print(f"blackout: sent {sent}, really lost {really_lost}, counted unrecovered {stats.unrecovered}")
    assert really_lost >= 9_000
    assert abs(stats.unrecovered - really_lost) <= 0.02 * really_lost, (stats.unrecovered, really_lost)
