"""GF(2^8) arithmetic and the fast multiplication kernel, checked against outside oracles.

Oracles: galois (a general-purpose finite-field library) and reedsolo (a pure-Python
Reed–Solomon library), both configured for the RFC 5510 §8.1 field; the fast kernel is
also checked against a plain MUL-table product written here.
"""

from __future__ import annotations

import importlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from fecproxy.coding import gf256


@pytest.fixture(scope="module")
def GF():
    # RFC 5510 §8.1: GF(2^8) on x^8+x^4+x^3+x^2+1 (0x11D), primitive element alpha = 2.
    galois = importlib.import_module("galois")
    field = galois.GF(2**8, irreducible_poly=0x11D)
    assert int(field.primitive_element) == gf256.ALPHA  # galois agrees alpha = 2 for this field
    return field


def reference_product(coefficients: np.ndarray, data: np.ndarray) -> np.ndarray:
    """Textbook matrix product: out[r] = XOR over i of MUL[c[r, i], data[i]], one row at a time."""
    rows, inner = coefficients.shape
    out = np.zeros((rows, data.shape[1]), dtype=np.uint8)
    for r in range(rows):
        for i in range(inner):
            out[r] ^= gf256.MUL[coefficients[r, i]][data[i]]
    return out


# --- the field against galois and reedsolo ---------------------------------------------------


def test_every_product_matches_galois(GF):
    # galois.GF(2**8, irreducible_poly=0x11D) as oracle: all 65 536 products.
    a = GF(np.arange(256).repeat(256))
    b = GF(np.tile(np.arange(256), 256))
    expected = (a * b).view(np.ndarray).reshape(256, 256)
    assert np.array_equal(gf256.MUL, expected)


def test_every_inverse_matches_galois(GF):
    # galois as oracle: a^-1 for every non-zero a.
    expected = (GF(np.arange(1, 256)) ** -1).view(np.ndarray)
    assert np.array_equal(gf256.INV[1:], expected)
    assert all(gf256.inverse(a) == int(expected[a - 1]) for a in range(1, 256))
    with pytest.raises(ZeroDivisionError):
        gf256.inverse(0)


def test_log_and_antilog_tables_match_reedsolo():
    # reedsolo.init_tables(prim=0x11d) as oracle.  In reedsolo 1.7 it returns
    # [gf_log (256 entries), gf_exp (510 entries: alpha^i for i < 510), 255].
    reedsolo = importlib.import_module("reedsolo")
    gf_log, gf_exp, field_charac = reedsolo.init_tables(prim=0x11D)
    assert field_charac == 255
    assert np.array_equal(gf256.EXP[: len(gf_exp)], np.frombuffer(bytes(gf_exp), dtype=np.uint8))
    # log 0 is undefined; both libraries leave a placeholder there.
    assert np.array_equal(gf256.LOG[1:], np.frombuffer(bytes(gf_log), dtype=np.uint8)[1:])


def test_scalar_helpers_match_galois(GF):
    # galois as oracle for mul and power (including 0^0 = 1, which RFC 5510 §8.2 V[0][0] needs).
    rng = np.random.default_rng(1)
    for a, b in rng.integers(0, 256, size=(50, 2)):
        assert gf256.mul(int(a), int(b)) == int(GF(int(a)) * GF(int(b)))
    for a, e in [(0, 0), (0, 3), (1, 200), (2, 8), (2, 255), (7, 300), (255, 17)]:
        assert gf256.power(a, e) == int(GF(a) ** e)


def test_invert_matrix_matches_galois(GF):
    # galois' np.linalg.inv over GF(2^8) as oracle.
    rng = np.random.default_rng(2)
    for size in (1, 2, 5, 17):
        while True:
            m = rng.integers(0, 256, size=(size, size), dtype=np.uint8)
            if np.linalg.matrix_rank(GF(m)) == size:
                break
        assert np.array_equal(gf256.invert_matrix(m), np.linalg.inv(GF(m)).view(np.ndarray))
    with pytest.raises(ValueError, match="singular"):
        gf256.invert_matrix(np.array([[1, 2], [2, 4]], dtype=np.uint8))  # row 2 = 2 · row 1
    with pytest.raises(ValueError, match="square"):
        gf256.invert_matrix(np.zeros((2, 3), dtype=np.uint8))


