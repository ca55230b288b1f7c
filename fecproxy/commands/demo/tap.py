"""The link tap: what the emulated radio link carries, by kind, size, block and fate.

Why it exists: the "without FEC" column is what the application would have lost had the link
carried its datagrams bare, i.e. the source packets the link dropped; and the overhead is what the
repair packets added.  Only the link itself sees both, so the tap observes the relay's forward
:class:`~fecproxy.linkmodel.impairment.ImpairedLink` through its ``on_air`` hook (every packet as
it faces the loss model, lost or not).  It reads packet headers only through
:func:`fecproxy.protocol.wire.parse`, so it repeats no offset or bit layout of the wire format.
"""

from __future__ import annotations

from collections import Counter

from fecproxy.commands.demo.traffic import peek_id
from fecproxy.protocol import wire


class LinkTap:
    """Counts every packet the relay's forward link carries, by kind, size and fate."""

    #: Finished blocks are folded into the (k', m') counter once this many are open in the tap.
    OPEN_BLOCKS = 8

    def __init__(self, link) -> None:
        self.link = link
        link.on_air = self.observe
        self.packets = self.lost = 0
        self.source_packets = self.repair_packets = 0
        self.source_bytes = self.repair_bytes = 0
        self.source_lost = 0
        self.lost_ids: set[tuple[int, int]] = set()
        self.blocks: Counter = Counter()
        self._open: dict[int, list[int]] = {}  # sbn -> [source packets, repair packets, k]

    def observe(self, data: bytes, lost: bool) -> None:
        self.packets += 1
        self.lost += lost
        try:
            # The largest limit the format allows: the tap counts what the sender sent, it does
            # not police it (the receiver does, with its configured limit).
            packet = wire.parse(data, max_datagram=wire.MAX_DATAGRAM_LIMIT, sliding=True)
        except wire.PacketError:
            return
        if isinstance(packet, wire.ControlPacket):
            return
        if isinstance(packet, wire.SlidingSourcePacket):  # fec.code: sliding: no blocks to count
            self._source(packet.data, data, lost)
            return
        if isinstance(packet, wire.SlidingRepairPacket):
            self.repair_packets += 1
            self.repair_bytes += len(data)
            return
        block = self._open.get(packet.sbn)
        if block is None:
            block = self._open[packet.sbn] = [0, 0, 0]
            if len(self._open) > self.OPEN_BLOCKS:
                self._fold(min(self._open))
        if isinstance(packet, wire.SourcePacket):
            block[0] += 1
            self._source(packet.data, data, lost)
        else:
            self.repair_packets += 1
            self.repair_bytes += len(data)
            block[1] += 1
            block[2] = packet.k

    def _source(self, datagram: bytes, data: bytes, lost: bool) -> None:
        self.source_packets += 1
        self.source_bytes += len(data)
        if lost:
            self.source_lost += 1
            ident = peek_id(datagram)
            if ident is not None:
                self.lost_ids.add(ident)

    def _fold(self, sbn: int) -> None:
        source, repair, k = self._open.pop(sbn)
        self.blocks[(k or source, repair)] += 1

    def finish(self) -> Counter:
        for sbn in sorted(self._open):
            self._fold(sbn)
        return self.blocks
