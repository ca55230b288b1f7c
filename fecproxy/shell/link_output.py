"""The daemon's link output: every packet this side sends on the link goes through here.

Without ``link.rate`` a packet is written at once.  With it, packets go through the sans-IO
:class:`~fecproxy.protocol.pacer.Pacer` (token bucket, bounded queue, published drop rule) and a
task here writes what the pacer lets out, waking at its deadline.  A packet that finds the queue
empty is written at once, from the caller's task: pacing adds nothing until the link is busy.

What the operator sees of it: the air bytes sent by kind (paced or not, so the air rate used is
always known), the queue (packets, bytes, the wait of the packet now leaving), drops by kind and
reason, and a rate-limited ``queue_full`` warning that says by how much the offered traffic
(source, repair and control, IP/UDP headers counted) exceeds ``link.rate``, or that bursts
overflow ``link.queue_ms`` while the average fits.
"""

from __future__ import annotations

import logging
import math
import socket
from dataclasses import dataclass
from typing import Any

import trio

from fecproxy.config import Config
from fecproxy.protocol import wire
from fecproxy.protocol.pacer import (
    IPV4_UDP_HEADER_BYTES,
    IPV6_UDP_HEADER_BYTES,
    Pacer,
    PacerCounters,
    PacerDrop,
    PacketKind,
)
from fecproxy.shell.logs import log_event
from fecproxy.shell.udp import DatagramWriter

log = logging.getLogger("fecproxy.shell.link_output")

#: At most one ``queue_full`` warning per 10 s: a link that overflows for minutes gives a few
#: lines a minute, each with the figures since the previous one (common practice, no source).
QUEUE_FULL_WARN_INTERVAL_S = 10.0
#: Seconds a stopping daemon waits for the pacer to send the last block's repair packets before it
#: counts what is left as ``shutdown`` drops: within the second README promises for SIGTERM.
DRAIN_ON_STOP_S = 0.5

_KIND_BY_TYPE = {
    wire.SOURCE_TYPE_BYTE: PacketKind.SOURCE,
    wire.REPAIR_TYPE_BYTE: PacketKind.REPAIR,
    wire.CONTROL_TYPE_BYTE: PacketKind.CONTROL,
    wire.SLIDING_SOURCE_TYPE_BYTE: PacketKind.SOURCE,  # fec.code: sliding (RFC 8681)
    wire.SLIDING_REPAIR_TYPE_BYTE: PacketKind.REPAIR,
}


def kind_of(packet: bytes) -> PacketKind:
    """Source, repair or control from the clear first byte (version | type), block or sliding
    code alike; an unknown type ranks as source (never dropped before repair)."""
    return _KIND_BY_TYPE.get(packet[0], PacketKind.SOURCE) if packet else PacketKind.SOURCE


@dataclass(frozen=True)
class LinkFigures:
    """What metrics, the stats line and the status page read (see :meth:`LinkOutput.figures`)."""

    rate_bps: float | None  # link.rate; None = not paced
    air_bytes: dict[PacketKind, int]  # bytes put on the link by kind, IP/UDP headers counted
    queue_packets: int
    queue_bytes: int
    queue_delay: float  # seconds the packet now leaving waited
    dropped: dict[tuple[PacketKind, PacerDrop], int]


