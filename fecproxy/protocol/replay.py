"""Anti-replay window over authenticated packet sequence numbers (RFC 4303 §3.4.3, RFC 6479 §2).

An attacker on a shared radio channel can record a valid packet and send it again; its tag is
still right.  Every protected packet therefore carries a 64-bit sequence number, strictly
increasing per session at the sender, and the receiver keeps a sliding window of the numbers it
has accepted:

* a number above the highest accepted moves the window forward (RFC 4303 §3.4.3);
* a number inside the window is accepted once, a second time it is a replay;
* a number at or below ``highest − window`` is too old to tell, and is rejected.

The window moves only *after* the packet's tag has been checked (RFC 4303 §3.4.3: "the receive
window is updated only if the integrity verification succeeds"), so :meth:`ReplayWindow.check`
is a pure query and :meth:`ReplayWindow.commit` the separate update: a forged packet with a huge
sequence number cannot push the window away from the real traffic.

Layout (RFC 6479 §2): a ring of M blocks of 64 bits.  Bit ``seq mod 64`` of block
``(seq // 64) mod M`` records ``seq``.  Moving forward clears the blocks the window enters, and
never shifts a bitmap, so an update costs O(1) however far the window jumps (at most M blocks are
cleared).  One block is always partly ahead of the highest number, so the guaranteed window is
``(M − 1) · 64`` numbers.

The sequence numbers are the sender's packet counter, not SBN/ESI: the order in which blocks,
repair packets or an interleaver put packets on the air does not matter, only how far behind the
highest packet seen a late one arrives.
"""

from __future__ import annotations

from enum import Enum

#: Bits per ring block (RFC 6479 §2 uses the machine word; Python ints of 64 bits stay small).
BLOCK_BITS = 64
_SHIFT = BLOCK_BITS.bit_length() - 1  # sequence >> _SHIFT is the block number
_BIT = BLOCK_BITS - 1  # sequence & _BIT is the bit within its block
#: RFC 4303 §3.4.3: the window MUST be at least 32 and SHOULD be at least 64 packets wide.
MIN_WINDOW = 64
#: 16 384 packets.  A packet later than the decoder's hold time (500 ms by default) no longer
#: helps any block, so the window need only cover rate × hold: 16 384 packets is 500 ms at
#: 32 000 packets/s, well above what a data radio or satellite modem carries, and far above the
#: reordering an interleaver causes (depth D × at most 255 packets per block).  A packet rejected
#: as too old would have been useless anyway.  Cost: 257 ring blocks (~ 8 KiB of Python ints)
#: per session.
DEFAULT_WINDOW = 16_384
#: Sequence numbers are 64 bits on the wire.
SEQUENCE_LIMIT = 1 << 64


class Verdict(Enum):
    """What the window says of a sequence number; both rejections count as ``replay``."""

    FRESH = "fresh"
    DUPLICATE = "duplicate"  # inside the window and already accepted
    TOO_OLD = "too_old"  # at or below highest − window: cannot be told from a replay

    @property
    def accepted(self) -> bool:
        return self is Verdict.FRESH


class ReplayWindow:
    """The receive window of one session.  ``check`` first, ``commit`` only after the tag passed."""

    __slots__ = ("window", "_blocks", "_ring", "highest")

    def __init__(self, window: int = DEFAULT_WINDOW):
        if window < MIN_WINDOW:
            raise ValueError(f"window {window} is below the minimum of {MIN_WINDOW} (RFC 4303 §3.4.3)")
        self._ring = -(-window // BLOCK_BITS) + 1  # M: one spare block for the partly filled one
        self.window = (self._ring - 1) * BLOCK_BITS  # rounded up to whole blocks
        self._blocks = [0] * self._ring
        self.highest: int | None = None  # None until the session's first authenticated packet

    def check(self, sequence: int) -> Verdict:
        """Would ``sequence`` be accepted now?  Changes nothing."""
        highest = self.highest
        if highest is None or sequence > highest:
            return Verdict.FRESH
        if highest - sequence >= self.window:
            return Verdict.TOO_OLD
        if self._blocks[(sequence >> _SHIFT) % self._ring] >> (sequence & _BIT) & 1:
            return Verdict.DUPLICATE
        return Verdict.FRESH

    def commit(self, sequence: int) -> None:
        """Record an authenticated ``sequence`` (one that :meth:`check` called fresh)."""
        if not 0 <= sequence < SEQUENCE_LIMIT:
            raise ValueError(f"sequence {sequence} is outside 0..2^64−1")
        highest = self.highest
        ring = self._ring
        if highest is None:
            self._blocks = [0] * ring
            self.highest = sequence
        elif sequence > highest:
            top_block = highest >> _SHIFT
            entered = min((sequence >> _SHIFT) - top_block, ring)
            blocks = self._blocks
            for step in range(1, entered + 1):
                blocks[(top_block + step) % ring] = 0
            self.highest = sequence
        elif highest - sequence >= self.window:
            raise ValueError(f"sequence {sequence} is too old to commit (highest {highest})")
        self._blocks[(sequence >> _SHIFT) % ring] |= 1 << (sequence & _BIT)
