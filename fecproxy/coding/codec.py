"""Systematic Reed–Solomon erasure code over GF(2^8), exactly as RFC 5510 §8.2 defines it.

``BlockCode(k, n)`` protects k source symbols with n − k repair symbols; any k of
the n encoding symbols rebuild the source (MDS).  Symbols are rows of a uint8
numpy array, all of one length L; each byte position is one codeword.

Generator (RFC 5510 §8.2): V[i][j] = alpha^(i·j) for i < k, j < n, and
GM = V_k^-1 · V where V_k is the first k columns of V.  GM starts with the k×k
identity, so encoding symbol j < k is source symbol j and repair symbol j ≥ k is
column j of GM applied to the source.  Column j depends only on k and j, not on n,
so a block closed early keeps a valid code: the receiver needs only the block's k.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Iterable, Mapping, Sequence
from functools import lru_cache
from typing import Any

import numpy as np

from fecproxy.coding import gf256

#: RFC 5510 §8.2 allows n ≤ 255 for m = 8 (the field has 255 non-zero points).
MAX_ENCODING_SYMBOLS = 255
#: Loss patterns whose decoding matrix we keep per code.  A link usually repeats a few
#: patterns (one or two lost packets at a few positions).  Each entry holds the prepared
#: multiplier for e lost symbols out of k: k·e·(8/b)·8 bytes of gather indices with b = 2
#: or 4 (2 KiB for k=16, e=4 with b=2; 176 KiB for k=200, e=55; at most about 260 KiB at
#: k ≈ e ≈ 128), so 256 entries stay under ~66 MiB even if every pattern were a worst case.
INVERSE_CACHE_SIZE = 256
#: Source rows (blocks × k) decoded together in one pass of the kernel by ``recover_many``.
#: Measured with 1200-byte symbols on the shared 2-core box: 8 blocks of k = 16 (128 rows) per
#: call ran ~1.4× the per-block rate, while 8 blocks of k = 64 (512 rows) ran ~0.8× of it (the
#: product table outgrows the caches); so large blocks go one or two at a time.
BATCH_SOURCE_ROWS = 128


class CodecError(ValueError):
    """Bad parameters or inputs given to the codec."""


class NotEnoughSymbols(CodecError):
    """Fewer than k distinct encoding symbols: the block cannot be rebuilt."""


@lru_cache(maxsize=64)
def _generator(k: int, n: int) -> np.ndarray:
    """GM = V_k^-1 · V (RFC 5510 §8.2), a k×n uint8 matrix; cached per (k, n)."""
    i = np.arange(k)[:, None]
    j = np.arange(n)[None, :]
    exponents = (i * j) % (gf256.ORDER - 1)
    vandermonde = gf256.EXP[exponents].astype(np.uint8)  # alpha^(i·j); alpha^0 = 1 covers 0^0
    gm = gf256.matmul_small(gf256.invert_matrix(vandermonde[:, :k]), vandermonde)
    gm.setflags(write=False)
    return gm


def _as_symbols(symbols: object, count: int | None, what: str) -> np.ndarray:
    """Accept a (count, L) uint8 array or a sequence of equal-length bytes-likes."""
    if isinstance(symbols, np.ndarray):
        array = symbols
        if array.dtype != np.uint8 or array.ndim != 2:
            raise CodecError(f"{what} must be a 2-D uint8 array, got {array.dtype} with shape {array.shape}")
    elif isinstance(symbols, Iterable):
        array = _stack(list(symbols), what)
    else:
        raise CodecError(f"{what} must be a 2-D uint8 array or a sequence of bytes, got {type(symbols).__name__}")
    if count is not None and array.shape[0] != count:
        raise CodecError(f"{what} must have {count} symbols, got {array.shape[0]}")
    return array


def _symbol_length(symbol: object, what: str) -> int:
    """Length of one symbol given as bytes-like or 1-D uint8 array; anything else is a CodecError."""
    if isinstance(symbol, np.ndarray):
        if symbol.dtype != np.uint8 or symbol.ndim != 1:
            raise CodecError(f"{what} symbol must be a 1-D uint8 array, got {symbol.dtype} with shape {symbol.shape}")
        return int(symbol.shape[0])
    if isinstance(symbol, (bytes, bytearray, memoryview)):
        return memoryview(symbol).nbytes
    raise CodecError(f"{what} symbol must be bytes or a 1-D uint8 array, got {type(symbol).__name__}")


def _stack(rows: Sequence[Any], what: str, length: int | None = None) -> np.ndarray:
    """One writable (len(rows), L) uint8 array from equal-length symbols, copying each byte once.

    The fast path joins the rows' buffers in one C call (bytes, bytearray, memoryview
    and contiguous 1-D uint8 arrays alike); anything it cannot join or whose size does
    not add up goes through the row-by-row path, which names the fault.
    """
    if length is None:
        try:
            lengths = set(map(len, rows))
        except TypeError:
            lengths = {_symbol_length(row, what) for row in rows}
        if len(lengths) > 1:
            lengths = {_symbol_length(row, what) for row in rows}
            raise CodecError(f"{what} symbols must all have one length, got lengths {sorted(lengths)}")
        length = lengths.pop() if lengths else 0
    try:
        joined = bytearray().join(rows)
    except (TypeError, BufferError, ValueError):
        joined = None
    if joined is not None and len(joined) == len(rows) * length:
        return np.frombuffer(joined, dtype=np.uint8).reshape(len(rows), length)
    array = np.empty((len(rows), length), dtype=np.uint8)
    for position, row in enumerate(rows):
        if _symbol_length(row, what) != length:
            raise CodecError(f"{what} symbols must all have one length, got {_symbol_length(row, what)} and {length}")
        array[position] = row if isinstance(row, np.ndarray) else np.frombuffer(row, dtype=np.uint8)
    return array


class BlockCode:
    """The (n, k) code of RFC 5510 §8.2: ``encode`` makes repair symbols, ``decode`` rebuilds."""

    def __init__(self, k: int, n: int, *, pattern_cache: bool = True):
        """``pattern_cache=False`` prepares every loss pattern afresh (what a benchmark of fresh
        patterns needs); the default keeps the last INVERSE_CACHE_SIZE patterns."""
        if not (isinstance(k, int) and isinstance(n, int)):
            raise CodecError(f"k and n must be integers, got k={k!r}, n={n!r}")
        if not 1 <= k <= n <= MAX_ENCODING_SYMBOLS:
            raise CodecError(f"need 1 ≤ k ≤ n ≤ {MAX_ENCODING_SYMBOLS}, got k={k}, n={n}")
        self.k = k
        self.n = n
        self.generator = _generator(k, n)
        # Repair symbol j is column j of GM applied to the source: (n − k, k) coefficients.
        self._encoder = gf256.Multiplier(self.generator[:, k:].T)
        self._inverses: OrderedDict[tuple[tuple[int, ...], tuple[int, ...]], tuple[gf256.Multiplier, np.ndarray]] = (
            OrderedDict()
        )
        self._pattern_cache = pattern_cache

    def __repr__(self) -> str:
        return f"BlockCode(k={self.k}, n={self.n})"

    @property
    def m(self) -> int:
        return self.n - self.k

    def encode(self, source: object) -> np.ndarray:
        """Repair symbols k..n−1 as an (n−k, L) uint8 array."""
        data = _as_symbols(source, self.k, "source")
        return self._encoder(data)

    def decode(self, received: Mapping[int, object]) -> np.ndarray:
        """The k source symbols as a (k, L) array, from any ≥ k distinct encoding symbols."""
        missing, repairs, stacked = self._select(received)
        if missing:
            rebuilt, rows = self._rebuild(missing, repairs, stacked)
            stacked[rows] = rebuilt  # the repair symbols stood in these rows; stacked is our own copy
        return stacked

    def recover(self, received: Mapping[int, object]) -> dict[int, np.ndarray]:
        """Only the missing source symbols, {index: symbol} — what a receiver needs to deliver."""
        missing, repairs, stacked = self._select(received)
        if not missing:
            return {}
        rebuilt, _rows = self._rebuild(missing, repairs, stacked)
        return {index: rebuilt[row] for row, index in enumerate(missing)}

    def recover_many(self, receptions: Sequence[Mapping[int, object]]) -> list[dict[int, np.ndarray]]:
        """:meth:`recover` for several blocks of this code at once, results in the same order.

        The damaged blocks share one pass of the kernel (:meth:`gf256.Multiplier.per_block_rows`)
        whatever each lost, and those with the same number of lost source symbols one closed-form
        computation, so a receiver holding several damaged blocks pays the fixed per-call cost
        once.  Never uses the pattern cache.  An invalid block raises as :meth:`recover` would,
        before any work is done.
        """
        selected = [self._select(received) for received in receptions]
        results: list[dict[int, np.ndarray]] = [{} for _ in selected]
        damaged = [position for position, (missing, _repairs, _stacked) in enumerate(selected) if missing]
        per_call = max(1, BATCH_SOURCE_ROWS // self.k)
        for start in range(0, len(damaged), per_call):
            self._recover_together(selected, damaged[start : start + per_call], results)
        return results

    def _recover_together(
        self,
        selected: list[tuple[list[int], list[int], np.ndarray]],
        members: list[int],
        results: list[dict[int, np.ndarray]],
    ) -> None:
        """Rebuild the blocks ``members`` of ``selected`` in one kernel pass."""
        # One closed-form computation for all: a block that lost fewer than the most lost gets
        # stand-in missing positions (unused encoding indices, never among its points), whose
        # rows are computed and left out.
        widest = max(len(selected[position][0]) for position in members)
        positions = np.empty((len(members), widest + self.k), dtype=np.intp)
        wanted: list[int] = []
        owners: list[int] = []
        for order, position in enumerate(members):
            missing, repairs, _ = selected[position]
            lost = set(missing)
            stand_in = iter(repairs)
            points = [next(stand_in) if i in lost else i for i in range(self.k)]
            fillers: list[int] = []
            if len(missing) < widest:
                taken = lost.union(points)
                candidates = (i for i in range(self.n - 1, -1, -1) if i not in taken)
                fillers = [next(candidates) for _ in range(widest - len(missing))]
            positions[order] = [*missing, *fillers, *points]
            wanted += range(order * widest, order * widest + len(missing))
            owners += [order] * len(missing)
        coefficients = lagrange_coefficients_many(positions, widest).reshape(-1, self.k)[wanted]
        data = np.concatenate([selected[position][2] for position in members])
        rebuilt = gf256.Multiplier.per_block_rows(coefficients, np.array(owners, dtype=np.intp), len(members))(data)
        row = 0
        for position in members:
            missing = selected[position][0]
            results[position] = {index: rebuilt[row + j] for j, index in enumerate(missing)}
            row += len(missing)

    def _select(self, received: Mapping[int, object]) -> tuple[list[int], list[int], np.ndarray]:
        """Validate the received symbols and stack the k that decoding uses into one array.

        Returns (missing source indices, repair indices used, stacked): stacked is a fresh
        (k, L) array whose row i is source symbol i, or, for the j-th missing one, the j-th
        used repair symbol.  Only those k rows are copied; extra symbols are only length-checked
        and never read.
        """
        if not isinstance(received, Mapping):
            raise CodecError(f"received must be a mapping {{index: symbol}}, got {type(received).__name__}")
        indices = sorted(received) if set(map(type, received)) == {int} else None  # fast path
        if indices is None or (indices and not (0 <= indices[0] and indices[-1] < self.n)):
            indices = []
            for index in received:  # slow path: numpy integers, or a bad index to name
                if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or not 0 <= index < self.n:
                    raise CodecError(f"encoding symbol index {index!r} out of range 0..{self.n - 1}")
                indices.append(int(index))
            indices.sort()
            received = {int(index): symbol for index, symbol in received.items()}
        if len(indices) < self.k:
            raise NotEnoughSymbols(f"need {self.k} encoding symbols to decode, got {len(indices)}")
        symbols: list[Any] = list(received.values())
        try:
            lengths = set(map(len, symbols))
        except TypeError:
            lengths = {_symbol_length(symbol, "received") for symbol in symbols}
        if len(lengths) > 1:
            lengths = {_symbol_length(symbol, "received") for symbol in symbols}
            raise CodecError(f"received symbols must all have one length, got lengths {sorted(lengths)}")
        missing = [i for i in range(self.k) if i not in received]
        known_count = self.k - len(missing)
        repairs = indices[known_count : self.k]  # sorted: sources first, then the first e repairs
        if missing:
            stand_in = dict(zip(missing, repairs, strict=True))
            rows = [received[stand_in.get(i, i)] for i in range(self.k)]
        else:
            rows = [received[i] for i in range(self.k)]
        return missing, repairs, _stack(rows, "received", lengths.pop())

    def _rebuild(self, missing: list[int], repairs: list[int], stacked: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Solve only for the missing source rows (RFC 5510 §8.3, reduced to the lost positions).

        The e×k matrix that maps the stacked rows (repairs standing in the missing rows) to the
        missing ones comes in closed form from :func:`lagrange_coefficients`, applied in one
        pass of the fast kernel.  It depends only on the loss pattern, so the prepared
        multiplier is also cached; a fresh pattern costs a few small numpy calls, no
        Gauss–Jordan elimination.  Returns the rebuilt rows and the index array of their positions.
        """
        key = (tuple(missing), tuple(repairs))
        entry = self._inverses.get(key)
        if entry is None:
            lost = set(missing)
            stand_in = iter(repairs)
            points = [next(stand_in) if i in lost else i for i in range(self.k)]  # stacked row order
            entry = (gf256.Multiplier(lagrange_coefficients(missing, points)), np.array(missing, dtype=np.intp))
            if not self._pattern_cache:
                return entry[0](stacked), entry[1]
            self._inverses[key] = entry
            if len(self._inverses) > INVERSE_CACHE_SIZE:
                self._inverses.popitem(last=False)
        else:
            self._inverses.move_to_end(key)
        multiplier, rows = entry
        return multiplier(stacked), rows


