"""``fecproxy bench codec``: our RFC 5510 codec beside zfec, measured in the same run.

Times our encoder and decoder on the block shapes the daemon meets and, when the C library
zfec is installed (``pip install 'fecproxy[bench]'``), zfec on the same data in the same run,
so the ratio is fair on a shared, noisy machine.  zfec is GPL-licensed: it is imported only
inside :func:`measure_codec`, never by the package.  zfec's code evaluates at other points
than RFC 5510, so its bytes differ from ours; only its speed is compared.

Decoding is measured the way a real link exercises it: every block loses a different random
set of m source symbols (seeded), and our pattern cache is switched off, so each call pays for
its own decoding matrix.  The cached case (one pattern decoded again and again) is measured
too and labelled as such.
"""

from __future__ import annotations

import argparse
import itertools
import json
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass

import numpy as np

from fecproxy.coding import sliding
from fecproxy.coding.codec import MAX_ENCODING_SYMBOLS, BlockCode

#: (k, m, L) shapes measured by default: a small block for low-latency voice/telemetry, a
#: middle one, and the largest this field allows with a 20–25 % repair rate; 1200-byte
#: symbols fit a 1280-byte IPv6 minimum MTU with room for headers.
DEFAULT_SHAPES: tuple[tuple[int, int, int], ...] = ((16, 4, 1200), (64, 16, 1200), (200, 55, 1200))
#: Seconds spent timing each function (our encode, our decode, zfec encode, zfec decode) per
#: shape.  One second each keeps a default run of three shapes near 15 s while giving
#: hundreds to thousands of calls per function.
DEFAULT_SECONDS = 1.0
#: The time of each measurement is split into rounds that alternate between ours and zfec;
#: the best round counts for each side, so a burst of load from a neighbour on a shared
#: machine hurts neither figure more than the other.
ROUNDS = 5
#: Seed of the random source data: the same bytes every run.
SEED = 5510


#: Distinct random loss patterns prepared per shape and cycled through while timing.  More
#: than the codec's pattern cache holds (256), though the cache is off for the fresh figure
#: anyway; enough that zfec, which keeps no cache, sees the same variety.
PATTERN_POOL = 512
#: Damaged blocks per call in the batched decode figure (``BlockCode.recover_many``).  Our own
#: choice: at k = 16 a receiver's batched socket reads bring in a few blocks at a time at high
#: rates; 8 shows the fixed per-call cost amortised without assuming a long backlog.
DECODE_BATCH = 8
#: The link figure: each symbol of a block (sources and repairs) lost independently with this
#: share, as an i.i.d. 5 % link loses them; only blocks the receiver must and can rebuild (at
#: least one source lost, at most m symbols lost) are kept, so the number rebuilt varies 1..m.
LINK_LOSS = 0.05
#: Damaged blocks per ``recover_many`` call in the link figure: the blocks a receiver found
#: decodable per socket read, counted in the daemon's decoder (``BlockDecoder.rebuilds``) with
#: ``bench pipeline``'s processes offering 50 000 datagrams/s over a 5 % link, k=16, m=4: 3.4–7.4
#: per call in three runs on the shared 2-core box (README, "Benchmarks"); 4 is near the lower end.
LINK_BATCH = 4


