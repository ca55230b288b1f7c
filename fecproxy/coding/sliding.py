"""The sliding-window random linear code of RFC 8681 (RLC over GF(2^8)), as numpy arithmetic.

A repair symbol is a linear combination of the source symbols of the *encoding window*, the
most recent source symbols the sender holds (RFC 8681 §1.1, §3.1); its coefficients are not
sent but drawn from TinyMT32 (RFC 8682) seeded with the repair symbol's 16-bit key, so a repair
packet carries only (key, density threshold DT, number of source symbols NSS, first source
symbol id FSS_ESI) — RFC 8681 §4.1.3 — and the receiver draws the same coefficients.

* :func:`generate_coding_coefficients` is RFC 8681 §3.6 (its Figure 3) for both fields the
  RFC defines: m = 8, GF(2^8) (coefficients 1..255, or 0 with probability 1 − (DT+1)/16), and
  m = 1, GF(2) (coefficients 0/1).  The 8-bit draws are ``rand256``, the 4-bit density draws
  ``rand16`` (RFC 8681 §3.6; their first values are RFC 8681 Appendix A).
* The field is GF(2^8) on x^8+x^4+x^3+x^2+1 (RFC 8681 §3.7), the very field of the block code
  (RFC 5510 §8.1), so :mod:`fecproxy.coding.gf256` does all arithmetic; GF(2) is its subfield
  {0, 1}, so m = 1 coefficients combine with the same kernels.
* Source symbols are ADUIs (RFC 8681 §3.2: flow id ‖ length ‖ datagram ‖ zero padding) as the
  block code already frames datagrams (:func:`fecproxy.protocol.wire.pack_symbol_prefix`, our
  flow id widened to 3 bytes).  A repair symbol is as long as the longest ADUI of its window;
  shorter ones count as zero-padded to it (RFC 8681 §3.2 pads to a common size E; we pad per
  repair symbol, which is the same algebra with less airtime).
* :class:`WindowSystem` is the receiver's linear system over the decoding window, kept in
  reduced row-echelon form and solved incrementally (Gaussian elimination over GF(2^8)) as
  equations and source symbols arrive: a lost symbol is rebuilt the moment it is determined.

Every operation on symbol bytes is a whole-array numpy step; the only Python loops run over
symbols or rows (bounded by the window), never over the bytes of a packet.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Sequence

import numpy as np

from fecproxy.coding import gf256
from fecproxy.coding.tinymt32 import TinyMT32

#: RFC 8681 §3.6: DT is 4 bits; DT = 15 makes every coefficient non-zero (the dense code).
MAX_DENSITY = 15
#: RFC 8681 §3.6 defines m = 1 (GF(2)) and m = 8 (GF(2^8)).
FIELD_BITS = (1, 8)
#: RFC 8681 §4.1.3: the repair key is 16 bits.
MAX_REPAIR_KEY = 0xFFFF
#: RFC 8681 §4.1.3: NSS is 12 bits, so an encoding window holds at most 4095 source symbols.
MAX_WINDOW_SYMBOLS = 0xFFF
#: Coefficient streams kept by :func:`coefficients`: one entry per (key, DT), each up to the
#: longest window asked for (≤ 255 bytes at our bounds) plus a 16-byte generator state.  The
#: sender cycles its keys through REPAIR_KEY_CYCLE values, so both sides hit this cache after the
#: first cycle; 4096 entries bound it at ~1.2 MiB.
COEFFICIENT_CACHE_SIZE = 4096


class InconsistentEquation(ValueError):
    """An equation that contradicts what the system holds (a symbol longer than its repair)."""


def _draw_coefficient(generator: TinyMT32, dt: int, m: int) -> int:
    """One coefficient by the rules of RFC 8681 §3.6 (Figure 3)."""
    if m == 1:
        if dt == MAX_DENSITY:
            return 1
        return 1 if generator.rand16() <= dt else 0
    if dt != MAX_DENSITY and generator.rand16() > dt:
        return 0
    value = 0
    while value == 0:  # coefficient 0 is avoided so every drawn symbol is included
        value = generator.rand256()
    return value


def generate_coding_coefficients(repair_key: int, count: int, dt: int, m: int = 8) -> np.ndarray:
    """RFC 8681 §3.6: the ``count`` coding coefficients of the repair symbol with ``repair_key``.

    ``dt`` (0..15) sets the density: each coefficient is non-zero with probability (DT+1)/16.
    ``m`` is 8 (GF(2^8)) or 1 (GF(2)); the coefficients come back as uint8 either way.
    """
    if not 0 <= dt <= MAX_DENSITY:
        raise ValueError(f"density threshold {dt} outside 0..{MAX_DENSITY}")
    if m not in FIELD_BITS:
        raise ValueError(f"field parameter m={m}; RFC 8681 defines only {FIELD_BITS}")
    if not 0 <= repair_key <= MAX_REPAIR_KEY:
        raise ValueError(f"repair key {repair_key} does not fit 16 bits")
    if count < 0:
        raise ValueError(f"coefficient count {count} is negative")
    if m == 1 and dt == MAX_DENSITY:
        return np.ones(count, dtype=np.uint8)  # RFC 8681 §3.6: all 1, the key is not used
    generator = TinyMT32(repair_key)
    return np.fromiter((_draw_coefficient(generator, dt, m) for _ in range(count)), dtype=np.uint8, count=count)


class _Stream:
    """The coefficients of one (key, DT) drawn so far, and the generator to draw more.

    The coefficients of a window of n symbols are the first n of the key's stream (each draw
    depends only on the draws before it), so one stream serves every window size.
    """

    __slots__ = ("generator", "values", "dt")

    def __init__(self, repair_key: int, dt: int):
        self.generator = TinyMT32(repair_key)
        self.values = np.empty(0, dtype=np.uint8)
        self.dt = dt

    def prefix(self, count: int) -> np.ndarray:
        have = self.values.size
        if have < count:
            more = np.fromiter(
                (_draw_coefficient(self.generator, self.dt, 8) for _ in range(count - have)),
                dtype=np.uint8,
                count=count - have,
            )
            self.values = np.concatenate([self.values, more])
            self.values.setflags(write=False)
        return self.values[:count]


_streams: OrderedDict[tuple[int, int], _Stream] = OrderedDict()


def coefficients(repair_key: int, count: int, dt: int = MAX_DENSITY) -> np.ndarray:
    """Read-only GF(2^8) coefficients, equal to ``generate_coding_coefficients(key, count, dt, 8)``,
    from a bounded cache of coefficient streams (drawing TinyMT32 costs ~1 µs a word in Python)."""
    if not 0 <= dt <= MAX_DENSITY or not 0 <= repair_key <= MAX_REPAIR_KEY or count < 0:
        return generate_coding_coefficients(repair_key, count, dt)  # raises the precise error
    key = (repair_key, dt)
    stream = _streams.get(key)
    if stream is None:
        stream = _streams[key] = _Stream(repair_key, dt)
        if len(_streams) > COEFFICIENT_CACHE_SIZE:
            _streams.popitem(last=False)
    else:
        _streams.move_to_end(key)
    return stream.prefix(count)


def stack_symbols(symbols: Sequence[bytes | np.ndarray], length: int) -> np.ndarray:
    """(len(symbols), length) uint8 array, each symbol zero-padded to ``length`` (one copy each)."""
    out = np.zeros((len(symbols), length), dtype=np.uint8)
    for row, symbol in enumerate(symbols):
        view = symbol if isinstance(symbol, np.ndarray) else np.frombuffer(symbol, dtype=np.uint8)
        out[row, : view.size] = view
    return out


def combine(coefs: np.ndarray, symbols: np.ndarray) -> np.ndarray:
    """XOR_i coefs[i] · symbols[i] over GF(2^8): one repair symbol from its window's symbols."""
    coefs = np.asarray(coefs, dtype=np.uint8)
    if symbols.shape[0] != coefs.size:
        raise ValueError(f"{coefs.size} coefficients for {symbols.shape[0]} symbols")
    combined: np.ndarray = gf256.Multiplier(coefs[None, :])(symbols)[0]
    return combined


