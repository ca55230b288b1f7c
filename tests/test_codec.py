"""The RFC 5510 §8.2 block code, checked against outside oracles and by properties.

Oracles: the RFC 5510 text itself, galois (finite fields, Vandermonde matrices, Lagrange
interpolation, Reed–Solomon codes) on the RFC 5510 §8.1 field, and the hex vector in
shared/design-notes.md (computed there with galois from §8.2).
"""

from __future__ import annotations

import contextlib
import functools
import importlib.util
import io
import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy import cli
from fecproxy.coding import codec, gf256
from fecproxy.coding.codec import BlockCode, CodecError, NotEnoughSymbols


@pytest.fixture(scope="module")
def GF():
    # RFC 5510 §8.1: GF(2^8) on x^8+x^4+x^3+x^2+1 (0x11D), alpha = 2.
    galois = importlib.import_module("galois")
    return galois.GF(2**8, irreducible_poly=0x11D)


def encoding_symbols(code: BlockCode, source: np.ndarray) -> np.ndarray:
    """All n encoding symbols: the k source symbols (systematic) then the n − k repair symbols."""
    return np.concatenate([source, code.encode(source)])


# --- against the RFC and galois --------------------------------------------------------------


def test_design_notes_vector():
    # shared/design-notes.md §4 (computed with galois from RFC 5510 §8.2): k=4, n=7.
    source = [bytes.fromhex(h) for h in ("01020304", "05060708", "090a0b0c", "0d0e0f10")]
    repair = BlockCode(4, 7).encode(source)
    assert [bytes(row).hex() for row in repair] == ["1516177f", "424140d8", "484b4aaf"]


@pytest.mark.parametrize(
    "k, n", [(1, 1), (1, 5), (4, 7), (10, 10), (16, 20), (64, 80), (100, 255), (200, 255), (255, 255)]
)
def test_generator_matches_galois_vandermonde(GF, k, n):
    # RFC 5510 §8.2: V[i][j] = alpha^(i·j) (k×n), GM = V_k^-1 · V with V_k the first k columns;
    # galois.FieldArray.Vandermonde(a, rows, cols) builds V[i][j] = a^(i·j).
    vandermonde = GF.Vandermonde(GF.primitive_element, k, n)
    expected = np.linalg.inv(vandermonde[:, :k]) @ vandermonde
    generator = BlockCode(k, n).generator
    assert np.array_equal(generator, expected.view(np.ndarray))
    assert np.array_equal(generator[:, :k], np.eye(k, dtype=np.uint8))  # systematic


@pytest.mark.parametrize("k, n", [(1, 3), (3, 6), (5, 12), (9, 20)])
def test_repair_symbols_are_evaluations_of_the_lagrange_polynomial(GF, k, n):
    # RFC 5510 §8.2 interpolation view, galois.lagrange_poly as oracle: the degree < k
    # polynomial through (alpha^i, source_i), i < k, takes the value of repair symbol j at alpha^j.
    galois = importlib.import_module("galois")
    rng = np.random.default_rng(k * 1000 + n)
    source = rng.integers(0, 256, size=(k, 3), dtype=np.uint8)
    repair = BlockCode(k, n).encode(source)
    alpha = GF.primitive_element
    points = alpha ** np.arange(k)
    for position in range(source.shape[1]):
        polynomial = galois.lagrange_poly(points, GF(source[:, position]))
        assert polynomial.degree < k
        values = polynomial(alpha ** np.arange(k, n))
        assert np.array_equal(values.view(np.ndarray), repair[:, position])


@pytest.mark.parametrize("k", [1, 16, 200, 254, 255])
def test_n255_codewords_pass_galois_reed_solomon_check(GF, k):
    # galois.ReedSolomon(255, k) as oracle: narrow-sense (c = 1), i.e. generator roots
    # alpha^1 .. alpha^(255−k).  Why our codewords belong to it: symbol j is P(alpha^j) for the
    # source polynomial P of degree < k.  Read as C(x) = Σ_j symbol_j · x^j,
    # C(alpha^t) = Σ_l p_l Σ_j alpha^(j(l+t)), and Σ_{j<255} alpha^(j·u) is 0 unless
    # u ≡ 0 (mod 255); so C(alpha^t) = p_(255−t), which is 0 for 1 ≤ t ≤ 255 − k.  Hence no
    # mapping of values is needed, only of order: symbol j is the coefficient of x^j, while
    # galois lists codeword coefficients from the highest degree down, so we reverse.
    galois = importlib.import_module("galois")
    rs = galois.ReedSolomon(255, k, field=GF)
    assert rs.c == 1 and rs.is_narrow_sense
    rng = np.random.default_rng(k)
    code = BlockCode(k, 255)
    symbols = encoding_symbols(code, rng.integers(0, 256, size=(k, 24), dtype=np.uint8))
    codewords = GF(symbols.T[:, ::-1])  # one codeword per byte position, highest degree first
    assert not np.any(rs.detect(codewords))
    if 1 < k < 255:  # in ascending order the roots would be alpha^k .. alpha^254 instead
        assert np.all(rs.detect(GF(symbols.T)))
    if k < 255:  # the check is not vacuous: one changed byte is caught
        corrupted = symbols.T[:, ::-1].copy()
        corrupted[:, 7] ^= 1
        assert np.all(rs.detect(GF(corrupted)))