@dataclass(frozen=True)
class CodecFigures:
    """Throughput in MB/s (10^6 bytes of source data per second) for one (k, m, L).

    ``decode`` and ``zfec_decode``: a fresh random loss pattern of m source symbols per block;
    ``decode_cached``: one pattern decoded again and again (the codec's pattern cache hits);
    ``decode_batch``: fresh patterns, DECODE_BATCH damaged blocks per ``recover_many`` call.
    """

    k: int
    m: int
    length: int
    encode: float
    decode: float
    decode_cached: float
    decode_batch: float
    zfec_encode: float | None
    zfec_decode: float | None
    decode_link: float = 0.0
    zfec_link: float | None = None
    link_batch: int = LINK_BATCH
    link_loss: float = LINK_LOSS

    @property
    def link_ratio(self) -> float | None:
        return None if self.zfec_link is None else self.decode_link / self.zfec_link

    @property
    def encode_ratio(self) -> float | None:
        return None if self.zfec_encode is None else self.encode / self.zfec_encode

    @property
    def decode_ratio(self) -> float | None:
        return None if self.zfec_decode is None else self.decode / self.zfec_decode

    @property
    def batch_ratio(self) -> float | None:
        return None if self.zfec_decode is None else self.decode_batch / self.zfec_decode

    @property
    def decode_over_encode(self) -> float:
        return self.decode / self.encode

    def as_dict(self) -> dict:
        figures = asdict(self)
        figures.update(
            encode_ratio=self.encode_ratio,
            decode_ratio=self.decode_ratio,
            batch_ratio=self.batch_ratio,
            link_ratio=self.link_ratio,
            decode_over_encode=self.decode_over_encode,
        )
        return figures


def _shape(text: str) -> tuple[int, int, int]:
    """Parse 'K,M,L' for argparse, with the code's own limits."""
    try:
        k, m, length = (int(part) for part in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"shape must be K,M,L (three integers), got {text!r}") from None
    if not (k >= 1 and m >= 0 and k + m <= MAX_ENCODING_SYMBOLS and length >= 1):
        raise argparse.ArgumentTypeError(f"need k ≥ 1, m ≥ 0, k + m ≤ {MAX_ENCODING_SYMBOLS} and L ≥ 1, got {text!r}")
    return k, m, length


def _positive_seconds(text: str) -> float:
    try:
        seconds = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"seconds must be a number, got {text!r}") from None
    if not 0 < seconds <= 600:
        raise argparse.ArgumentTypeError(f"seconds must be in (0, 600], got {text!r}")
    return seconds


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"need a whole number, got {text!r}") from None
    if not 1 <= value <= PATTERN_POOL:
        raise argparse.ArgumentTypeError(f"need 1..{PATTERN_POOL}, got {text!r}")
    return value


def _link_loss(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"need a number, got {text!r}") from None
    if not 0 < value <= 0.5:
        raise argparse.ArgumentTypeError(f"need a loss share in (0, 0.5], got {text!r}")
    return value


def add_arguments(codec: argparse.ArgumentParser) -> None:
    codec.add_argument(
        "--shape",
        action="append",
        type=_shape,
        metavar="K,M,L",
        help="block shape to measure: K source symbols, M repair symbols, L bytes per symbol "
        "(repeat for several; default: " + " ".join(",".join(map(str, s)) for s in DEFAULT_SHAPES) + ")",
    )
    codec.add_argument(
        "--seconds",
        type=_positive_seconds,
        default=DEFAULT_SECONDS,
        help="seconds spent timing each function (ours and zfec's) per shape",
    )
    codec.add_argument(
        "--sliding",
        action="append",
        type=_sliding_shape,
        metavar="W,X,L",
        help="sliding-window shape to measure beside the blocks: window W, one repair per X source symbols, "
        "L bytes (repeat for several; default: "
        + " ".join(",".join(map(str, s)) for s in DEFAULT_SLIDING_SHAPES)
        + ")",
    )
    codec.add_argument(
        "--link-batch",
        type=_positive_int,
        default=LINK_BATCH,
        help="damaged blocks per recover_many call in the link figure (default: the batch the daemon's "
        f"receiver was measured to see at 50 000 datagrams/s over a 5 %% link: {LINK_BATCH})",
    )
    codec.add_argument(
        "--link-loss",
        type=_link_loss,
        default=LINK_LOSS,
        help=f"share of symbols the link figure's i.i.d. link loses (default: {LINK_LOSS})",
    )
    codec.add_argument("--json", action="store_true", help="print the figures as JSON instead of a table")


