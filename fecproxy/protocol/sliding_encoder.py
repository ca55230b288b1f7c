"""Sans-IO sliding-window encoder (``fec.code: sliding``): datagrams and ``now`` in, packets out.

Each application datagram leaves at once as a sliding source packet (RFC 8681 §4.1.2: a 32-bit
source symbol id, ESI) and joins the *encoding window*, the most recent source symbols (RFC 8681
§1.1).  Every ``repair_interval`` source packets one repair packet follows: a random linear
combination over GF(2^8) of the whole window (:mod:`fecproxy.coding.sliding`), named by its
repair key, density, window size and first ESI (RFC 8681 §4.1.3).  The window then slides: it
keeps at most ``window`` symbols and none older than ``window_age``.  So a lost datagram is
repaired by the next repair packet that covers it, not at the end of a block.

When traffic pauses, the last datagrams would wait for repair until ``repair_interval`` more
arrive; ``flush`` bounds that wait: a repair packet is sent ``flush`` after the oldest datagram
no repair has covered yet (the block code's flush rule, for the same reason).

Repair keys run through REPAIR_KEY_CYCLE values: the receiver draws the same coefficients from
the key (RFC 8682), and a small cycle lets both sides cache them per key.
"""

from __future__ import annotations

import dataclasses
import math
from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from fecproxy.coding import sliding
from fecproxy.protocol import wire
from fecproxy.protocol.auth import Sealer
from fecproxy.protocol.encoder import EncoderSettings, EncoderStats
from fecproxy.protocol.events import DropReason
from fecproxy.protocol.ordering import FlowSequencer

#: 32 source packets: with one repair every 4 (25 % overhead) each datagram is covered by up to
#: 8 repair packets, enough to ride out a burst of several losses, while the receiver's system
#: stays small (≤ 32 unknowns).  Our choice, tuned by `fecproxy plan` on the links of the issue.
DEFAULT_WINDOW = 32
#: RFC 8681's NSS is 12 bits; we bound the window to 255 symbols so the receiver's system (rows ×
#: unknowns ≤ 255², right-hand sides ≤ 255 × max_datagram) stays small per session.
MAX_WINDOW = 255
#: A symbol older than 1 s no longer helps real-time traffic: its repair would come too late.
#: Common practice for interactive media (a one-way delay budget of ~150–400 ms, ITU-T G.114,
#: from memory), with room for slow links.
DEFAULT_WINDOW_AGE = 1.0
#: One repair packet every 4 source packets: 25 % overhead, as the block default k=16, m=4.
DEFAULT_REPAIR_INTERVAL = 4
#: Dense code (RFC 8681 §3.6: DT = 15, every coefficient non-zero): best recovery for small windows.
DEFAULT_DENSITY = sliding.MAX_DENSITY
#: Repair keys cycle through 256 values.  Keys only need to differ between repair packets over the
#: same window, and every repair packet follows new source packets (or, from the flush timer,
#: covers datagrams no repair covered yet), so windows never repeat.  Both sides cache one
#: coefficient stream per key (sliding.COEFFICIENT_CACHE_SIZE): with 256 keys the cache is warm
#: after 256 repair packets (about a second at 1 000 datagrams/s) and TinyMT32, ~1 µs a word in
#: Python, is then drawn no more; a cycle of 4096 measured 106 against 26 µs per datagram
#: encoded over the first 20 000 datagrams.  Our choice.
REPAIR_KEY_CYCLE = 256
#: The same bound as the block code's flush: 20 ms, one voice frame (see encoder.py).
DEFAULT_FLUSH_INTERVAL = 0.020


@dataclass(frozen=True)
class SlidingSettings:
    window: int = DEFAULT_WINDOW
    window_age: float = DEFAULT_WINDOW_AGE
    repair_interval: int = DEFAULT_REPAIR_INTERVAL
    flush: float = DEFAULT_FLUSH_INTERVAL
    density: int = DEFAULT_DENSITY
    max_datagram: int = wire.DEFAULT_MAX_DATAGRAM

    def __post_init__(self) -> None:
        if not 1 <= self.window <= MAX_WINDOW:
            raise ValueError(f"window must be 1..{MAX_WINDOW} source packets, got {self.window}")
        if not self.window_age > 0:
            raise ValueError(f"window_age must be positive, got {self.window_age}")
        if not 1 <= self.repair_interval <= self.window:
            raise ValueError(f"repair_interval must be 1..window ({self.window}), got {self.repair_interval}")
        if not self.flush > 0:
            raise ValueError(f"flush must be positive, got {self.flush}")
        if not 0 <= self.density <= sliding.MAX_DENSITY:
            raise ValueError(f"density must be 0..{sliding.MAX_DENSITY}, got {self.density}")
        if not 1 <= self.max_datagram <= wire.MAX_DATAGRAM_LIMIT:
            raise ValueError(f"max_datagram {self.max_datagram} outside 1..{wire.MAX_DATAGRAM_LIMIT}")

    @property
    def overhead(self) -> float:
        """Repair packets per source packet."""
        return 1 / self.repair_interval