# --- round trips (properties) ----------------------------------------------------------------


@st.composite
def blocks(draw):
    k = draw(st.integers(1, 40))
    n = draw(st.integers(k, min(255, k + draw(st.sampled_from([0, 1, 5, 30, 255])))))
    length = draw(st.sampled_from([0, 1, 2, 5, 7, 8, 9, 13, 64, 100, 1001]))
    seed = draw(st.integers(0, 2**32 - 1))
    source = np.random.default_rng(seed).integers(0, 256, size=(k, length), dtype=np.uint8)
    kept = draw(st.lists(st.integers(0, n - 1), min_size=k, max_size=n, unique=True))
    kept = sorted(draw(st.permutations(kept))[: draw(st.integers(k, len(kept)))])
    as_bytes = draw(st.booleans())
    return k, n, source, kept, as_bytes


@settings(max_examples=120, deadline=None)
@given(blocks())
def test_any_k_symbols_rebuild_the_source(block):
    k, n, source, kept, as_bytes = block
    code = BlockCode(k, n)
    symbols = encoding_symbols(code, source)
    received = {i: (bytes(symbols[i]) if as_bytes else symbols[i]) for i in kept}
    decoded = code.decode(received)
    assert decoded.dtype == np.uint8 and decoded.shape == source.shape
    assert np.array_equal(decoded, source)
    recovered = code.recover(received)
    assert sorted(recovered) == [i for i in range(k) if i not in received]
    for index, symbol in recovered.items():
        assert np.array_equal(symbol, source[index])


@settings(max_examples=40, deadline=None)
@given(blocks())
def test_encode_accepts_bytes_or_array_alike(block):
    k, n, source, _kept, _as_bytes = block
    code = BlockCode(k, n)
    repair = code.encode(source)
    assert repair.shape == (n - k, source.shape[1])
    assert np.array_equal(code.encode([bytes(row) for row in source]), repair)
    # encode is the fast kernel applied to GM's repair columns: same as the slow reference.
    assert np.array_equal(repair, gf256.matmul_reference(code.generator[:, k:].T, source))


@settings(max_examples=40, deadline=None)
@given(blocks(), st.data())
def test_fewer_than_k_symbols_are_refused(block, data):
    k, n, source, kept, _as_bytes = block
    code = BlockCode(k, n)
    symbols = encoding_symbols(code, source)
    few = data.draw(st.lists(st.sampled_from(range(n)), max_size=k - 1, unique=True))
    with pytest.raises(NotEnoughSymbols, match=f"need {k} encoding symbols"):
        code.decode({i: symbols[i] for i in few})


def test_every_loss_pattern_of_a_small_code():
    code = BlockCode(4, 8)
    source = np.arange(4 * 6, dtype=np.uint8).reshape(4, 6) * 7
    symbols = encoding_symbols(code, source)
    for mask in range(1 << 8):
        kept = [i for i in range(8) if mask >> i & 1]
        if len(kept) >= 4:
            assert np.array_equal(code.decode({i: symbols[i] for i in kept}), source), kept


def test_decode_result_is_a_fresh_writable_array():
    code = BlockCode(3, 5)
    source = np.arange(12, dtype=np.uint8).reshape(3, 4)
    symbols = encoding_symbols(code, source)
    received = {0: bytes(symbols[0]), 3: bytes(symbols[3]), 4: bytes(symbols[4])}
    decoded = code.decode(received)
    decoded[:] = 0  # must not write into the caller's buffers
    assert received[0] == bytes(source[0])
    assert np.array_equal(code.decode({i: symbols[i] for i in range(3)}), source)


def test_numpy_integer_indices_and_mixed_symbol_types():
    code = BlockCode(3, 6)
    source = np.arange(15, dtype=np.uint8).reshape(3, 5)
    symbols = encoding_symbols(code, source)
    received = {np.int64(1): symbols[1], np.uint8(4): bytes(symbols[4]), 5: bytearray(symbols[5])}
    assert np.array_equal(code.decode(received), source)


# --- bad input: typed errors with specific messages ------------------------------------------