def _rates(functions: dict[str, Callable[[], object]], seconds: float) -> dict[str, float]:
    """Best calls per second of each function over ROUNDS alternating rounds."""
    best = dict.fromkeys(functions, 0.0)
    per_round = seconds / ROUNDS
    for _ in range(ROUNDS):
        for name, function in functions.items():
            function()  # warm caches before the clock starts
            calls, start = 0, time.perf_counter()
            while True:
                function()
                calls += 1
                elapsed = time.perf_counter() - start
                if elapsed >= per_round:
                    break
            best[name] = max(best[name], calls / elapsed)
    return best


def _loss_patterns(k: int, m: int, rng: np.random.Generator) -> list[list[int]]:
    """PATTERN_POOL sorted sets of min(m, k) lost source positions, drawn with the seeded rng."""
    lost = min(m, k)
    return [sorted(rng.choice(k, lost, replace=False).tolist()) for _ in range(PATTERN_POOL)]


def _link_receptions(k: int, m: int, loss: float, rng: np.random.Generator) -> list[tuple[list[int], list[int]]]:
    """PATTERN_POOL (lost sources, repairs used) pairs as an i.i.d. link losing ``loss`` of the
    symbols gives them, kept only when the block needs a rebuild and can have one."""
    patterns: list[tuple[list[int], list[int]]] = []
    for _ in range(PATTERN_POOL * 1000):  # bounded: at 5 % about half the blocks qualify
        lost = rng.random(k + m) < loss
        lost_sources = np.flatnonzero(lost[:k]).tolist()
        if lost_sources and int(lost.sum()) <= m:
            arrived_repairs = [k + j for j in np.flatnonzero(~lost[k:]).tolist()]
            patterns.append((lost_sources, arrived_repairs[: len(lost_sources)]))
            if len(patterns) == PATTERN_POOL:
                break
    if len(patterns) < PATTERN_POOL:
        raise ValueError(f"a {loss:g} link too rarely leaves a (k={k}, m={m}) block needing and allowing a rebuild")
    return patterns


