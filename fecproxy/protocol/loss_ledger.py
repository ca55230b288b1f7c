"""Loss counted by what never came, after reordering has had its time.

A block's loss is not final when the block ends: a repair packet that overtakes the block's last
source packets completes it by a rebuild, and the overtaken packets arrive a moment later; a
block given up at its hold time may still see its stragglers.  Counted at once, such packets
would be "lost" although they came — and the loss reports would feed more repair, which
overtakes more.  So a block that ended with positions missing is *settled* only REORDER_TOLERANCE
hold time(s) after its first packet: a source packet of it that arrives before then is counted as
having come (late, not lost).

A run of whole blocks that never showed a packet (an outage) is counted from the block numbers:
when a block arrives more than one number past the newest seen, the blocks between are a *gap*,
each assumed to hold as many datagrams as the peer's last block whose size is known (its block
shape).  A block of the gap that shows up later (reordering, interleaving) is taken out of it and
counted as itself.  The gap is settled like a block.

Pure: the session table feeds it and asks for what is due; ``now`` in, settled figures out.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field

from fecproxy.protocol.events import BlockReport

#: A block with missing positions is settled this many hold times after its first packet: the
#: time the block itself may wait for its packets (RFC 6364 §4.6: no decoding failure before the
#: repair window has passed) is also the tolerance for its stragglers, so the counters lag by at
#: most what a block given up always lagged (our own choice: a packet later than the hold time is
#: useless to the decoder anyway).
REORDER_TOLERANCE = 1.0
#: Blocks awaiting settlement at once (all sessions); beyond, the oldest is settled early.  At
#: 50 000 datagrams/s in blocks of 16 with every block losing a packet, 1 s holds ~3 000 blocks.
MAX_PENDING_BLOCKS = 8192
#: Gaps awaiting settlement at once; beyond, the oldest is settled early.
MAX_PENDING_GAPS = 64
#: Blocks given up whose start is remembered, to tell how late their repair came.
MAX_GIVEN_UP = 1024
#: Blocks of one gap that may still show up and be taken out of it (the rest are lost for sure:
#: further back than the decoder would open a block).
MAX_GAP_CLAIMS = 4096


@dataclass
class Pending:
    """A finished block whose loss is not final yet."""

    report: BlockReport
    due: float
    delivered: int  # mask of positions delivered (directly, rebuilt, or late)
    lost: int
    recovered: int
    unrecovered: int
    arrived: int


@dataclass
class Gap:
    """Blocks ``first`` .. ``first + count − 1`` of a session, never seen, ``k`` datagrams each."""

    session: int
    first: int
    count: int
    k: int
    due: float
    claimed: set[int] = field(default_factory=set)


class LossLedger:
    """Pending block losses and gaps; ``settle(now)`` returns what became final."""

    def __init__(self) -> None:
        self._blocks: OrderedDict[tuple[int, int], Pending] = OrderedDict()
        self._gaps: list[Gap] = []
        self._given_up: OrderedDict[tuple[int, int], float] = OrderedDict()

    def defer(self, session: int, report: BlockReport, delivered: int, due: float) -> list[Pending]:
        """Hold ``report`` (a block that ended with positions missing) until ``due``; returns
        pending blocks settled early to stay in bounds."""
        self._blocks[(session, report.sbn)] = Pending(
            report, due, delivered, report.lost, report.recovered, report.unrecovered, report.arrived_mask
        )
        early = []
        while len(self._blocks) > MAX_PENDING_BLOCKS:
            early.append(self._blocks.popitem(last=False)[1])
        return early

    def late_source(self, session: int, sbn: int, esi: int) -> bool:
        """A source packet of a finished block came late: True if that block is pending, where it
        now counts as having come (its datagram is delivered by the caller when it never was)."""
        pending = self._blocks.get((session, sbn))
        if pending is None or pending.arrived >> esi & 1 or esi >= pending.report.span:
            return False
        pending.arrived |= 1 << esi
        pending.lost -= 1
        if pending.delivered >> esi & 1:
            pending.recovered -= 1  # it had been rebuilt: it was late, not lost
        else:
            pending.unrecovered -= 1
            pending.delivered |= 1 << esi
        return True

    def rebuilt_fewer(self, session: int, sbn: int, short: int) -> None:
        """A pending recovered block rebuilt ``short`` datagrams fewer than its report assumed
        (batched rebuilds, protocol.rebuilds): they stay unrecovered."""
        pending = self._blocks.get((session, sbn))
        if pending is not None:
            pending.recovered -= short
            pending.unrecovered += short

    def note_gap(self, session: int, first: int, count: int, k: int, due: float) -> list[Gap]:
        """Blocks ``first`` .. ``first + count − 1`` were skipped; returns gaps settled early."""
        self._gaps.append(Gap(session, first, count, k, due))
        early = []
        while len(self._gaps) > MAX_PENDING_GAPS:
            early.append(self._gaps.pop(0))
        return early

    def claim(self, session: int, sbn: int, modulus: int) -> None:
        """Block ``sbn`` showed up: if a gap counted it, it no longer does."""
        for gap in self._gaps:
            offset = (sbn - gap.first) % modulus
            if gap.session == session and offset < gap.count and len(gap.claimed) < MAX_GAP_CLAIMS:
                gap.claimed.add(offset)

    def given_up(self, session: int, sbn: int, first_seen: float) -> None:
        """Block ``sbn`` was given up (expired or evicted); remember when it began."""
        self._given_up[(session, sbn)] = first_seen
        while len(self._given_up) > MAX_GIVEN_UP:
            self._given_up.popitem(last=False)

    def started(self, session: int, sbn: int) -> float | None:
        """When a block given up recently had its first packet (None if not known)."""
        return self._given_up.get((session, sbn))

    def next_due(self) -> float | None:
        dues = [pending.due for pending in self._blocks.values()][:1] + [gap.due for gap in self._gaps]
        return min(dues) if dues else None

    def settle(self, now: float | None) -> tuple[list[Pending], list[Gap]]:
        """What is due at ``now`` (everything when ``now`` is None: shutdown)."""
        blocks = []
        while self._blocks:
            pending = next(iter(self._blocks.values()))
            if now is not None and pending.due > now:
                break
            blocks.append(self._blocks.popitem(last=False)[1])
        gaps = [gap for gap in self._gaps if now is None or gap.due <= now]
        self._gaps = [gap for gap in self._gaps if not (now is None or gap.due <= now)]
        return blocks, gaps


def gap_lost(gap: Gap) -> int:
    """Datagrams a settled gap lost: its blocks that never showed up, ``k`` each."""
    return (gap.count - len(gap.claimed)) * gap.k


#: One warning per kind of misconfiguration per minute: a pair set up wrong does it on every block,
#: and the counters carry the rate (as auth.FAILURE_LOG_INTERVAL_S for key faults).
MISCONFIG_LOG_INTERVAL_S = 60.0


class MisconfigNotice:
    """Rate limit for misconfiguration warnings: ``note(kind, now)`` says whether to warn now, and
    how many were held back since the last warning of that kind."""

    def __init__(self, interval: float = MISCONFIG_LOG_INTERVAL_S) -> None:
        self.interval = interval
        self._last: dict[str, float] = {}
        self._held: dict[str, int] = {}

    def note(self, kind: str, now: float) -> str | None:
        last = self._last.get(kind)
        if last is not None and now - last < self.interval:
            self._held[kind] = self._held.get(kind, 0) + 1
            return None
        self._last[kind] = now
        held = self._held.pop(kind, 0)
        return f"{held} more since the last warning" if held else "first in this interval"