def _build_log_difference() -> np.ndarray:
    """LOG_DIFFERENCE[a, b] = log(alpha^a − alpha^b) for encoding symbol positions a ≠ b < 255.

    Subtraction is XOR in GF(2^8).  The diagonal (a zero difference, no logarithm) holds 0 so
    that a row sum over a set of points that includes a itself skips it.  int32: a sum of up
    to 255 logarithms below 255 does not fit int16.
    """
    positions = np.arange(MAX_ENCODING_SYMBOLS)
    points = gf256.EXP[positions]
    table: np.ndarray = gf256.LOG[points[:, None] ^ points[None, :]].astype(np.int32)
    np.fill_diagonal(table, 0)
    return table


LOG_DIFFERENCE = _build_log_difference()


def lagrange_coefficients(missing: Sequence[int], points: Sequence[int]) -> np.ndarray:
    """The (len(missing), k) matrix C with s_m = Σ_p C[m, p]·symbol_p, from any k known positions.

    RFC 5510 §8.2: GM = V_k⁻¹·V, so encoding symbol p (source or repair) is P(alpha^p), where
    P is the polynomial of degree < k through (alpha^i, source_i), i < k.  Given P at k
    distinct points x_p = alpha^p, the Lagrange interpolation formula (valid over any field;
    e.g. Lidl & Niederreiter, *Finite Fields*, ch. 1 — chapter from memory; the tests check the
    matrix against galois solving the §8.2 system) gives its value at x_m = alpha^m for a
    missing source position m:

        P(x_m) = Σ_p symbol_p · N(x_m) / ((x_m − x_p) · D_p),
        N(x) = Π_q (x − x_q),   D_p = Π_{q≠p} (x_p − x_q).

    In logarithms every factor is a table lookup and every product a sum, so the whole matrix
    is a handful of whole-array operations on e×k and k×k integers; no matrix inversion.
    Columns follow the order of ``points``.  Every coefficient is non-zero (x_m is never a point).
    """
    many = lagrange_coefficients_many(np.array([[*missing, *points]], dtype=np.intp), len(missing))
    coefficients: np.ndarray = many[0]
    return coefficients