def measure_codec(
    k: int,
    m: int,
    length: int,
    seconds: float = DEFAULT_SECONDS,
    use_zfec: bool = True,
    link_batch: int = LINK_BATCH,
    link_loss: float = LINK_LOSS,
) -> CodecFigures:
    """Encode and decode rates for one shape; each decode rebuilds a fresh set of m lost sources
    (the link figure: as many as a ``link_loss`` link loses, ``link_batch`` blocks per call)."""
    rng = np.random.default_rng(SEED)
    source = rng.integers(0, 256, size=(k, length), dtype=np.uint8)
    source_bytes = [bytes(row) for row in source]
    code = BlockCode(k, k + m)
    fresh_code = BlockCode(k, k + m, pattern_cache=False)
    repair_bytes = [bytes(row) for row in code.encode(source)]
    patterns = _loss_patterns(k, m, rng)

    def received_after(lost: list[int]) -> dict:
        """What a receiver holds after losing these sources: the rest, then the first repairs."""
        held = {i: source_bytes[i] for i in range(k) if i not in set(lost)}
        held.update({k + j: repair_bytes[j] for j in range(len(lost))})
        return held

    receptions = [received_after(lost) for lost in patterns]
    for received in receptions[:8]:
        if not np.array_equal(fresh_code.decode(received), source):
            raise AssertionError(f"decode did not rebuild the source for k={k}, m={m}, L={length}")
    fresh = itertools.cycle(receptions)
    batches = itertools.cycle([receptions[i : i + DECODE_BATCH] for i in range(0, PATTERN_POOL, DECODE_BATCH)])
    for rebuilt in code.recover_many(receptions[:DECODE_BATCH]):
        if any(not np.array_equal(symbol, source[i]) for i, symbol in rebuilt.items()) or len(rebuilt) != min(m, k):
            raise AssertionError(f"recover_many did not rebuild the source for k={k}, m={m}, L={length}")
    repeated = receptions[0]
    link_patterns = _link_receptions(k, m, link_loss, rng) if m > 0 else []
    link_receptions = [
        {**{i: source_bytes[i] for i in range(k) if i not in set(lost)}, **{j: repair_bytes[j - k] for j in used}}
        for lost, used in link_patterns
    ]
    for received, rebuilt in zip(link_receptions[:8], code.recover_many(link_receptions[:8]), strict=True):
        if any(not np.array_equal(symbol, source[i]) for i, symbol in rebuilt.items()) or len(rebuilt) + len(
            received
        ) != k + sum(j >= k for j in received):
            raise AssertionError(f"recover_many did not rebuild a link block for k={k}, m={m}, L={length}")
    link_batches = itertools.cycle(
        [link_receptions[i : i + link_batch] for i in range(0, len(link_receptions) - link_batch + 1, link_batch)]
    )
    functions: dict[str, Callable[[], object]] = {
        "encode": lambda: code.encode(source_bytes),
        "decode": lambda: fresh_code.decode(next(fresh)),
        "decode_cached": lambda: code.decode(repeated),
        "decode_batch": lambda: code.recover_many(next(batches)),
    }
    if link_receptions:
        functions["decode_link"] = lambda: code.recover_many(next(link_batches))
    if use_zfec:
        try:
            import zfec  # GPL: speed reference only, imported here and nowhere else
        except ImportError:
            zfec = None
        if zfec is not None and m > 0:
            encoder = zfec.Encoder(k, k + m)
            decoder = zfec.Decoder(k, k + m)
            wanted = tuple(range(k, k + m))
            inputs = tuple(source_bytes)
            zfec_repairs = encoder.encode(inputs, wanted)
            zfec_blocks = []
            for lost in patterns:  # the same loss patterns, in zfec's own (blocks, numbers) form
                numbers = tuple(i for i in range(k) if i not in set(lost)) + tuple(range(k, k + len(lost)))
                blocks = tuple(source_bytes[i] if i < k else zfec_repairs[i - k] for i in numbers)
                zfec_blocks.append((blocks, numbers))
            for blocks, numbers in zfec_blocks[:8]:
                if b"".join(decoder.decode(blocks, numbers)) != b"".join(source_bytes):
                    raise AssertionError("zfec did not rebuild the source")  # guards a fair comparison
            zfec_fresh = itertools.cycle(zfec_blocks)
            zfec_link_blocks = []
            for lost, used in link_patterns:  # the link figure's patterns, zfec's form
                numbers = tuple(i for i in range(k) if i not in set(lost)) + tuple(used)
                blocks = tuple(source_bytes[i] if i < k else zfec_repairs[i - k] for i in numbers)
                zfec_link_blocks.append((blocks, numbers))
            for blocks, numbers in zfec_link_blocks[:8]:
                if b"".join(decoder.decode(blocks, numbers)) != b"".join(source_bytes):
                    raise AssertionError("zfec did not rebuild a link block")
            zfec_link = itertools.cycle(zfec_link_blocks)
            functions["zfec_link"] = lambda: decoder.decode(*next(zfec_link))
            functions["zfec_encode"] = lambda: encoder.encode(inputs, wanted)
            functions["zfec_decode"] = lambda: decoder.decode(*next(zfec_fresh))
    rates = _rates(functions, seconds)
    megabytes = k * length / 1e6
    zfec_encode = rates.get("zfec_encode")
    zfec_decode = rates.get("zfec_decode")
    return CodecFigures(
        k=k,
        m=m,
        length=length,
        encode=rates["encode"] * megabytes,
        decode=rates["decode"] * megabytes,
        decode_cached=rates["decode_cached"] * megabytes,
        decode_batch=rates["decode_batch"] * megabytes * DECODE_BATCH,
        zfec_encode=None if zfec_encode is None else zfec_encode * megabytes,
        zfec_decode=None if zfec_decode is None else zfec_decode * megabytes,
        decode_link=rates.get("decode_link", 0.0) * megabytes * link_batch,
        zfec_link=None if "zfec_link" not in rates else rates["zfec_link"] * megabytes,
        link_batch=link_batch,
        link_loss=link_loss,
    )