def encode_repair(symbols: Sequence[bytes | np.ndarray], repair_key: int, dt: int = MAX_DENSITY) -> bytes:
    """The repair symbol over ``symbols`` (the encoding window, oldest first) for ``repair_key``:
    as long as the longest of them (RFC 8681 §3.2 zero padding)."""
    if not symbols:
        raise ValueError("an encoding window needs at least one source symbol")
    if len(symbols) > MAX_WINDOW_SYMBOLS:
        raise ValueError(f"window of {len(symbols)} symbols exceeds the 12-bit NSS ({MAX_WINDOW_SYMBOLS})")
    length = max(len(symbol) for symbol in symbols)
    return combine(coefficients(repair_key, len(symbols), dt), stack_symbols(symbols, length)).tobytes()


def _scale_rows(factors: np.ndarray, row: np.ndarray) -> np.ndarray:
    """Outer product over GF(2^8): out[r] = factors[r] · row."""
    scaled: np.ndarray = gf256.MUL[factors[:, None], row[None, :]]
    return scaled


def _combine_rows(factors: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """XOR_r factors[r] · rows[r] over GF(2^8), for a few rows (the pivots a new row meets)."""
    combined: np.ndarray = np.bitwise_xor.reduce(gf256.MUL[factors[:, None], rows], axis=0)
    return combined


class WindowSystem:
    """The decoder's linear system over GF(2^8): unknown source symbols, equations from repair.

    Symbols are identified by their source symbol id (ESI, an int that grows along the stream).
    ``add_known`` gives a symbol that arrived (or was rebuilt elsewhere), ``add_equation`` a
    repair symbol with its coefficients over consecutive ESIs; both return the symbols that
    became determined, ``(esi, symbol bytes)``.  The equations are kept in reduced row-echelon
    form over the unknown columns, so a new equation is reduced in one pass (every pivot column
    is zero in every other row), a row with a single non-zero coefficient *is* a solved symbol,
    and solving never touches the other rows.  ``forget_before`` drops what slid out of the
    window.  Size is the caller's to bound: rows ≤ unknown columns, and the decoder keeps the
    unknowns within its window.  Solved symbols come back padded to the system's width: the
    caller reads their length from the ADUI prefix and checks the padding is zero.
    """

    def __init__(self) -> None:
        self.known: dict[int, np.ndarray] = {}
        self._columns: list[int] = []  # unknown ESIs, column order of the matrix
        self._column_of: dict[int, int] = {}
        self._coefs = np.zeros((0, 0), dtype=np.uint8)  # rows × unknown columns, RREF
        self._rhs = np.zeros((0, 0), dtype=np.uint8)  # rows × width
        self._pivots: list[int] = []  # pivot column index of each row
        self.redundant = 0  # equations that added nothing (every unknown already determined)
        self._newest_known = -(1 << 62)
        self._unordered = False  # some known ESI was added behind a newer one

    @property
    def rows(self) -> int:
        return len(self._pivots)

    @property
    def unknowns(self) -> tuple[int, ...]:
        return tuple(self._columns)

    @property
    def width(self) -> int:
        return self._rhs.shape[1]

    def _note_known(self, esi: int) -> None:
        if esi < self._newest_known:
            self._unordered = True
        else:
            self._newest_known = esi

    def held_bytes(self) -> int:
        """Bytes of symbol data the system holds (for the decoder's memory budget)."""
        return sum(symbol.nbytes for symbol in self.known.values()) + self._rhs.nbytes + self._coefs.nbytes

    # --- inputs ------------------------------------------------------------------------------

    def add_known(self, esi: int, symbol: bytes | np.ndarray) -> list[tuple[int, bytes]]:
        """A source symbol that arrived: stored, and eliminated from the equations that need it."""
        array = np.frombuffer(symbol, dtype=np.uint8) if not isinstance(symbol, np.ndarray) else symbol
        if esi in self.known:
            return []
        self._note_known(esi)
        self.known[esi] = array
        column = self._column_of.get(esi)
        if column is None:
            return []
        return self._substitute(column, array)

    def add_equation(self, first_esi: int, coefs: np.ndarray, rhs: bytes | np.ndarray) -> list[tuple[int, bytes]]:
        """A repair symbol ``rhs`` = XOR_i coefs[i] · symbol[first_esi + i]; returns what it solved.

        Raises InconsistentEquation when a known symbol of its window is longer than ``rhs``
        (a repair symbol is as long as its window's longest symbol, so this packet is not one).
        """
        rhs_array = np.array(np.frombuffer(rhs, dtype=np.uint8) if not isinstance(rhs, np.ndarray) else rhs)
        length = rhs_array.size
        known_rows: list[np.ndarray] = []
        known_coefs: list[int] = []
        unknown: dict[int, int] = {}
        for offset in np.flatnonzero(coefs).tolist():
            esi = first_esi + offset
            symbol = self.known.get(esi)
            if symbol is None:
                unknown[esi] = int(coefs[offset])
            else:
                if symbol.size > length:
                    # A rebuilt symbol is kept at the system's width: only zero padding may pass
                    # the repair symbol's end.
                    if symbol[length:].any():
                        raise InconsistentEquation(
                            f"source symbol {esi} of {symbol.size} bytes is longer than the {length}-byte repair symbol"
                        )
                    symbol = symbol[:length]
                known_rows.append(symbol)
                known_coefs.append(int(coefs[offset]))
        if known_rows:
            rhs_array ^= combine(np.array(known_coefs, dtype=np.uint8), stack_symbols(known_rows, length))
        if not unknown:
            self.redundant += 1
            return []
        for esi in unknown:
            if esi not in self._column_of:
                self._add_column(esi)
        self._widen(length)
        row = np.zeros(len(self._columns), dtype=np.uint8)
        for esi, value in unknown.items():
            row[self._column_of[esi]] = value
        rhs_row = np.zeros(self.width, dtype=np.uint8)
        rhs_row[:length] = rhs_array
        return self._insert(row, rhs_row)

    def forget_before(self, esi_limit: int) -> list[int]:
        """Drop every symbol with ESI < ``esi_limit``; returns the unknown ESIs given up (lost).

        Equations that involve a given-up unknown go with it: a row in reduced form cannot
        lose a column without losing what it says about the others.
        """
        known = self.known
        while known:  # ESIs come in (nearly) increasing order: the old ones are at the front
            oldest = next(iter(known))
            if oldest >= esi_limit:
                break
            del known[oldest]
        if self._unordered:  # a late arrival or a rebuilt symbol went in behind newer ones
            for esi in [e for e in known if e < esi_limit]:
                del known[esi]
            self._unordered = False
        old = [esi for esi in self._columns if esi < esi_limit]
        if not old:
            return []
        old_columns = [self._column_of[esi] for esi in old]
        if self._pivots:
            involved = self._coefs[:, old_columns].any(axis=1)
            keep = np.flatnonzero(~involved)
            self._coefs, self._rhs = self._coefs[keep], self._rhs[keep]
            self._pivots = [self._pivots[r] for r in keep.tolist()]
        self._drop_columns(old_columns)
        return old

    def give_up(self, esis: Sequence[int]) -> None:
        """Stop solving for these unknowns (too old to be of use): their columns go, and so do the
        equations that involve them."""
        columns = [self._column_of[esi] for esi in esis if esi in self._column_of]
        if not columns:
            return
        if self._pivots:
            keep = np.flatnonzero(~self._coefs[:, columns].any(axis=1))
            self._coefs, self._rhs = self._coefs[keep], self._rhs[keep]
            self._pivots = [self._pivots[r] for r in keep.tolist()]
        self._drop_columns(columns)

    def referenced(self) -> set[int]:
        """Unknown ESIs some equation involves (the others cannot be determined by what is held)."""
        if not self._pivots:
            return set()
        used = np.flatnonzero(self._coefs.any(axis=0))
        return {self._columns[c] for c in used.tolist()}

    # --- elimination -------------------------------------------------------------------------

    def _add_column(self, esi: int) -> None:
        self._column_of[esi] = len(self._columns)
        self._columns.append(esi)
        self._coefs = np.concatenate([self._coefs, np.zeros((self._coefs.shape[0], 1), dtype=np.uint8)], axis=1)

    def _widen(self, length: int) -> None:
        if length > self.width:
            wider = np.zeros((self._rhs.shape[0], length), dtype=np.uint8)
            wider[:, : self.width] = self._rhs
            self._rhs = wider

    def _drop_columns(self, columns: list[int]) -> None:
        """Remove columns (all zero in every remaining row, or given up) and renumber the rest."""
        if not columns:
            return
        gone = set(columns)
        keep = [c for c in range(len(self._columns)) if c not in gone]
        renumber = {old: new for new, old in enumerate(keep)}
        self._coefs = self._coefs[:, keep]
        self._pivots = [renumber[p] for p in self._pivots]
        self._columns = [self._columns[c] for c in keep]
        self._column_of = {esi: c for c, esi in enumerate(self._columns)}

    def _insert(self, row: np.ndarray, rhs_row: np.ndarray) -> list[tuple[int, bytes]]:
        """Reduce a new row by the pivots, make it a pivot row, clear its pivot elsewhere."""
        if self._pivots:
            factors = row[self._pivots]
            using = np.flatnonzero(factors)
            if using.size:
                row = row ^ _combine_rows(factors[using], self._coefs[using])
                rhs_row = rhs_row ^ _combine_rows(factors[using], self._rhs[using])
        nonzero = np.flatnonzero(row)
        if nonzero.size == 0:
            self.redundant += 1
            return []
        pivot = int(nonzero[0])
        scale = gf256.INV[row[pivot]]
        row = gf256.MUL[scale, row]
        rhs_row = gf256.MUL[scale, rhs_row]
        if self._pivots:
            factors = self._coefs[:, pivot].copy()
            touched = np.flatnonzero(factors)
            if touched.size:
                self._coefs[touched] ^= _scale_rows(factors[touched], row)
                self._rhs[touched] ^= _scale_rows(factors[touched], rhs_row)
        self._coefs = np.concatenate([self._coefs, row[None, :]])
        self._rhs = np.concatenate([self._rhs, rhs_row[None, :]])
        self._pivots.append(pivot)
        return self._collect_solved()

    def _substitute(self, column: int, symbol: np.ndarray) -> list[tuple[int, bytes]]:
        """A column's symbol became known: move it to the right-hand side of every row."""
        self._widen(symbol.size)
        factors = self._coefs[:, column]
        touched = np.flatnonzero(factors)
        if touched.size:
            padded = np.zeros(self.width, dtype=np.uint8)
            padded[: symbol.size] = symbol
            self._rhs[touched] ^= _scale_rows(factors[touched], padded)
            self._coefs[touched, column] = 0
        orphan = [r for r, p in enumerate(self._pivots) if p == column]
        if not orphan:
            self._drop_columns([column])
            return self._collect_solved()
        # Its row lost its pivot: take it out and insert it again (it is re-pivoted; the other
        # rows are zero in this column, as it was a pivot column).
        r = orphan[0]
        coef_row, rhs_row = np.delete(self._coefs[r], column), self._rhs[r].copy()
        keep = [i for i in range(len(self._pivots)) if i != r]
        self._coefs, self._rhs = self._coefs[keep], self._rhs[keep]
        self._pivots = [self._pivots[i] for i in keep]
        self._drop_columns([column])
        return self._insert(coef_row, rhs_row)

    def _collect_solved(self) -> list[tuple[int, bytes]]:
        """Rows with a single non-zero coefficient are determined symbols: take them out."""
        if not self._pivots:
            return []
        singles = np.flatnonzero(np.count_nonzero(self._coefs, axis=1) == 1)
        if singles.size == 0:
            return []
        solved: list[tuple[int, bytes]] = []
        for r in singles.tolist():
            esi = self._columns[self._pivots[r]]
            symbol = self._rhs[r].copy()
            self._note_known(esi)
            self.known[esi] = symbol
            solved.append((esi, symbol.tobytes()))
        done = set(singles.tolist())
        keep = [r for r in range(len(self._pivots)) if r not in done]
        solved_columns = [self._pivots[r] for r in singles.tolist()]
        self._coefs, self._rhs = self._coefs[keep], self._rhs[keep]
        self._pivots = [self._pivots[r] for r in keep]
        self._drop_columns(solved_columns)
        return solved