def lagrange_coefficients_many(positions: np.ndarray, e: int) -> np.ndarray:
    """:func:`lagrange_coefficients` for B loss patterns at once: ``positions`` is (B, e + k),
    each row the e missing positions then the k points; returns (B, e, k)."""
    differences = LOG_DIFFERENCE[positions[:, :, None], positions[:, None, e:]]  # log(x_r − x_p)
    # Row sums: log N(x_m) for the e missing rows (x_m is no point, so no zero factor), then
    # log D_p for the k points (the diagonal is 0).  Reduced once, so the sum below stays in
    # −2·254 .. 254 and one lookup in the thrice-repeated exponent table finishes it.
    sums = differences.sum(axis=2) % (gf256.ORDER - 1)
    logs = (sums[:, :e, None] + _EXP_OFFSET) - differences[:, :e] - sums[:, None, e:]
    coefficients: np.ndarray = _EXP_WRAPPED[logs]
    return coefficients


#: _EXP_WRAPPED[i + _EXP_OFFSET] = alpha^i for −510 ≤ i < 255: the exponent table repeated so a
#: difference of logarithms needs no modulo.
_EXP_OFFSET = 2 * (gf256.ORDER - 1)
_EXP_WRAPPED = np.tile(gf256.EXP[: gf256.ORDER - 1], 3)


@lru_cache(maxsize=512)
def block_code(k: int, n: int) -> BlockCode:
    """A shared BlockCode per (k, n), so its generator and inverse cache serve every block of that
    shape: a sender sees a few shapes (full blocks, short blocks), a receiver one per k."""
    return BlockCode(k, n)
