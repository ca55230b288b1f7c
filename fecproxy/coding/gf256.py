"""Arithmetic in GF(2^8), the field the Reed–Solomon code works in.

The field is built on the primitive polynomial x^8+x^4+x^3+x^2+1 (0x11D) with
primitive element alpha = 2, as RFC 5510 §8.1 specifies for m = 8.  Scalars are
Python ints or numpy uint8; bulk work goes through :func:`matmul`, which takes
whole numpy arrays so no Python loop ever walks the bytes of a packet.

How the fast kernel works (see :class:`Multiplier`): symbols are viewed as rows of
uint64 words, so one numpy operation handles 8 field elements per lane.  Doubling
(multiplying by alpha = 2) is the packed "xtime" step: shift every byte left by one
and XOR 0x1D into the bytes whose top bit fell off (RFC 5510 §8.1 polynomial).  Each
coefficient is split into b-bit digits; for every source row a small table holds its
products with all non-zero digit values (built by doublings and XORs), one gather
picks the table rows named by the digits of every coefficient, one XOR-reduction
sums them, and a short Horner tree (multiply the high digits by 2^b, XOR the low
ones) joins the digits.  The gather indices depend only on the coefficient matrix,
so they are prepared once per matrix; each block then costs a few dozen numpy calls.
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
    table: np.ndarray = EXP[(LOG[a][:, None] + LOG[a][None, :])].astype(np.uint8)
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
    product: np.ndarray = np.bitwise_xor.reduce(products, axis=1).astype(np.uint8)
    return product


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


def matmul_reference(coefficients: np.ndarray, data: np.ndarray) -> np.ndarray:
    """Slow, obviously correct product via the MUL table: the baseline the fast kernel is tested against."""
    coefficients = np.asarray(coefficients, dtype=np.uint8)
    data = np.asarray(data, dtype=np.uint8)
    rows, inner = coefficients.shape
    if data.ndim != 2 or data.shape[0] != inner:
        raise ValueError(f"shape mismatch: coefficients {coefficients.shape}, data {data.shape}")
    out = np.zeros((rows, data.shape[1]), dtype=np.uint8)
    for r in range(rows):
        if inner:
            out[r] = np.bitwise_xor.reduce(MUL[coefficients[r][:, None], data], axis=0)
    return out


# --- fast kernel ---------------------------------------------------------------------------

_WORD_BYTES = 8


def _lanes(byte: int) -> np.uint64:
    """The byte repeated in all 8 lanes of a uint64 word."""
    return np.uint64(int.from_bytes(bytes([byte]) * _WORD_BYTES, "little"))


_LOW_BIT_OF_EACH_BYTE = _lanes(0x01)
_LOW7_OF_EACH_BYTE = _lanes(0x7F)
#: x^8 mod (x^8+x^4+x^3+x^2+1) = x^4+x^3+x^2+1: what a carried-out top bit folds back to.
_REDUCTION = np.uint64(PRIMITIVE_POLYNOMIAL & 0xFF)
_KEEP_LOW = {s: _lanes(0xFF >> s) for s in (1, 2, 4)}
_TOP_BITS = {s: _lanes((1 << s) - 1) for s in (1, 2, 4)}
_SHIFT = {s: np.uint64(s) for s in range(9)}

#: Digit widths the kernel knows.  2-bit digits: 3 table rows per source row, 4 gathers per
#: coefficient; 4-bit digits: 15 table rows, 2 gathers.  The table cost is paid per source
#: row and the gathers per (repair row, source row), so 4-bit digits win once there are
#: many output rows.
DIGIT_BITS_CHOICES = (2, 4)
#: Output rows from which 4-bit digits are used.  Measured on a 2-core EPYC with 1200-byte
#: symbols (best of repeated runs): at 4 rows 2-bit digits took 80 µs against 112 µs, at
#: 8 rows 4-bit digits took 72–95 µs against 85–118 µs, and from 16 rows up 4-bit digits
#: were 1.5–2× faster.
FOUR_BIT_DIGITS_FROM_ROWS = 8
#: Bytes gathered per chunk of words.  Splitting the symbol length into chunks keeps the
#: gathered rows within a few MiB (this machine: 1 MiB L2 per core, 32 MiB L3) instead of
#: streaming tens of MiB through memory; smaller chunks pay more per-call overhead.
#: Measured with 1200-byte symbols (MB/s of source): (200, 55) 110 at 1 MiB, 124 at 4 MiB,
#: 54 unchunked; (128, 32) 145 / 214 / 117; (64, 16) 160 / 269 / 245.
GATHER_CHUNK_BYTES = 4 << 20
#: Narrowest chunk in 8-byte words: below 16 words (128 bytes) per row the gather and
#: reduction loops are too short to run at full speed.
MIN_CHUNK_WORDS = 16


def _xtime(x: np.ndarray, out: np.ndarray, tmp: np.ndarray) -> np.ndarray:
    """out = 2·x on packed uint64 words: shift each byte left, fold carried top bits back."""
    np.right_shift(x, _SHIFT[7], out=tmp)
    tmp &= _LOW_BIT_OF_EACH_BYTE
    tmp *= _REDUCTION  # 0 or 1 per byte times 0x1D: no carry between bytes
    np.bitwise_and(x, _LOW7_OF_EACH_BYTE, out=out)
    out <<= _SHIFT[1]
    out ^= tmp
    return out


def _mul_power_of_two(x: np.ndarray, s: int, out: np.ndarray, tmp: np.ndarray, tmp2: np.ndarray) -> np.ndarray:
    """out = 2^s·x on packed words for s ≤ 4 in one step instead of s doublings.

    The s top bits h of a byte stand for h·x^8 ≡ h·(x^4+x^3+x^2+1); for s ≤ 4 that
    carry-less product h ^ h<<2 ^ h<<3 ^ h<<4 has degree < 8, so it needs no further
    reduction and never spills into the next byte.
    """
    if s == 1:
        return _xtime(x, out, tmp)
    np.right_shift(x, _SHIFT[8 - s], out=tmp)
    tmp &= _TOP_BITS[s]
    np.bitwise_and(x, _KEEP_LOW[s], out=out)
    out <<= _SHIFT[s]
    out ^= tmp
    np.left_shift(tmp, _SHIFT[2], out=tmp2)
    out ^= tmp2
    tmp2 <<= _SHIFT[1]
    out ^= tmp2
    tmp2 <<= _SHIFT[1]
    out ^= tmp2
    return out


def _digit_values(digit_bits: int) -> np.ndarray:
    """(256, 8 // digit_bits) table: the digits of every byte value, low digit first but in
    bit-reversed digit order (0, 2, 1, 3 for four digits) so that every level of the Horner
    tree pairs the first half of the digit rows with the second half: contiguous slices."""
    digits = 8 // digit_bits
    width = digits.bit_length() - 1
    order = [int(format(d, f"0{width}b")[::-1], 2) if width else 0 for d in range(digits)]
    shifts = np.array(order) * digit_bits
    values: np.ndarray = ((np.arange(ORDER)[:, None] >> shifts[None, :]) & ((1 << digit_bits) - 1)).astype(np.intp)
    return values


_DIGIT_VALUES = {bits: _digit_values(bits) for bits in (2, 4)}


class Multiplier:
    """Multiplication by one fixed (rows × inner) coefficient matrix, prepared for many blocks.

    ``Multiplier(c)(data)`` equals :func:`matmul_reference` ``(c, data)``.  Preparing costs a
    few numpy calls; the codec keeps one per generator and per cached loss pattern so each
    block pays only for the arithmetic.  Instances hold no per-call state (thread-safe).
    """

    def __init__(self, coefficients: np.ndarray, digit_bits: int | None = None):
        coefficients = np.array(coefficients, dtype=np.uint8)
        if coefficients.ndim != 2:
            raise ValueError(f"coefficients must be 2-D, got shape {coefficients.shape}")
        self.rows, self.inner = coefficients.shape
        if digit_bits is None:
            digit_bits = 4 if self.rows >= FOUR_BIT_DIGITS_FROM_ROWS else 2
        if digit_bits not in DIGIT_BITS_CHOICES:
            raise ValueError(f"digit_bits must be one of {DIGIT_BITS_CHOICES}, got {digit_bits}")
        self.digit_bits = digit_bits
        self.digits = 8 // digit_bits
        self._entries = (1 << digit_bits) - 1  # non-zero digit values
        # Table layout is value-major: row v·inner + i holds v·data[i], v = 0 (zeros) .. entries,
        # so the row a digit names is digit·inner + i with no special case for a zero digit.
        # Index layout (inner, digits, rows), inner-major so the XOR-reduction runs over axis 0
        # with long contiguous rows: one table lookup, one multiply-add.
        index = np.empty((self.inner, self.digits, self.rows), dtype=np.intp)
        np.multiply(_DIGIT_VALUES[digit_bits][coefficients.T].transpose(0, 2, 1), self.inner, out=index)
        index += np.arange(self.inner)[:, None, None]
        self._index = index.reshape(self.inner, self.digits * self.rows)

    @classmethod
    def block_diagonal(cls, coefficients: np.ndarray, digit_bits: int | None = None) -> Multiplier:
        """One multiplier for B independent (rows × inner) products: ``coefficients`` is (B, rows,
        inner); the data is the B blocks' rows stacked, (B·inner, L); the result is (B·rows, L),
        block b's rows from block b's data only.

        Why: a receiver that holds several damaged blocks pays the fixed cost of the kernel (a few
        dozen numpy calls) once instead of once per block.  The product table spans all B·inner
        data rows; each output row gathers only from its own block's rows, so the work stays
        linear in B (the XOR-reduction runs over ``inner``, not B·inner).
        """
        coefficients = np.asarray(coefficients, dtype=np.uint8)
        if coefficients.ndim != 3:
            raise ValueError(f"coefficients must be 3-D (blocks, rows, inner), got shape {coefficients.shape}")
        blocks, rows, inner = coefficients.shape
        owners = np.repeat(np.arange(blocks, dtype=np.intp), rows)
        return cls.per_block_rows(coefficients.reshape(blocks * rows, inner), owners, blocks, digit_bits)

    @classmethod
    def per_block_rows(
        cls, coefficients: np.ndarray, owners: np.ndarray, blocks: int, digit_bits: int | None = None
    ) -> Multiplier:
        """:meth:`block_diagonal` with any number of rows per block: output row r is
        ``coefficients[r]`` (R, inner) applied to the rows of block ``owners[r]`` alone, the data
        being the ``blocks`` blocks' rows stacked, (blocks·inner, L).  Blocks that lost different
        numbers of symbols thus share one pass of the kernel."""
        coefficients = np.asarray(coefficients, dtype=np.uint8)
        total_rows, inner = coefficients.shape
        self = cls.__new__(cls)
        self.rows, self.inner = total_rows, blocks * inner
        if digit_bits is None:  # the table grows with the data rows as the gathers with the output rows
            digit_bits = 4 if total_rows >= FOUR_BIT_DIGITS_FROM_ROWS * max(1, blocks) else 2
        if digit_bits not in DIGIT_BITS_CHOICES:
            raise ValueError(f"digit_bits must be one of {DIGIT_BITS_CHOICES}, got {digit_bits}")
        self.digit_bits, self.digits, self._entries = digit_bits, 8 // digit_bits, (1 << digit_bits) - 1
        # index[i, d, r] = digit d of coefficients[r, i] · (blocks·inner) + owners[r]·inner + i
        index = np.empty((inner, self.digits, total_rows), dtype=np.intp)
        np.multiply(_DIGIT_VALUES[digit_bits][coefficients].transpose(1, 2, 0), self.inner, out=index)
        index += (np.asarray(owners, dtype=np.intp) * inner)[None, None] + np.arange(inner)[:, None, None]
        self._index = index.reshape(inner, self.digits * total_rows)
        return self

    def __repr__(self) -> str:
        return f"Multiplier(rows={self.rows}, inner={self.inner}, digit_bits={self.digit_bits})"

    def __call__(self, data: np.ndarray) -> np.ndarray:
        """(rows, L) uint8 product with a (inner, L) uint8 array."""
        if not (isinstance(data, np.ndarray) and data.dtype == np.uint8 and data.ndim == 2):
            data = np.asarray(data, dtype=np.uint8)
            if data.ndim != 2:
                raise ValueError(f"data must be 2-D, got shape {data.shape}")
        if data.shape[0] != self.inner:
            raise ValueError(f"shape mismatch: coefficients ({self.rows}, {self.inner}), data {data.shape}")
        length = data.shape[1]
        if self.rows == 0 or self.inner == 0 or length == 0:
            return np.zeros((self.rows, length), dtype=np.uint8)
        words = -(-length // _WORD_BYTES)
        packed = data.view(np.uint64) if length % _WORD_BYTES == 0 and data.flags.c_contiguous else None
        if packed is None or not packed.flags.aligned:  # zero-copy only for aligned whole words
            padded = np.zeros((self.inner, words * _WORD_BYTES), dtype=np.uint8)
            padded[:, :length] = data
            packed = padded.view(np.uint64)
        product = self._multiply_words(packed, words).view(np.uint8)
        return product if product.shape[1] == length else np.ascontiguousarray(product[:, :length])

    def _chunk_words(self, words: int) -> int:
        per_word = self._index.size * _WORD_BYTES  # bytes gathered per word of symbol length
        chunk = max(MIN_CHUNK_WORDS, GATHER_CHUNK_BYTES // per_word)
        if chunk >= words:
            return words
        count = -(-words // chunk)
        return -(-words // count)  # equal chunks rather than one short tail

    def _multiply_words(self, packed: np.ndarray, words: int) -> np.ndarray:
        chunk = self._chunk_words(words)
        out = np.empty((self.rows, words), dtype=np.uint64)
        for start in range(0, words, chunk):
            self._multiply_chunk(packed[:, start : start + chunk], out[:, start : start + chunk])
        return out

    def _multiply_chunk(self, packed: np.ndarray, out: np.ndarray) -> None:
        inner, width, entries = self.inner, packed.shape[1], self._entries
        table = np.empty(((entries + 1) * inner, width), dtype=np.uint64)
        by_value = table.reshape(entries + 1, inner, width)  # by_value[v] = v·data
        by_value[0] = 0
        by_value[1] = packed
        tmp = np.empty((inner, width), dtype=np.uint64)
        power = 2
        while power <= entries:  # power·data by doubling, then its sums with every smaller value
            _xtime(by_value[power // 2], by_value[power], tmp)
            np.bitwise_xor(by_value[1:power], by_value[power][None], out=by_value[power + 1 : 2 * power])
            power *= 2
        gathered = table.take(self._index, axis=0)  # (inner, digits·rows, width)
        digits = np.bitwise_xor.reduce(gathered, axis=0).reshape(self.digits, self.rows, width)
        # Horner as a tree: join digit pairs (low + 2^b·high), then pairs of pairs.  The
        # gathered rows are spent by now, so their memory serves as scratch (no allocations).
        half = digits.size // 2
        scratch = gathered.reshape(-1)
        if scratch.size < 4 * half:
            scratch = np.empty(4 * half, dtype=np.uint64)
        step, target = self.digit_bits, 2
        while digits.shape[0] > 1:
            count = digits.shape[0] // 2
            low, high = digits[:count], digits[count:]
            size = high.size
            if count == 1:  # last level: straight into the caller's array
                joined = out[None]
            else:
                joined = scratch[target * half : target * half + size].reshape(high.shape)
            _mul_power_of_two(
                high, step, joined, scratch[:size].reshape(high.shape), scratch[half : half + size].reshape(high.shape)
            )
            joined ^= low
            digits, step, target = joined, step * 2, 5 - target  # alternate regions 2 and 3


def matmul(coefficients: np.ndarray, data: np.ndarray) -> np.ndarray:
    """out[r] = XOR_i coefficients[r, i] · data[i] — the one kernel encode and decode share.

    coefficients: (rows, inner) uint8; data: (inner, L) uint8; returns (rows, L) uint8.
    For a matrix used on many blocks, keep a :class:`Multiplier` instead: same result,
    no preparation per call.
    """
    return Multiplier(coefficients)(data)
