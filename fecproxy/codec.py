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
from collections.abc import Mapping, Sequence
from functools import lru_cache

import numpy as np

from . import gf256

#: RFC 5510 §8.2 allows n ≤ 255 for m = 8 (the field has 255 non-zero points).
MAX_ENCODING_SYMBOLS = 255
#: Loss patterns whose inverse we keep per code.  A link usually repeats a few
#: patterns (one or two lost packets at a few positions); 256 entries of at most
#: 255×255 bytes is ≤ 16 MiB in the worst case and far less for usual m.
INVERSE_CACHE_SIZE = 256


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


def _as_symbols(symbols, count: int | None, what: str) -> np.ndarray:
    """Accept a (count, L) uint8 array or a sequence of equal-length bytes-likes."""
    if isinstance(symbols, np.ndarray):
        array = symbols
        if array.dtype != np.uint8 or array.ndim != 2:
            raise CodecError(f"{what} must be a 2-D uint8 array, got {array.dtype} with shape {array.shape}")
    else:
        rows = list(symbols)
        lengths = {len(row) for row in rows}
        if len(lengths) > 1:
            raise CodecError(f"{what} symbols must all have one length, got lengths {sorted(lengths)}")
        length = lengths.pop() if lengths else 0
        array = np.frombuffer(b"".join(bytes(row) for row in rows), dtype=np.uint8).reshape(len(rows), length)
    if count is not None and array.shape[0] != count:
        raise CodecError(f"{what} must have {count} symbols, got {array.shape[0]}")
    return array


class BlockCode:
    """The (n, k) code of RFC 5510 §8.2: ``encode`` makes repair symbols, ``decode`` rebuilds."""

    def __init__(self, k: int, n: int):
        if not (isinstance(k, int) and isinstance(n, int)):
            raise CodecError(f"k and n must be integers, got k={k!r}, n={n!r}")
        if not 1 <= k <= n <= MAX_ENCODING_SYMBOLS:
            raise CodecError(f"need 1 ≤ k ≤ n ≤ {MAX_ENCODING_SYMBOLS}, got k={k}, n={n}")
        self.k = k
        self.n = n
        self.generator = _generator(k, n)
        self._repair_columns = np.ascontiguousarray(self.generator[:, k:].T)  # (n−k, k)
        self._inverses: OrderedDict[tuple, np.ndarray] = OrderedDict()

    def __repr__(self) -> str:
        return f"BlockCode(k={self.k}, n={self.n})"

    @property
    def m(self) -> int:
        return self.n - self.k

    def encode(self, source) -> np.ndarray:
        """Repair symbols k..n−1 as an (n−k, L) uint8 array."""
        data = _as_symbols(source, self.k, "source")
        if self.n == self.k:
            return np.zeros((0, data.shape[1]), dtype=np.uint8)
        return gf256.matmul(self._repair_columns, data)

    def decode(self, received: Mapping[int, object]) -> np.ndarray:
        """The k source symbols as a (k, L) array, from any ≥ k distinct encoding symbols."""
        indices, symbols = self._check_received(received)
        source_present = [i for i in indices if i < self.k]
        missing = [i for i in range(self.k) if i not in set(source_present)]
        length = symbols.shape[1]
        out = np.empty((self.k, length), dtype=np.uint8)
        position = {index: row for row, index in enumerate(indices)}
        for i in source_present:
            out[i] = symbols[position[i]]
        if missing:
            rebuilt = self._rebuild(indices, symbols, missing)
            out[missing] = rebuilt
        return out

    def recover(self, received: Mapping[int, object]) -> dict[int, np.ndarray]:
        """Only the missing source symbols, {index: symbol} — what a receiver needs to deliver."""
        indices, symbols = self._check_received(received)
        present = set(indices)
        missing = [i for i in range(self.k) if i not in present]
        if not missing:
            return {}
        rebuilt = self._rebuild(indices, symbols, missing)
        return {index: rebuilt[row] for row, index in enumerate(missing)}

    def _check_received(self, received: Mapping[int, object]) -> tuple[list[int], np.ndarray]:
        indices = sorted(received)
        for index in indices:
            if not (isinstance(index, (int, np.integer)) and 0 <= index < self.n):
                raise CodecError(f"encoding symbol index {index!r} out of range 0..{self.n - 1}")
        if len(indices) < self.k:
            raise NotEnoughSymbols(f"need {self.k} encoding symbols to decode, got {len(indices)}")
        symbols = _as_symbols([np.asarray(received[i], dtype=np.uint8).tobytes()
                               if isinstance(received[i], np.ndarray) else received[i]
                               for i in indices], None, "received")
        return [int(i) for i in indices], symbols

    def _rebuild(self, indices: Sequence[int], symbols: np.ndarray, missing: list[int]) -> np.ndarray:
        """Solve only for the missing source rows (RFC 5510 §8.3, reduced to the lost positions).

        With S the known source rows and R = repair rows used, for every used repair column j:
        Σ_{i∈missing} GM[i,j]·s_i = r_j − Σ_{i∈known} GM[i,j]·s_i.  The |missing|×|missing|
        system's inverse depends only on the loss pattern, so it is cached.
        """
        position = {index: row for row, index in enumerate(indices)}
        known = [i for i in indices if i < self.k]
        repairs = [i for i in indices if i >= self.k][: len(missing)]
        key = (tuple(missing), tuple(repairs))
        inverse = self._inverses.get(key)
        if inverse is None:
            system = self.generator[np.ix_(missing, repairs)].T  # (e, e): row per repair equation
            inverse = gf256.invert_matrix(system)
            self._inverses[key] = inverse
            if len(self._inverses) > INVERSE_CACHE_SIZE:
                self._inverses.popitem(last=False)
        else:
            self._inverses.move_to_end(key)
        rhs = symbols[[position[j] for j in repairs]]
        if known:
            contribution = gf256.matmul(self.generator[np.ix_(known, repairs)].T, symbols[[position[i] for i in known]])
            rhs = rhs ^ contribution
        return gf256.matmul(inverse, rhs)