#: (window, repair interval, L) of the sliding-window code measured by default: the defaults of
#: ``fec.code: sliding`` (32, one repair per 4) and a 16-symbol window, both at 25 % overhead
#: like the block shape (16, 4, 1200) they are printed beside.
DEFAULT_SLIDING_SHAPES: tuple[tuple[int, int, int], ...] = ((16, 4, 1200), (32, 4, 1200))
#: Source symbols in the stream the sliding decoder is timed on (cycled); long enough to slide
#: the window many times over.
SLIDING_STREAM = 512


@dataclass(frozen=True)
class SlidingFigures:
    """Throughput in MB/s of source data of the sliding-window code (RFC 8681) for (W, x, L).

    ``encode``: one repair symbol over the W-symbol window every x source symbols;
    ``decode``: a stream of SLIDING_STREAM symbols, one source symbol lost in every x (a fresh
    seeded position each time, the m/k = 1/x share of the block figure), through the decoder's
    incremental solver (source symbols added, one equation per repair, window slid).
    """

    window: int
    interval: int
    length: int
    encode: float
    decode: float

    def as_dict(self) -> dict:
        return asdict(self)


def _sliding_shape(text: str) -> tuple[int, int, int]:
    try:
        window, interval, length = (int(part) for part in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"sliding shape must be W,X,L (three integers), got {text!r}") from None
    if not (1 <= interval <= window <= 255 and length >= 1):
        raise argparse.ArgumentTypeError(f"need 1 ≤ X ≤ W ≤ 255 and L ≥ 1, got {text!r}")
    return window, interval, length


def measure_sliding(window: int, interval: int, length: int, seconds: float = DEFAULT_SECONDS) -> SlidingFigures:
    """Encode and decode rates of the sliding-window code for one (W, x, L)."""
    rng = np.random.default_rng(SEED)
    stream = [bytes(row) for row in rng.integers(0, 256, size=(SLIDING_STREAM, length), dtype=np.uint8)]
    repairs: list[
        tuple[int, int, int, bytes]
    ] = []  # (first ESI, count, key, symbol) after every interval-th source symbol
    for end in range(interval, SLIDING_STREAM + 1, interval):
        first = max(0, end - window)
        key = len(repairs) % 4096
        repairs.append((first, end - first, key, sliding.encode_repair(stream[first:end], key)))
    lost = {int(start + rng.integers(0, interval)) for start in range(0, SLIDING_STREAM, interval)}

    def decode_stream() -> int:
        system = sliding.WindowSystem()
        rebuilt = 0
        for index, (first, count, key, symbol) in enumerate(repairs):
            for esi in range(index * interval, (index + 1) * interval):
                if esi not in lost:
                    rebuilt += len(system.add_known(esi, stream[esi]))
            rebuilt += len(system.add_equation(first, sliding.coefficients(key, count), symbol))
            system.forget_before(first)
        return rebuilt

    if decode_stream() != len(lost):
        raise AssertionError(f"sliding decoder did not rebuild every loss for W={window}, x={interval}, L={length}")
    window_symbols = stream[:window]
    rates = _rates({"encode": lambda: sliding.encode_repair(window_symbols, 7), "decode": decode_stream}, seconds)
    return SlidingFigures(
        window=window,
        interval=interval,
        length=length,
        encode=rates["encode"] * interval * length / 1e6,
        decode=rates["decode"] * SLIDING_STREAM * length / 1e6,
    )


def format_sliding_table(figures: list[SlidingFigures], blocks: list[CodecFigures]) -> str:
    header = f"{'code':>22} | {'encode':>8} | {'decode':>8}"
    lines = [
        "",
        "sliding-window code (RFC 8681, GF(2^8), dense) beside the block code, MB/s of source data:",
        f"sliding encode: one repair over W symbols per X source symbols; decode: {SLIDING_STREAM}-symbol stream, "
        "one source lost in every X, through the incremental solver",
        header,
        "-" * len(header),
    ]
    for b in blocks:
        lines.append(f"{f'block k={b.k} m={b.m} L={b.length}':>22} | {b.encode:>8.1f} | {b.decode:>8.1f}")
    for f in figures:
        lines.append(f"{f'sliding W={f.window} X={f.interval} L={f.length}':>22} | {f.encode:>8.1f} | {f.decode:>8.1f}")
    return "\n".join(lines)