def interval_for(reference: EncoderSettings) -> int:
    """The repair interval with the overhead of a block code (k, m): ceil(k / m), so the sliding
    code never sends more repair than m/k; how ``fec.adapt`` (which chooses m for k =
    ``fec.block_size``) sets the sliding code's interval.  m = 0: one repair per window."""
    if reference.repair <= 0:
        return MAX_WINDOW
    return max(1, math.ceil(reference.block_size / reference.repair))


class SlidingEncoder:
    """One direction's sliding-window encoder.  Not thread-safe; one per link direction.

    It offers the block encoder's surface to the shell and the feedback (``stats`` as
    :class:`EncoderStats`, ``settings`` as the configured block shape, ``update``), so a daemon
    runs either code through the same loops: ``settings`` is the block shape fec.adapt reasons
    about, ``sliding_settings`` the window in force.  With ``follow_repair`` (fec.adapt is on) an
    ``update`` with a new block shape sets the repair interval to that shape's overhead
    (:func:`interval_for`); otherwise the configured interval stays.
    """

    def __init__(
        self,
        settings: SlidingSettings,
        session: int,
        *,
        first_esi: int = 0,
        sealer: Sealer | None = None,
        reference: EncoderSettings | None = None,
        follow_repair: bool = False,
    ):
        if not 0 <= session <= 0xFFFFFFFF:
            raise ValueError(f"session {session} does not fit 32 bits")
        self.session = session
        self.sealer = sealer
        self.stats = EncoderStats()
        self.flushed_repairs = 0  # repair packets the flush timer sent (traffic paused)
        self.window_symbols = 0  # symbols in the encoding window now
        self.follow_repair = follow_repair
        self._reference = (
            reference
            if reference is not None
            else EncoderSettings(max_datagram=settings.max_datagram, interleave=1, size_classes=())
        )
        self._settings = settings
        self._next_esi = first_esi % wire.ESI_MODULUS
        self._sequences = FlowSequencer()  # each flow's datagrams numbered in the order taken
        #: The encoding window, oldest first: (ESI, time added, ring row, ADUI length).  The ADUIs
        #: themselves sit in ``_ring``, one zero-padded row each, so a repair symbol is one kernel
        #: call on a slice of it, with no per-packet stacking of the window's bytes.
        self._window: deque[tuple[int, float, int, int]] = deque()
        self._ring = np.zeros((settings.window, settings.max_datagram + wire.SYMBOL_PREFIX_BYTES), dtype=np.uint8)
        self._row_lengths = [0] * settings.window
        self._next_row = 0
        self._since_repair = 0  # source packets since the last repair packet
        self._uncovered_since: float | None = None  # time of the oldest datagram no repair covers
        self._next_key = 0
        self._longest = 0

    @property
    def settings(self) -> EncoderSettings:
        """The block shape this encoder stands for (what fec.adapt and the metrics read)."""
        return self._reference

    @property
    def sliding_settings(self) -> SlidingSettings:
        return self._settings

    def update(self, settings: SlidingSettings | EncoderSettings) -> None:
        """New window, interval, flush or density (SlidingSettings), or a new block shape
        (EncoderSettings: with ``follow_repair``, its overhead sets the interval): from the next
        packet on (the window shrinks at once if it is now too long)."""
        if isinstance(settings, EncoderSettings):
            self._reference = settings
            if not self.follow_repair:
                return
            interval = min(interval_for(settings), self._settings.window)
            settings = dataclasses.replace(self._settings, repair_interval=interval)
        self._settings = settings
        self._reshape_ring()
        self._slide(None)

    def control(self, body: bytes) -> bytes:
        """A control packet of this session carrying ``body``, sealed like every other packet."""
        return self._sealed([wire.encode_control(self.session, body)])[0]

    def _sealed(self, packets: list[bytes]) -> list[bytes]:
        sealer = self.sealer
        if sealer is None or not packets:
            return packets
        return [sealer.seal(packet) for packet in packets]

    def take_longest_datagram(self) -> int:
        """The longest datagram sent since the last call (sizes repair packets, as for blocks)."""
        longest, self._longest = self._longest, 0
        return longest

    def send(self, datagram: bytes, flow: int, now: float) -> list[bytes]:
        return self.send_batch(((datagram, flow),), now)

    def send_batch(self, items: Iterable[tuple[bytes, int]], now: float) -> list[bytes]:
        """Source packets for each datagram, each followed by a repair packet when one is due."""
        settings, stats = self._settings, self.stats
        out: list[bytes] = []
        for datagram, flow in items:
            size = len(datagram)
            if size > settings.max_datagram:
                stats.dropped[DropReason.OVERSIZE] = stats.dropped.get(DropReason.OVERSIZE, 0) + 1
                continue
            esi = self._next_esi
            self._next_esi = (esi + 1) % wire.ESI_MODULUS
            seq = self._sequences.next(flow)
            packet = wire.pack_sliding_source(self.session, esi, flow << wire.FLOW_SHIFT, seq) + datagram
            out.append(packet)
            stats.source_packets += 1
            stats.source_bytes += len(packet)
            stats.datagram_bytes += size
            if size > self._longest:
                self._longest = size
            self._store(esi, now, wire.pack_symbol_prefix(flow, size, seq) + datagram)
            self._slide(now)
            if self._uncovered_since is None:
                self._uncovered_since = now
            self._since_repair += 1
            if self._since_repair >= settings.repair_interval:
                out.append(self._repair())
        return self._sealed(out)

    def _store(self, esi: int, now: float, adui: bytes) -> None:
        """Put an ADUI in the next ring row (the oldest window entry's, which ``_slide`` drops)."""
        row, length = self._next_row, len(adui)
        self._next_row = (row + 1) % self._ring.shape[0]
        ring = self._ring
        ring[row, :length] = np.frombuffer(adui, dtype=np.uint8)
        old = self._row_lengths[row]
        if old > length:
            ring[row, length:old] = 0
        self._row_lengths[row] = length
        self._window.append((esi, now, row, length))

    def _reshape_ring(self) -> None:
        """A new window size or datagram limit: the kept entries move to a ring of the new shape."""
        settings = self._settings
        rows, width = settings.window, settings.max_datagram + wire.SYMBOL_PREFIX_BYTES
        if self._ring.shape == (rows, width):
            return
        kept = list(self._window)[-rows:]
        ring = np.zeros((rows, max(width, max((e[3] for e in kept), default=0))), dtype=np.uint8)
        lengths = [0] * rows
        window: deque[tuple[int, float, int, int]] = deque()
        for row, (esi, added, old_row, length) in enumerate(kept):
            ring[row, :length] = self._ring[old_row, :length]
            lengths[row] = length
            window.append((esi, added, row, length))
        self._ring, self._row_lengths, self._window = ring, lengths, window
        self._next_row = len(kept) % rows

    def _slide(self, now: float | None) -> None:
        """Keep at most ``window`` symbols, none older than ``window_age`` (when ``now`` is known)."""
        window, settings = self._window, self._settings
        while len(window) > settings.window:
            window.popleft()
        if now is not None:
            oldest = now - settings.window_age
            while window and window[0][1] < oldest:
                window.popleft()
        self.window_symbols = len(window)

    def _repair(self) -> bytes:
        """One repair packet over the whole window (RFC 8681 §3.6 coefficients from a fresh key)."""
        settings = self._settings
        key = self._next_key
        self._next_key = (key + 1) % REPAIR_KEY_CYCLE
        window = self._window
        count = len(window)
        coefs = sliding.coefficients(key, count, settings.density)
        length = max(entry[3] for entry in window)
        first_row, last_row = window[0][2], window[-1][2]
        if last_row - first_row == count - 1:  # the window's rows are one slice, in order
            symbol = sliding.combine(coefs, self._ring[first_row : last_row + 1, :length])
        else:  # wrapped: every row, each with its entry's coefficient (0 outside the window)
            spread = np.zeros(self._ring.shape[0], dtype=np.uint8)
            spread[[entry[2] for entry in window]] = coefs
            symbol = sliding.combine(spread, self._ring[:, :length])
        packet = wire.pack_sliding_repair(self.session, window[0][0], key, settings.density << wire.NSS_BITS | count)
        packet += symbol.tobytes()
        self._since_repair = 0
        self._uncovered_since = None
        self.stats.repair_packets += 1
        self.stats.repair_bytes += len(packet)
        return packet

    def next_deadline(self) -> float | None:
        """When the flush timer sends a repair for datagrams no repair covers yet."""
        if self._uncovered_since is None:
            return None
        return self._uncovered_since + self._settings.flush

    def on_timer(self, now: float) -> list[bytes]:
        deadline = self.next_deadline()
        if deadline is None or now < deadline:
            return []
        self._slide(now)
        if not self._window:  # everything aged out: nothing left to protect
            self._since_repair, self._uncovered_since = 0, None
            return []
        self.flushed_repairs += 1
        return self._sealed([self._repair()])

    def close(self) -> list[bytes]:
        """On shutdown: a last repair packet for datagrams no repair covers yet."""
        if self._uncovered_since is None or not self._window:
            return []
        return self._sealed([self._repair()])