@pytest.mark.parametrize("k, n", [(0, 1), (2, 1), (1, 256), (-1, 3), (1.0, 3), ("4", 7)])
def test_bad_code_parameters(k, n):
    with pytest.raises(CodecError):
        BlockCode(k, n)


def test_decode_errors():
    code = BlockCode(3, 5)
    symbols = encoding_symbols(code, np.zeros((3, 4), dtype=np.uint8))
    with pytest.raises(NotEnoughSymbols, match="need 3"):
        code.decode({0: symbols[0], 4: symbols[4]})
    with pytest.raises(NotEnoughSymbols):
        code.recover({})
    with pytest.raises(CodecError, match="out of range"):
        code.decode({0: symbols[0], 1: symbols[1], 5: symbols[4]})
    with pytest.raises(CodecError, match="out of range"):
        code.decode({-1: symbols[0], 1: symbols[1], 2: symbols[2]})
    with pytest.raises(CodecError, match="out of range"):
        code.decode({"0": symbols[0], 1: symbols[1], 2: symbols[2]})
    with pytest.raises(CodecError, match="out of range"):
        code.decode({True: symbols[0], 2: symbols[2], 3: symbols[3]})
    with pytest.raises(CodecError, match="one length"):
        code.decode({0: symbols[0], 1: symbols[1][:3], 2: symbols[2]})
    with pytest.raises(CodecError, match="one length"):  # also for a symbol decoding would not use
        code.decode({0: symbols[0], 1: symbols[1], 2: symbols[2], 4: b"\x00"})
    with pytest.raises(CodecError, match="1-D uint8"):
        code.decode({0: symbols[0], 1: symbols[1].astype(np.uint16), 3: symbols[3]})
    with pytest.raises(CodecError, match="bytes or a 1-D uint8 array"):
        code.decode({0: symbols[0], 1: "abcd", 3: symbols[3]})
    with pytest.raises(CodecError, match="bytes or a 1-D uint8 array"):
        code.decode({0: symbols[0], 1: 1234, 3: symbols[3]})
    with pytest.raises(CodecError, match="mapping"):
        code.decode([symbols[0], symbols[1], symbols[2]])


def test_encode_errors():
    code = BlockCode(3, 5)
    with pytest.raises(CodecError, match="must have 3 symbols"):
        code.encode(np.zeros((2, 4), dtype=np.uint8))
    with pytest.raises(CodecError, match="2-D uint8"):
        code.encode(np.zeros((3, 4), dtype=np.int32))
    with pytest.raises(CodecError, match="one length"):
        code.encode([b"abc", b"de", b"fgh"])
    with pytest.raises(CodecError):
        code.encode(12)


def test_inverse_cache_is_reused_and_bounded(monkeypatch):
    monkeypatch.setattr(codec, "INVERSE_CACHE_SIZE", 3)
    code = BlockCode(6, 10)
    source = np.arange(6 * 8, dtype=np.uint8).reshape(6, 8)
    symbols = encoding_symbols(code, source)
    received = {i: symbols[i] for i in (1, 2, 3, 4, 6, 7)}
    code.decode(received)
    entry = next(iter(code._inverses.values()))
    code.decode(received)
    assert len(code._inverses) == 1 and next(iter(code._inverses.values())) is entry
    for lost in range(6):  # six different single-loss patterns
        assert np.array_equal(code.decode({i: symbols[i] for i in range(7) if i != lost}), source)
        assert len(code._inverses) <= 3
    assert len(code._inverses) == 3


# --- fresh loss patterns against galois (the shapes the decoder is tuned for) ----------------

#: Shapes the decode path is tuned and benchmarked at, plus a short code and a full-length one.
DECODE_SHAPES = [(16, 4), (64, 16), (200, 55), (5, 3), (100, 155)]


@functools.cache
def galois_repair_matrix(k: int, n: int) -> np.ndarray:
    # RFC 5510 §8.2: GM = V_k^-1 · V with V[i][j] = alpha^(i·j); repair symbol j ≥ k is column j
    # of GM applied to the source.  Built with galois on the RFC 5510 §8.1 field (0x11D).
    galois = importlib.import_module("galois")
    field = galois.GF(2**8, irreducible_poly=0x11D)
    vandermonde = field.Vandermonde(field.primitive_element, k, n)
    return (np.linalg.inv(vandermonde[:, :k]) @ vandermonde)[:, k:].T  # (n − k, k) field array


