"""Arithmetic in GF(2^8), the field the Reed–Solomon code works in.

The field is built on the primitive polynomial x^8+x^4+x^3+x^2+1 (0x11D) with
primitive element alpha = 2, as RFC 5510 §8.1 specifies for m = 8.  Scalars are
Python ints or numpy uint8; bulk work goes through :func:`matmul`, which takes
whole numpy arrays so no Python loop ever walks the bytes of a packet.
"""

from __future__ import annotations

import numpy as np

#: RFC 5510 §8.1: x^8 + x^4 + x^3 + x^2 + 1.
PRIMITIVE_POLYNOMIAL = 0x11D
#: RFC 5510 §8.1: the primitive element alpha.
ALPHA = 2
ORDER = 256


def _build_tables() -> tuple[np.ndarray, np.ndarray]:
    """exp[i] = alpha^i for i in 0..509 (doubled so exp[log a + log b] needs no mod); log[0] unused."""
    exp = np.zeros(2 * ORDER, dtype=np.uint8)
    log = np.zeros(ORDER, dtype=np.int16)
    x = 1
    for i in range(ORDER - 1):
        exp[i] = x
        log[x] = i
        x <<= 1
        if x & 0x100:
            x ^= PRIMITIVE_POLYNOMIAL
    exp[ORDER - 1 : 2 * (ORDER - 1)] = exp[: ORDER - 1]
    return exp, log


EXP, LOG = _build_tables()


def _build_mul_table() -> np.ndarray:
    """MUL[a, b] = a·b: 64 KiB, small enough to keep and fast to index with numpy."""
    a = np.arange(ORDER)
    table = EXP[(LOG[a][:, None] + LOG[a][None, :])].astype(np.uint8)
    table[0, :] = 0
    table[:, 0] = 0
    return table


MUL = _build_mul_table()
#: INV[a] = a^-1 for a != 0; INV[0] = 0 is a placeholder, never a valid inverse.
INV = np.zeros(ORDER, dtype=np.uint8)
INV[1:] = EXP[(ORDER - 1 - LOG[1:]) % (ORDER - 1)]


def mul(a: int, b: int) -> int:
    return int(MUL[a, b])


def inverse(a: int) -> int:
    if a == 0:
        raise ZeroDivisionError("0 has no inverse in GF(2^8)")
    return int(INV[a])


def power(a: int, e: int) -> int:
    """a^e, with 0^0 = 1 as the Vandermonde matrix of RFC 5510 §8.2 needs (its [0][0] entry)."""
    if e == 0:
        return 1
    if a == 0:
        return 0
    return int(EXP[(int(LOG[a]) * e) % (ORDER - 1)])


def matmul_small(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Product of two small coefficient matrices (generator algebra, not packet data)."""
    a = np.asarray(a, dtype=np.uint8)
    b = np.asarray(b, dtype=np.uint8)
    products = MUL[a[:, :, None], b[None, :, :]]  # (rows, inner, cols)
    return np.bitwise_xor.reduce(products, axis=1).astype(np.uint8)


def invert_matrix(m: np.ndarray) -> np.ndarray:
    """Gauss–Jordan inverse of a square matrix over GF(2^8); raises ValueError if singular.

    Loops run over rows (at most 255), each step a whole-row numpy operation; this is
    done once per loss pattern and then cached by the codec.
    """
    m = np.array(m, dtype=np.uint8)
    size = m.shape[0]
    if m.shape != (size, size):
        raise ValueError(f"matrix must be square, got shape {m.shape}")
    aug = np.concatenate([m, np.eye(size, dtype=np.uint8)], axis=1)
    for col in range(size):
        nonzero = np.flatnonzero(aug[col:, col])
        if nonzero.size == 0:
            raise ValueError("matrix is singular over GF(2^8)")
        pivot = col + int(nonzero[0])
        if pivot != col:
            aug[[col, pivot]] = aug[[pivot, col]]
        aug[col] = MUL[INV[aug[col, col]], aug[col]]
        factors = aug[:, col].copy()
        factors[col] = 0
        rows = np.flatnonzero(factors)
        if rows.size:
            aug[rows] ^= MUL[factors[rows][:, None], aug[col][None, :]]
    return aug[:, size:].copy()


def matmul(coefficients: np.ndarray, data: np.ndarray) -> np.ndarray:
    """out[r] = XOR_i coefficients[r, i] · data[i] — the one kernel encode and decode share.

    coefficients: (rows, inner) uint8; data: (inner, L) uint8; returns (rows, L) uint8.
    """
    coefficients = np.asarray(coefficients, dtype=np.uint8)
    data = np.asarray(data, dtype=np.uint8)
    rows, inner = coefficients.shape
    if data.shape[0] != inner:
        raise ValueError(f"shape mismatch: coefficients {coefficients.shape}, data {data.shape}")
    out = np.zeros((rows, data.shape[1]), dtype=np.uint8)
    for r in range(rows):
        out[r] = np.bitwise_xor.reduce(MUL[coefficients[r][:, None], data], axis=0)
    return out
