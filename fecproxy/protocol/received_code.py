"""The code the peer sends with, as its repair packets show it: k and m of the blocks received.

A receiver is never told the peer's configured k and m; it sees them in repair packets (each
carries its block's k, and its ESI k..k+m−1).  An operator comparing the two sides needs that
figure, so the decoder keeps it here, at O(1) per repair packet.

What is kept: the largest code among the recent blocks.  Blocks the peer's flush timer closed
early carry a shortened k' (and m' = ceil(m·k'/k)), and a block whose last repair packets were
lost shows too small an m; at low rates or on a lossy link those alternate with full blocks, and
showing whichever came last would flicker.  So a block with a larger k, or the same k and at
least the same m, replaces the figure at once; a smaller one only once the figure is
CODE_WINDOW_BLOCKS blocks old (the peer then sends nothing larger, e.g. after it lowered k or m).
m is the highest repair ESI seen in the block − k + 1.

**The code as configured.**  The figure above follows whatever blocks arrive, and at telemetry
rates every block may be closed short by the peer's flush timer (k'=1 m'=1 for a peer configured
16/8).  A source packet flagged END is the last of a block filled to its configured k, so its
ESI + 1 *is* the configured k; the repair packets of such a *full* block show the configured m.
``configured`` keeps the largest full block's (k, m), by the same replacement rule; it is None
("short blocks only so far") until a full block's repair is seen.

``settled`` is the figure as it stood when a later block's repair packets began: by then every
repair packet of the figure's block has had its turn, so a log line taken from it never shows
an m still growing (the first repair packet of a block alone says m ≥ 1).
"""

from __future__ import annotations

from fecproxy.protocol.wire import SBN_MODULUS

#: Full blocks remembered while waiting for their repair packets: repair follows its block's
#: source within a block span, so a handful covers interleaving (fec.interleave ≤ 16) and reordering.
FULL_BLOCKS_REMEMBERED = 32
#: Blocks after which a smaller block's code replaces the figure: long enough to span several
#: flush-closed blocks between full ones, short enough (a few seconds at telemetry rates) to follow
#: a peer whose k was lowered (common practice, no source).
CODE_WINDOW_BLOCKS = 64


class ReceivedCode:
    """``k`` and ``m`` of the peer's code as seen in repair packets; None before any."""

    __slots__ = ("k", "m", "settled", "_sbn", "configured", "_configured_sbn", "_full")

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        """A new peer session: what the old one sent says nothing about the new one."""
        self.k: int | None = None
        self.m: int | None = None
        self.settled: tuple[int, int] | None = None
        self._sbn: int | None = None
        self.configured: tuple[int, int] | None = None  # the largest full block's (k, m)
        self._configured_sbn: int | None = None
        self._full: dict[int, int] = {}  # sbn -> k of recent blocks known full (END flag seen)

    def note_full(self, sbn: int, k: int) -> None:
        """A source packet flagged END: block ``sbn`` was filled to the configured ``k``."""
        full = self._full
        full[sbn] = k
        if len(full) > FULL_BLOCKS_REMEMBERED:
            del full[next(iter(full))]  # the oldest noted (dicts keep insertion order)

    def _note_configured(self, sbn: int, k: int, m: int) -> None:
        if self._full.get(sbn) != k:
            return
        current = self.configured
        if current is None or sbn == self._configured_sbn:
            if current is None or (k == current[0] and m > current[1]):
                self.configured, self._configured_sbn = (k, m), sbn
            return
        ahead = (sbn - (self._configured_sbn or 0)) % SBN_MODULUS
        if ahead >= SBN_MODULUS // 2:
            return  # an older block arriving late
        if (k, m) >= current or ahead > CODE_WINDOW_BLOCKS:
            self.configured, self._configured_sbn = (k, m), sbn

    def note(self, sbn: int, k: int, esi: int) -> tuple[int, int] | None:
        """A repair packet of block ``sbn`` with ``k`` source symbols and ESI ``esi`` (≥ k).

        Returns the settled figure when this packet changed it (else None): the one moment
        worth telling the operator."""
        m = esi - k + 1
        if self._full:
            self._note_configured(sbn, k, m)
        if sbn == self._sbn:
            if k == self.k and self.m is not None and m > self.m:
                self.m = m
            return None
        changed = None
        if self._sbn is not None and self.k is not None and self.m is not None:
            ahead = (sbn - self._sbn) % SBN_MODULUS
            if ahead >= SBN_MODULUS // 2:
                return None  # an older block arriving late
            settled = (self.k, self.m)
            if settled != self.settled:
                self.settled = changed = settled
            if (k, m) < settled and ahead <= CODE_WINDOW_BLOCKS:
                return changed  # a short block, or a block whose last repair packets are lost or still to come
        self.k, self.m, self._sbn = k, m, sbn
        return changed
