"""Rebuilding the missing datagrams of decodable blocks, one block at a time or many at once.

numpy's fixed cost per call dominates a rebuild at small k (a (16, 4) block is a few kilobytes
of arithmetic), so the blocks that become decodable within one socket read are rebuilt together:
:class:`RebuildQueue` collects them and :meth:`RebuildQueue.flush` makes one
``BlockCode.recover_many`` call per shape (k, symbol length).  The decoder has already finished
such a block (its late packets are judged as for any finished block) and put its BlockReport in
the events; the flush puts the rebuilt deliveries just before that report, where a block rebuilt
at once would have had them, so the order of events is the same either way.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from typing import Any

from fecproxy.coding.codec import BlockCode, block_code
from fecproxy.protocol import wire
from fecproxy.protocol.events import BlockReport, Delivery, DropReason, Event
from fecproxy.protocol.loss_ledger import LossLedger
from fecproxy.protocol.session_table import Block, DecoderStats

#: (block, the time it became decodable, its received symbols {ESI: symbol}, its report, and
#: whether the report waits in the loss ledger: then only the deliveries take its place)
Pending = tuple[Block, float, dict[int, bytes], BlockReport, bool]
#: The decoder's drop maker: (reason, detail) -> a counted Dropped event.
DropMaker = Callable[[DropReason, str], Event]


def received_symbols(block: Block) -> dict[int, bytes]:
    """The k symbols the rebuild uses: every source (prefix, datagram, zero padding) and the
    lowest-numbered repairs that make up the rest."""
    k, length = block.k, block.symbol_len
    assert k is not None and length is not None
    prefix = wire.SYMBOL_PREFIX_BYTES
    received: dict[int, bytes] = {}
    for esi, (flow, data, seq) in block.sources.items():
        size = len(data)
        received[esi] = b"".join((wire.pack_symbol_prefix(flow, size, seq), data, bytes(length - prefix - size)))
    for esi in sorted(block.repairs)[: k - len(block.sources)]:
        received[esi] = block.repairs[esi]
    return received


def code_for(k: int) -> BlockCode:
    # Column j of the generator depends only on k and j: one code per k serves every block of
    # that k, and its cache of loss-pattern inverses is shared across them.
    return block_code(k, wire.MAX_ESI + 1)


def deliveries(block: Block, rebuilt: dict[int, Any], now: float, stats: DecoderStats, drop: DropMaker) -> list[Event]:
    """The rebuilt datagrams of ``block`` as Delivery events in ESI order (a symbol whose prefix
    claims more bytes than it holds is dropped as ``inconsistent``); counts them in ``stats``
    and ``block.rebuilt``."""
    prefix = wire.SYMBOL_PREFIX_BYTES
    length = block.symbol_len
    assert length is not None
    delay = now - block.first_seen
    events: list[Event] = []
    for esi in sorted(rebuilt):
        symbol = rebuilt[esi]
        flow, size, seq = wire.unpack_symbol_prefix(symbol[:prefix].tobytes())
        if size + prefix > length:
            events.append(drop(DropReason.INCONSISTENT, f"rebuilt datagram {block.sbn}/{esi} claims {size} bytes"))
            continue
        data = symbol[prefix : prefix + size].tobytes()
        block.sources[esi] = (flow, data, seq)
        block.rebuilt += 1
        stats.delivered += 1
        stats.recovered += 1
        events.append(Delivery(flow, data, recovered=True, delay=delay, seq=seq, session=block.owner.id))
    return events


def rebuild_one(block: Block, now: float, stats: DecoderStats, drop: DropMaker) -> list[Event]:
    """Rebuild one block at once (with the code's cache of loss patterns)."""
    assert block.k is not None
    rebuilt = code_for(block.k).recover(received_symbols(block))
    return deliveries(block, rebuilt, now, stats, drop)


class RebuildQueue:
    """Decodable blocks of one batch, rebuilt together by :meth:`flush`."""

    def __init__(self, stats: DecoderStats, ledger: LossLedger):
        self.stats = stats
        self.ledger = ledger  # where a deferred report's counts wait (protocol.loss_ledger)
        self._pending: dict[int, Pending] = {}  # id(report) -> pending block
        #: Rebuild calls made and blocks they rebuilt, for the benchmark's batch-size figure.
        self.calls = 0
        self.blocks = 0

    def __bool__(self) -> bool:
        return bool(self._pending)

    def add(self, block: Block, now: float, report: BlockReport, deferred: bool = False) -> None:
        """``block`` is decodable and finished as recovered with ``report`` (its ``recovered``
        count assumed to be every missing datagram); its symbols are taken now."""
        self._pending[id(report)] = (block, now, received_symbols(block), report, deferred)

    def flush(self, events: list[Event], drop: DropMaker, *, within: bool = False) -> list[Event]:
        """Rebuild every pending block, one ``recover_many`` per shape, and return ``events``
        with each pending report preceded by its block's deliveries (and corrected if one of
        them had to be dropped)."""
        pending, self._pending = self._pending, {}
        if within:  # only the blocks whose reports are in ``events``; the others stay pending
            present = {id(event) for event in events}
            self._pending = {key: entry for key, entry in pending.items() if key not in present}
            pending = {key: entry for key, entry in pending.items() if key in present}
        by_shape: dict[tuple[int | None, int | None], list[Pending]] = {}
        for entry in pending.values():
            by_shape.setdefault((entry[0].k, entry[0].symbol_len), []).append(entry)
        replaced: dict[int, list[Event]] = {}
        for (k, _length), group in by_shape.items():
            assert k is not None
            code = code_for(k)
            if len(group) == 1:
                results = [code.recover(group[0][2])]  # one block: the pattern cache may help
            else:
                results = code.recover_many([entry[2] for entry in group])
            self.calls += 1
            self.blocks += len(group)
            for (block, now, _received, original, deferred), rebuilt in zip(group, results, strict=True):
                report = original
                expected = block.rebuilt
                block.rebuilt = 0
                out = deliveries(block, rebuilt, now, self.stats, drop)
                short = expected - block.rebuilt
                if short and deferred:  # its loss is counted when the ledger settles it
                    self.ledger.rebuilt_fewer(block.owner.id, block.sbn, short)
                elif short:  # a rebuilt datagram was dropped: it stays unrecovered
                    self.stats.unrecovered += short
                    report = dataclasses.replace(
                        report, recovered=block.rebuilt, unrecovered=report.unrecovered + short
                    )
                if not deferred:
                    out.append(report)
                replaced[id(original)] = out
        result: list[Event] = []
        for event in events:
            if type(event) is BlockReport and id(event) in replaced:
                result += replaced[id(event)]
            else:
                result.append(event)
        return result
