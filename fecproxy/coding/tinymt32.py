"""TinyMT32, the pseudorandom generator RFC 8682 specifies for the sliding-window code.

RFC 8681 §3.6 draws every coding coefficient of a repair symbol from TinyMT32 seeded with the
repair symbol's 16-bit key, so sender and receiver must produce the *same* 32-bit stream bit for
bit: this is RFC 8682 §2.1's reference implementation (its Figure 1) transcribed to Python ints,
with the parameter set the RFC fixes (mat1 0x8f7011ee, mat2 0xfc78ff1f, tmat 0x3793fdff).
RFC 8682 §2.1 notes that with this parameter set no seed leads to the all-zero state, so the
original code's period certification is left out, as in the RFC.

Why Python ints and not numpy: the stream is sequential (each word depends on the previous
state) and short (one or two words per coefficient, at most a few hundred per repair symbol), so
scalar int arithmetic is the fastest CPython can do; :mod:`fecproxy.coding.sliding` caches the
coefficients per key so a key's stream is drawn once, not once per packet.

RFC 8681 §3.6 uses two derived draws: ``rand256`` (the low 8 bits, a coefficient candidate) and
``rand16`` (the low 4 bits, compared with the density threshold).  Appendix A of RFC 8681 gives
their first 50 values for seed 1; ``tests/test_sliding_code.py`` checks both and RFC 8682 §2.3's
50 words.
"""

from __future__ import annotations

#: RFC 8682 §2.1 (Figure 1): the parameter set every implementation must use.
MAT1 = 0x8F7011EE
MAT2 = 0xFC78FF1F
TMAT = 0x3793FDFF
#: RFC 8682 §2.1: TINYMT32_SH0, TINYMT32_SH1, TINYMT32_SH8 and TINYMT32_MASK.
SH0 = 1
SH1 = 10
SH8 = 8
MASK = 0x7FFFFFFF
#: RFC 8682 §2.1: MIN_LOOP mixing rounds of the seed, then PRE_LOOP state steps discarded.
MIN_LOOP = 8
PRE_LOOP = 8
#: RFC 8682 §2.1: the multiplier of the seed-mixing recurrence (as in MT19937's init_genrand).
SEED_MULTIPLIER = 1812433253
_WORD = 0xFFFFFFFF


class TinyMT32:
    """One generator state: ``TinyMT32(seed).next_u32()`` is RFC 8682's tinymt32_generate_uint32."""

    __slots__ = ("_s0", "_s1", "_s2", "_s3")

    def __init__(self, seed: int) -> None:
        if not 0 <= seed <= _WORD:
            raise ValueError(f"seed {seed} does not fit 32 bits")
        status = [seed, MAT1, MAT2, TMAT]
        for i in range(1, MIN_LOOP):
            previous = status[(i - 1) & 3]
            status[i & 3] ^= (i + SEED_MULTIPLIER * (previous ^ (previous >> 30))) & _WORD
        self._s0, self._s1, self._s2, self._s3 = status
        for _ in range(PRE_LOOP):
            self._next_state()

    def _next_state(self) -> None:
        """tinymt32_next_state of RFC 8682 Figure 1."""
        y = self._s3
        x = (self._s0 & MASK) ^ self._s1 ^ self._s2
        x ^= (x << SH0) & _WORD
        y ^= (y >> SH0) ^ x
        s1, s2 = self._s2, x ^ ((y << SH1) & _WORD)
        if y & 1:
            s1 ^= MAT1
            s2 ^= MAT2
        self._s0, self._s1, self._s2, self._s3 = self._s1, s1, s2, y

    def next_u32(self) -> int:
        """tinymt32_generate_uint32: the next state, tempered (RFC 8682 Figure 1)."""
        self._next_state()
        t1 = (self._s0 + (self._s2 >> SH8)) & _WORD
        t0 = self._s3 ^ t1
        if t1 & 1:
            t0 ^= TMAT
        return t0

    def rand256(self) -> int:
        """RFC 8681 §3.6 tinymt32_rand256: a value in 0..255 (the low 8 bits of the next word)."""
        return self.next_u32() & 0xFF

    def rand16(self) -> int:
        """RFC 8681 §3.6 tinymt32_rand16: a value in 0..15 (the low 4 bits of the next word)."""
        return self.next_u32() & 0x0F