@settings(max_examples=150, deadline=None)
@given(st.sampled_from(DECODE_SHAPES), st.sampled_from([1, 8, 61, 1200]), st.data())
def test_fresh_loss_patterns_rebuild_galois_encoded_blocks(GF, shape, length, data):
    # Repair symbols computed by galois from RFC 5510 §8.2; our decoder, with an empty pattern
    # cache every time, must rebuild the source from any k of the n symbols (§8.3–8.4: MDS).
    k, m = shape
    n = k + m
    seed = data.draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    source = rng.integers(0, 256, size=(k, length), dtype=np.uint8)
    repair = (galois_repair_matrix(k, n) @ GF(source)).view(np.ndarray)
    symbols = np.concatenate([source, repair])
    lost = data.draw(st.integers(0, m))
    kept = rng.permutation(n)[: n - lost]  # any n − lost ≥ k survivors, sources and repairs alike
    received = {int(i): bytes(symbols[i]) for i in kept}
    code = BlockCode(k, n)
    assert np.array_equal(code.decode(received), source)
    missing = [i for i in range(k) if i not in received]
    rebuilt = code.recover(received)
    assert sorted(rebuilt) == missing
    assert all(np.array_equal(rebuilt[i], source[i]) for i in missing)


@settings(max_examples=60, deadline=None)
@given(st.sampled_from(DECODE_SHAPES), st.data())
def test_lagrange_matrix_matches_galois_solution(GF, shape, data):
    # The closed-form decode matrix must equal the one galois gets by solving the RFC 5510 §8.2
    # system directly: with the k received columns G_P of GM, source = received · G_P^-1, so
    # missing source m is Σ_p (G_P^-1)[p, m] · symbol_p.
    k, m = shape
    n = k + m
    rng = np.random.default_rng(data.draw(st.integers(0, 2**32 - 1)))
    e = data.draw(st.integers(1, min(m, k)))
    missing = sorted(rng.choice(k, e, replace=False).tolist())
    repairs = sorted(rng.choice(np.arange(k, n), e, replace=False).tolist())
    stand_in = iter(repairs)
    points = [next(stand_in) if i in missing else i for i in range(k)]
    vandermonde = GF.Vandermonde(GF.primitive_element, k, n)
    generator = np.linalg.inv(vandermonde[:, :k]) @ vandermonde
    solved = np.linalg.inv(generator[:, points])[:, missing].T  # (e, k), columns in points order
    assert np.array_equal(codec.lagrange_coefficients(missing, points), solved.view(np.ndarray))


@settings(max_examples=40, deadline=None)
@given(st.sampled_from(DECODE_SHAPES), st.integers(1, 12), st.data())
def test_recover_many_equals_recover_block_by_block(GF, shape, blocks, data):
    # Several blocks of galois-encoded data (RFC 5510 §8.2), each with its own random loss
    # pattern (some undamaged, different loss counts): one batched call rebuilds every block.
    k, m = shape
    n = k + m
    rng = np.random.default_rng(data.draw(st.integers(0, 2**32 - 1)))
    code = BlockCode(k, n)
    receptions, sources = [], []
    for _ in range(blocks):
        source = rng.integers(0, 256, size=(k, 24), dtype=np.uint8)
        symbols = np.concatenate([source, (galois_repair_matrix(k, n) @ GF(source)).view(np.ndarray)])
        kept = rng.permutation(n)[: n - int(rng.integers(0, m + 1))]
        receptions.append({int(i): bytes(symbols[i]) for i in kept})
        sources.append(source)
    rebuilt = code.recover_many(receptions)
    assert len(rebuilt) == blocks
    for received, source, found in zip(receptions, sources, rebuilt, strict=True):
        assert sorted(found) == [i for i in range(k) if i not in received]
        assert all(np.array_equal(symbol, source[i]) for i, symbol in found.items())


# --- the benchmark command runs (no speed assertion) -----------------------------------------


def run_cli(argv: list[str]) -> tuple[int, str]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        status = cli.main(argv)
    return status, out.getvalue()


def test_bench_codec_prints_a_table():
    status, text = run_cli(["bench", "codec", "--seconds", "0.02", "--shape", "4,2,64", "--shape", "3,0,10"])
    assert status == 0
    assert "encode" in text and "decode" in text and "dec/enc" in text
    assert any(line.split()[:3] == ["4", "2", "64"] for line in text.splitlines())


def test_bench_codec_json():
    status, text = run_cli(["bench", "codec", "--seconds", "0.02", "--shape", "5,3,100", "--json"])
    assert status == 0
    figures = json.loads(text)["shapes"][0]
    assert (figures["k"], figures["m"], figures["length"]) == (5, 3, 100)
    assert figures["encode"] > 0 and figures["decode"] > 0


def test_bench_rejects_bad_shape():
    with pytest.raises(SystemExit), contextlib.redirect_stderr(io.StringIO()):
        cli.main(["bench", "codec", "--shape", "200,56,1200"])