def test_fast_matmul_matches_galois_matrix_product(GF):
    # galois' matrix product over GF(2^8) as oracle for the kernel, one chunked shape.
    rng = np.random.default_rng(3)
    coefficients = rng.integers(0, 256, size=(40, 120), dtype=np.uint8)
    data = rng.integers(0, 256, size=(120, 1000), dtype=np.uint8)
    expected = (GF(coefficients) @ GF(data)).view(np.ndarray)
    assert np.array_equal(gf256.matmul(coefficients, data), expected)
    assert np.array_equal(gf256.matmul_reference(coefficients, data), expected)


# --- the fast kernel against the plain product (properties) ---------------------------------


@st.composite
def products(draw):
    rows = draw(st.integers(0, 20))
    inner = draw(st.integers(0, 20))
    length = draw(st.sampled_from([0, 1, 3, 7, 8, 9, 15, 16, 17, 63, 64, 100, 257]))
    coefficients = draw(hnp.arrays(np.uint8, (rows, inner)))
    data = draw(hnp.arrays(np.uint8, (inner, length)))
    return coefficients, data


@settings(max_examples=150, deadline=None)
@given(products(), st.sampled_from([None, *gf256.DIGIT_BITS_CHOICES]))
def test_fast_matmul_equals_reference(product, digit_bits):
    coefficients, data = product
    fast = gf256.Multiplier(coefficients, digit_bits)(data)
    assert fast.dtype == np.uint8 and fast.shape == (coefficients.shape[0], data.shape[1])
    assert np.array_equal(fast, reference_product(coefficients, data))
    assert np.array_equal(gf256.matmul(coefficients, data), fast)


def test_fast_matmul_on_views_and_unaligned_memory():
    # Non-contiguous, offset-by-one-byte (unaligned) and read-only inputs all take a copy path.
    rng = np.random.default_rng(4)
    coefficients = rng.integers(0, 256, size=(5, 6), dtype=np.uint8)
    base = rng.integers(0, 256, size=(6 * 65,), dtype=np.uint8)
    unaligned = base[1 : 1 + 6 * 64].reshape(6, 64)
    strided = rng.integers(0, 256, size=(6, 128), dtype=np.uint8)[:, ::2]
    readonly = np.frombuffer(bytes(base[: 6 * 64]), dtype=np.uint8).reshape(6, 64)
    for data in (unaligned, strided, readonly):
        assert np.array_equal(gf256.matmul(coefficients, data), reference_product(coefficients, data))


def test_fast_matmul_chunked_over_the_symbol_length(monkeypatch):
    # A tiny chunk budget forces several chunks, including the equal-split tail handling.
    monkeypatch.setattr(gf256, "GATHER_CHUNK_BYTES", 1)
    rng = np.random.default_rng(5)
    coefficients = rng.integers(0, 256, size=(9, 11), dtype=np.uint8)
    data = rng.integers(0, 256, size=(11, 8 * 100 + 5), dtype=np.uint8)
    multiplier = gf256.Multiplier(coefficients)
    assert multiplier._chunk_words(101) < 101
    assert np.array_equal(multiplier(data), reference_product(coefficients, data))


def test_multiplier_rejects_bad_shapes():
    multiplier = gf256.Multiplier(np.ones((2, 3), dtype=np.uint8))
    with pytest.raises(ValueError, match="shape mismatch"):
        multiplier(np.zeros((4, 8), dtype=np.uint8))
    with pytest.raises(ValueError, match="2-D"):
        multiplier(np.zeros(8, dtype=np.uint8))
    with pytest.raises(ValueError, match="2-D"):
        gf256.Multiplier(np.ones(3, dtype=np.uint8))
    with pytest.raises(ValueError, match="digit_bits"):
        gf256.Multiplier(np.ones((2, 3), dtype=np.uint8), digit_bits=3)


@settings(max_examples=60, deadline=None)
@given(
    st.integers(1, 5),
    st.integers(0, 6),
    st.integers(0, 9),
    st.integers(0, 40),
    st.sampled_from([None, 2, 4]),
    st.integers(0, 2**32 - 1),
)
def test_block_diagonal_multiplier_equals_one_reference_product_per_block(
    blocks, rows, inner, length, digit_bits, seed
):
    # Each block's rows come from its own data rows only: the same as B separate products.
    rng = np.random.default_rng(seed)
    coefficients = rng.integers(0, 256, size=(blocks, rows, inner), dtype=np.uint8)
    data = rng.integers(0, 256, size=(blocks * inner, length), dtype=np.uint8)
    product = gf256.Multiplier.block_diagonal(coefficients, digit_bits)(data)
    expected = [gf256.matmul_reference(coefficients[b], data[b * inner : (b + 1) * inner]) for b in range(blocks)]
    assert np.array_equal(product, np.concatenate(expected) if expected else product)
