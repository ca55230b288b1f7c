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

``settled`` is the figure as it stood when a later block's repair packets began: by then every
repair packet of the figure's block has had its turn, so a log line taken from it never shows
an m still growing (the first repair packet of a block alone says m ≥ 1).
"""

from __future__ import annotations

from fecproxy.protocol.wire import SBN_MODULUS

#: Blocks after which a smaller block's code replaces the figure: long enough to span several
#: flush-closed blocks between full ones, short enough (a few seconds at telemetry rates) to follow
#: a peer whose k was lowered (common practice, no source).
CODE_WINDOW_BLOCKS = 64


class ReceivedCode:
    """``k`` and ``m`` of the peer's code as seen in repair packets; None before any."""

    __slots__ = ("k", "m", "settled", "_sbn")

    def __init__(self) -> None:
        self.reset()

    def reset(self) -> None:
        """A new peer session: what the old one sent says nothing about the new one."""
        self.k: int | None = None
        self.m: int | None = None
        self.settled: tuple[int, int] | None = None
        self._sbn: int | None = None

    def note(self, sbn: int, k: int, esi: int) -> tuple[int, int] | None:
        """A repair packet of block ``sbn`` with ``k`` source symbols and ESI ``esi`` (≥ k).

        Returns the settled figure when this packet changed it (else None): the one moment
        worth telling the operator."""
        m = esi - k + 1
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