class LinkOutput:
    """Writes link packets at once or paced.  :meth:`attach` once the socket is open; start
    :meth:`run` in the daemon's nursery; :meth:`send` from any task."""

    def __init__(self, config: Config) -> None:
        self.rate_bps = config.link.rate
        self.queue_s = config.link.queue_ms / 1000
        self.mtu = config.link.mtu
        self.pacer: Pacer[Any] | None = None
        self.writer: DatagramWriter | None = None
        self.header_bytes = IPV4_UDP_HEADER_BYTES
        self._air_bytes = dict.fromkeys(PacketKind, 0)  # unpaced: counted here; paced: the pacer's
        self._scope: trio.CancelScope | None = None
        self._last_warning: float | None = None
        self._since_warning: tuple[float, dict[PacketKind, int], int] | None = None

    def attach(self, writer: DatagramWriter, family: int, now: float) -> None:
        self.writer = writer
        self.header_bytes = IPV6_UDP_HEADER_BYTES if family == socket.AF_INET6 else IPV4_UDP_HEADER_BYTES
        if self.rate_bps is not None:
            self.pacer = Pacer(self.rate_bps, self.queue_s, mtu=self.mtu, header_bytes=self.header_bytes, now=now)
            self._since_warning = (now, dict(self.pacer.counters.offered_wire_bytes), 0)

    # -- sending ---------------------------------------------------------------------------------

    async def send(self, packets: list[bytes], destination: Any, now: float) -> None:
        writer = self.writer
        if writer is None or not packets:
            return
        pacer = self.pacer
        if pacer is None:
            for packet in packets:
                self._air_bytes[kind_of(packet)] += len(packet) + self.header_bytes
            await writer.send(packets, destination)
            return
        drops = _total_drops(pacer.counters)
        for packet in packets:
            pacer.send(packet, kind_of(packet), now, destination)
        await self._write(pacer.datagrams_to_send(now))
        if _total_drops(pacer.counters) != drops:
            self._warn(now)
        if self._scope is not None:
            self._scope.deadline = _deadline(pacer)

    async def _write(self, departures: list[Any]) -> None:
        """Write departures in order, consecutive ones to one destination as one batch."""
        writer = self.writer
        if writer is None:
            return
        batch: list[bytes] = []
        target: Any = None
        for departure in departures:
            if batch and departure.destination != target:
                await writer.send(batch, target)
                batch = []
            batch.append(departure.packet)
            target = departure.destination
        if batch:
            await writer.send(batch, target)

    async def run(self) -> None:
        """The pacing task: write what the pacer lets out, sleep until its next deadline."""
        pacer = self.pacer
        if pacer is None:
            return
        while True:
            with trio.CancelScope(deadline=_deadline(pacer)) as scope:
                self._scope = scope
                await trio.sleep_forever()
            self._scope = None
            await self._write(pacer.datagrams_to_send(trio.current_time()))

    async def drain(self, seconds: float = DRAIN_ON_STOP_S) -> int:
        """On stop: let the queue out for up to ``seconds``, then count the rest as dropped
        (``shutdown``).  Returns how many were left."""
        pacer = self.pacer
        if pacer is None:
            return 0
        with trio.move_on_after(seconds):
            while (deadline := pacer.next_deadline()) is not None:
                await trio.sleep_until(deadline)
                await self._write(pacer.datagrams_to_send(trio.current_time()))
        return pacer.close()

    # -- what the operator sees ------------------------------------------------------------------

    def figures(self) -> LinkFigures:
        pacer = self.pacer
        if pacer is None:
            return LinkFigures(None, dict(self._air_bytes), 0, 0, 0.0, {})
        counters = pacer.counters
        return LinkFigures(
            self.rate_bps,
            dict(counters.sent_wire_bytes),
            pacer.queued_packets,
            pacer.queued_bytes,
            pacer.last_wait,
            dict(counters.dropped),
        )

    def _warn(self, now: float) -> None:
        """``queue_full``, at most once per QUEUE_FULL_WARN_INTERVAL_S, with the figures since the
        previous warning (or since start)."""
        pacer = self.pacer
        if pacer is None or self._since_warning is None or self.rate_bps is None:
            return
        if self._last_warning is not None and now - self._last_warning < QUEUE_FULL_WARN_INTERVAL_S:
            return
        start, offered_then, drops_then = self._since_warning
        counters = pacer.counters
        span = max(now - start, 1e-3)
        offered = {kind: counters.offered_wire_bytes[kind] - offered_then[kind] for kind in PacketKind}
        bits = {kind: offered[kind] * 8 / span for kind in PacketKind}
        total = sum(bits.values())
        drops = _total_drops(counters)
        dropped = {kind.value: sum(n for (k, _), n in counters.dropped.items() if k is kind) for kind in PacketKind}
        rate = self.rate_bps
        if total > rate:
            detail = (
                f"offered {total / 1000:.1f} kbit/s (source {bits[PacketKind.SOURCE] / 1000:.1f} + repair "
                f"{bits[PacketKind.REPAIR] / 1000:.1f} + control {bits[PacketKind.CONTROL] / 1000:.1f}, IP/UDP "
                f"headers counted) is {total / rate - 1:.0%} above link.rate {rate / 1000:g} kbit/s: "
                "lower fec.repair or the traffic, or raise link.rate if the radio carries more"
            )
        else:
            detail = (
                f"offered {total / 1000:.1f} kbit/s on average, {total / rate:.0%} of link.rate {rate / 1000:g} "
                f"kbit/s, but bursts exceed link.queue_ms {self.queue_s * 1000:g}: raise link.queue_ms, or "
                "spread the application's bursts"
            )
        log_event(
            log,
            logging.WARNING,
            "queue_full",
            dropped_source=dropped["source"],
            dropped_repair=dropped["repair"],
            dropped_since=drops - drops_then,
            over_s=round(span, 1),
            queue_ms=round(pacer.queued_air_time() * 1000),
            detail=detail,
        )
        self._last_warning = now
        self._since_warning = (now, dict(counters.offered_wire_bytes), drops)


def _total_drops(counters: PacerCounters) -> int:
    return sum(n for (_, reason), n in counters.dropped.items() if reason is not PacerDrop.SHUTDOWN)


def _deadline(pacer: Pacer[Any]) -> float:
    deadline = pacer.next_deadline()
    return math.inf if deadline is None else deadline


__all__ = ["DRAIN_ON_STOP_S", "QUEUE_FULL_WARN_INTERVAL_S", "LinkFigures", "LinkOutput", "kind_of"]