def _cell(value: float | None, digits: int) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def format_table(figures: list[CodecFigures], seconds: float) -> str:
    header = (
        f"{'k':>4} {'m':>4} {'L':>6} | {'encode':>8} {'zfec enc':>9} {'ratio':>6} | "
        f"{'decode':>8} {'zfec dec':>9} {'ratio':>6} | {'dec/enc':>7} | {'batch':>8} {'ratio':>6} | {'cached':>8}"
    )
    lines = [
        f"codec throughput in MB/s of source data (best of {ROUNDS} alternating rounds, {seconds:g} s per "
        "function per shape)",
        f"decode: m lost source symbols per block, a fresh seeded random pattern every block "
        f"({PATTERN_POOL} patterns cycled; our pattern cache off, zfec on the same patterns)",
        f"batch: ours, fresh patterns, {DECODE_BATCH} damaged blocks per recover_many call; ratio against zfec's "
        "per-block decode",
        "cached: ours decoding one pattern again and again (pattern cache hit), for reference only",
        header,
        "-" * len(header),
    ]
    link_lines = [
        f"{f.k:>4} {f.m:>4} {f.length:>6} | {f.decode_link:>8.1f} {_cell(f.zfec_link, 1):>9} "
        f"{_cell(f.link_ratio, 2):>6}"
        for f in figures
        if f.decode_link
    ]
    for f in figures:
        lines.append(
            f"{f.k:>4} {f.m:>4} {f.length:>6} | {f.encode:>8.1f} {_cell(f.zfec_encode, 1):>9} "
            f"{_cell(f.encode_ratio, 2):>6} | {f.decode:>8.1f} {_cell(f.zfec_decode, 1):>9} "
            f"{_cell(f.decode_ratio, 2):>6} | {f.decode_over_encode:>7.2f} | {f.decode_batch:>8.1f} "
            f"{_cell(f.batch_ratio, 2):>6} | {f.decode_cached:>8.1f}"
        )
    if link_lines:
        f = figures[0]
        lines += [
            "",
            f"link: blocks as an i.i.d. {f.link_loss:g} link leaves them (1..m sources lost, only blocks that need "
            f"and allow a rebuild), fresh patterns, {f.link_batch} blocks per recover_many call (the receiver's "
            "batch at 50 000 datagrams/s, see --link-batch); zfec decodes the same blocks one by one",
            f"{'k':>4} {'m':>4} {'L':>6} | {'link dec':>8} {'zfec dec':>9} {'ratio':>6}",
            *link_lines,
        ]
    if figures and all(f.zfec_encode is None for f in figures):
        lines.append("zfec not installed: pip install 'fecproxy[bench]' to measure the baseline side by side")
    return "\n".join(lines)


def main(args: argparse.Namespace) -> int:
    shapes = args.shape or list(DEFAULT_SHAPES)
    link_batch = getattr(args, "link_batch", LINK_BATCH)
    link_loss = getattr(args, "link_loss", LINK_LOSS)
    figures = [
        measure_codec(k, m, length, args.seconds, link_batch=link_batch, link_loss=link_loss) for k, m, length in shapes
    ]
    sliding_shapes = getattr(args, "sliding", None) or list(DEFAULT_SLIDING_SHAPES)
    sliding_figures = [measure_sliding(w, x, length, args.seconds) for w, x, length in sliding_shapes]
    if args.json:
        print(
            json.dumps(
                {
                    "seconds": args.seconds,
                    "rounds": ROUNDS,
                    "decode_patterns": "fresh per block",
                    "pattern_pool": PATTERN_POOL,
                    "link_batch": link_batch,
                    "link_loss": link_loss,
                    "shapes": [f.as_dict() for f in figures],
                    "sliding": [f.as_dict() for f in sliding_figures],
                },
                indent=2,
            )
        )
    else:
        print(format_table(figures, args.seconds))
        print(format_sliding_table(sliding_figures, figures))
    return 0
