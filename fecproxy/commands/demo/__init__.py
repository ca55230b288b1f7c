"""``fecproxy demo``: the whole data path on loopback, with a live view and a side-by-side summary.

Why it exists: it is the first command a new user runs, so it must show in twenty seconds what FEC
buys on a bad link and what it costs, with nothing to configure.  The scenario and every number in
it are invented for this demo: a remote weather station sends sensor telemetry and camera stills
through a hill-top radio relay that loses packets in bursts.

One trio nursery, all on 127.0.0.1::

    station ──▶ sender Daemon ──▶ lossy relay (Gilbert–Elliott) ──▶ receiver Daemon ──▶ sink
       ◀────────── acknowledgements travel back the same way, through the same pair ◀────

Each application datagram carries a stream id, a sequence number, its send time and a BLAKE2b
checksum, so the sink measures loss, integrity and one-way delay itself instead of trusting the
daemons' counters.  A tap on the relay's forward link sees every packet on the air (source or
repair, lost or not), which gives the "without FEC" column, the overhead in packets and bytes,
and which datagrams the receiver had to rebuild.

Layout: pure helpers (datagram format, percentiles, planner prediction, the live view and summary
text) first, then the trio shell (station, sink, tap, wiring) and the command line.
"""

from __future__ import annotations

import argparse
import hashlib
import math
import signal
import struct
import sys
import textwrap
from array import array
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import trio
import trio.socket

from fecproxy.protocol import wire
from fecproxy.linkmodel.loss_models import ChannelConfigError, GilbertElliott
from fecproxy.config import MAX_ENCODING_SYMBOLS, MAX_HOLD_MS, ConfigError, parse_config
from fecproxy.linkmodel.planner import evaluate

# --------------------------------------------------------------------------------------------
# The scenario.  Every figure here is invented for the demo; none is a measurement.
# --------------------------------------------------------------------------------------------

#: The relay loses 8 % of packets (invented), in bursts of 3 packets on average (invented).
DEFAULT_LOSS = 0.08
DEFAULT_BURST = 3.0
#: Runs are reproducible unless the user asks for another seed.
DEFAULT_SEED = 1
#: Sensor readings per second, each one datagram of 100–300 bytes (invented).
DEFAULT_TELEMETRY_RATE = 20.0
TELEMETRY_BYTES = (100, 300)
#: A camera still of 60 KB every 5 s, cut into 1200-byte datagrams (invented); 1200 stays under
#: the daemon's default max_datagram_bytes of 1400.
CAMERA_IMAGE_BYTES = 60_000
CAMERA_CHUNK_BYTES = 1200
CAMERA_INTERVAL_S = 5.0
#: First still soon after start, so even a 3-second run carries one.
CAMERA_FIRST_S = 0.5
#: Chunks are paced like a ~1 Mbit/s radio modem would (invented), not fired in one burst.
CAMERA_CHUNK_RATE = 100.0
#: The sink acknowledges each stream this often, so the reply path through the pair is exercised.
ACK_INTERVAL_S = 0.5

#: Default code, chosen with fecproxy.planner (exact Gilbert–Elliott recursion) for loss 0.08,
#: mean burst 3.  Bursts with a geometric length tail need *long* blocks: at 50 % overhead the
#: residual loss per datagram is k=8,m=4: 3.5e-2; k=16,m=8: 1.6e-2; k=32,m=16: 4.0e-3;
#: k=64,m=32: 3.1e-4.  k=32, m=16 keeps the overhead at the half that a licensed data radio can
#: usually spare while cutting the loss about tenfold; telemetry alone fills ~20 datagrams per
#: 1-s block, which the proportional short-block rule protects with 10 repair packets
#: (k=20,m=10: 1.1e-2).  Weather readings tolerate a second of recovery delay, so blocks close
#: after 1000 ms rather than the daemon's 20 ms default meant for interactive traffic.
DEFAULT_K = 32
DEFAULT_M = 16
DEFAULT_FLUSH_MS = 1000
#: The receiver keeps an incomplete block this much longer than the sender's flush time, so the
#: repair packets of a block closed by its timer still find it (config: hold must exceed flush).
HOLD_MARGIN_MS = 500

DEFAULT_SECONDS = 20.0
#: A demo is not a soak test: an hour bounds memory (bitmaps and delay lists grow with the run).
MAX_SECONDS = 3600.0
#: Above this the demo stops being a modest background load on a 2-core machine.
MAX_TELEMETRY_RATE = 1000.0
#: Prometheus' port registry lists 9464 for the OpenTelemetry/Prometheus exporter (from memory);
#: it is what users of an exporter expect to scrape.
DEFAULT_METRICS_PORT = 9464
LOOPBACK = "127.0.0.1"
#: Header text is wrapped to fit an 80-column terminal with room to spare.
HEADER_WIDTH = 96

#: The live view is redrawn this often; without a terminal a plain line is printed less often,
#: so a captured log stays short.
LIVE_INTERVAL_S = 1.0
PLAIN_INTERVAL_S = 5.0
#: After the station stops, the demo waits for stragglers (rebuilt datagrams, the last acks) at
#: most the flush time plus the receiver's hold time, plus this margin.
SETTLE_MARGIN_S = 0.3
SETTLE_POLL_S = 0.05

# --------------------------------------------------------------------------------------------
# The application datagram: stream, sequence number, send time, body, checksum.
# --------------------------------------------------------------------------------------------

STREAM_TELEMETRY = 1
STREAM_CAMERA = 2
STREAM_ACK = 3
STREAM_NAMES = {STREAM_TELEMETRY: "telemetry", STREAM_CAMERA: "camera", STREAM_ACK: "ack"}

APP_HEADER = struct.Struct(">BId")  # stream, sequence number, send time (trio clock, seconds)
CHECKSUM_BYTES = 8  # BLAKE2b-64: a corrupted datagram slipping through is ~2^-64 per datagram
APP_OVERHEAD_BYTES = APP_HEADER.size + CHECKSUM_BYTES
CAMERA_CHUNK_HEADER = struct.Struct(">IHH")  # image number, chunk index, chunk count
ACK_BODY = struct.Struct(">BI")  # acknowledged stream, highest sequence number received


def _checksum(data: bytes | memoryview) -> bytes:
    return hashlib.blake2b(data, digest_size=CHECKSUM_BYTES).digest()


def pack_datagram(stream: int, seq: int, sent: float, body: bytes) -> bytes:
    """One application datagram; the checksum covers header and body."""
    head = APP_HEADER.pack(stream, seq, sent) + body
    return head + _checksum(head)


@dataclass(frozen=True, slots=True)
class AppDatagram:
    stream: int
    seq: int
    sent: float
    body: bytes


def unpack_datagram(data: bytes) -> AppDatagram | None:
    """The datagram, or None when it is too short, unknown or fails its checksum (= corrupted)."""
    if len(data) < APP_OVERHEAD_BYTES:
        return None
    head, digest = data[:-CHECKSUM_BYTES], data[-CHECKSUM_BYTES:]
    if _checksum(head) != digest:
        return None
    stream, seq, sent = APP_HEADER.unpack_from(head)
    if stream not in STREAM_NAMES:
        return None
    return AppDatagram(stream, seq, sent, bytes(head[APP_HEADER.size :]))


def peek_id(data: bytes | memoryview) -> tuple[int, int] | None:
    """(stream, seq) of a datagram without checking it: the tap's cheap look inside a packet."""
    if len(data) < APP_HEADER.size:
        return None
    stream, seq, _ = APP_HEADER.unpack_from(data)
    return stream, seq


def camera_chunks(image_number: int, image: bytes, chunk_bytes: int = CAMERA_CHUNK_BYTES) -> list[bytes]:
    """Bodies of one still's datagrams: a small header each, then up to the chunk size of image."""
    room = chunk_bytes - APP_OVERHEAD_BYTES - CAMERA_CHUNK_HEADER.size
    count = max(1, math.ceil(len(image) / room))
    return [CAMERA_CHUNK_HEADER.pack(image_number, i, count) + image[i * room : (i + 1) * room] for i in range(count)]


# --------------------------------------------------------------------------------------------
# Pure figures
# --------------------------------------------------------------------------------------------


def percentile(values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile (q in 0..100); NaN for no values.  Nearest rank keeps the value a
    real observation, which is what a reader of "max" and "p99" of a few dozen delays expects."""
    if not len(values):
        return math.nan
    ordered = sorted(values)
    rank = max(1, math.ceil(q / 100 * len(ordered)))
    return ordered[min(rank, len(ordered)) - 1]


def predicted_residual(channel: GilbertElliott, blocks: Counter) -> float:
    """Expected residual loss per source datagram for the blocks actually sent.

    ``blocks`` counts (k', m') pairs; each block's residual comes from the planner's exact
    recursion (which starts every block in the chain's stationary state), weighted by its k'.
    """
    total = sum(k * count for (k, _), count in blocks.items())
    if total == 0:
        return math.nan
    lost = sum(k * count * evaluate(channel, k, m).residual_loss for (k, m), count in blocks.items())
    return lost / total


def describe_link(channel: GilbertElliott) -> str:
    """The relay's loss in words, for the header and the summary."""
    if channel.average_loss == 0:
        return "loses no packets"
    if channel.is_memoryless:
        return f"loses {fmt_percent(channel.average_loss)} of packets independently"
    return (
        f"loses {fmt_percent(channel.average_loss)} of packets in bursts "
        f"(Gilbert–Elliott, mean burst {channel.mean_burst:.3g} packets)"
    )


def ratio(part: float, whole: float) -> float:
    return part / whole if whole else math.nan


def fmt_percent(value: float) -> str:
    if math.isnan(value):
        return "–"
    if value == 0:
        return "0 %"
    return f"{value * 100:.2f} %" if value >= 0.001 else f"{value * 100:.3f} %"


def fmt_ms(seconds: float) -> str:
    if math.isnan(seconds):
        return "–"
    ms = seconds * 1000
    return f"{ms:.0f} ms" if ms >= 100 else f"{ms:.1f} ms" if ms >= 1 else f"{ms:.2f} ms"


def fmt_bytes(count: float) -> str:
    for unit, size in (("MB", 1e6), ("kB", 1e3)):
        if count >= size:
            return f"{count / size:.1f} {unit}"
    return f"{count:.0f} B"


@dataclass(frozen=True)
class LiveSnapshot:
    """What the live view shows, gathered once a second."""

    elapsed: float
    rate: float  # datagrams/s reaching the sink over the last interval
    link_packets: int  # packets that faced the loss model so far (source and repair)
    link_lost: int
    source_sent: int
    source_lost: int  # source packets lost on the link
    recovered: int  # datagrams the sink got although the link lost their source packet
    unrecovered: int  # receiver's count of datagrams given up for good
    delay_p50: float  # one-way delay of datagrams that arrived in the last interval
    rebuilt_p50: float  # send → delivery of rebuilt datagrams so far
    acks: int


def format_live(s: LiveSnapshot) -> list[str]:
    return [
        f"t = {s.elapsed:5.1f} s   {s.rate:5.0f} datagrams/s at the sink   acks back {s.acks}",
        f"link lost {fmt_percent(ratio(s.link_lost, s.link_packets))} of packets, "
        f"{s.source_lost} of {s.source_sent} datagrams   recovered {s.recovered}   "
        f"residual loss {fmt_percent(ratio(s.unrecovered, s.source_sent))} ({s.unrecovered})",
        f"one-way delay p50 {fmt_ms(s.delay_p50)}   rebuilt datagrams p50 {fmt_ms(s.rebuilt_p50)}",
    ]


@dataclass(frozen=True)
class DemoResult:
    """Everything the summary shows, measured by the demo's own station, tap and sink."""

    seconds: float
    seed: int
    k: int
    m: int
    flush_ms: int
    channel: GilbertElliott
    sent: int  # application datagrams from the station
    app_bytes: int
    delivered: int  # distinct datagrams that reached the sink intact
    corrupted: int  # datagrams that reached the sink (or the station, for acks) failing the checksum
    duplicates: int
    link_source_lost: int  # source packets the link lost: the application's loss without FEC
    source_packets: int
    repair_packets: int
    source_wire_bytes: int
    repair_wire_bytes: int
    link_packets: int
    link_lost: int
    rebuilt_delays: Sequence[float]
    intact_delays: Sequence[float]
    images_sent: int
    images_complete: int
    images_complete_without_fec: int
    acks_sent: int
    acks_received: int
    receiver_lost: int  # the receiver daemon's own counters, for comparison
    receiver_recovered: int
    receiver_unrecovered: int
    blocks: Counter = field(default_factory=Counter)
    interrupted: bool = False

    @property
    def lost_with_fec(self) -> int:
        return self.sent - self.delivered

    @property
    def predicted_with_fec(self) -> float:
        return predicted_residual(self.channel, self.blocks)


def format_summary(r: DemoResult) -> str:
    """The side-by-side table: the application's view without FEC and with it."""
    left, right = 30, 24
    code = f"with FEC (k={r.k}, m={r.m}, flush {r.flush_ms} ms)"

    def row(label: str, without: str, with_fec: str) -> str:
        return f"  {label:<{left}} {without:<{right}} {with_fec}"

    on_air = r.source_wire_bytes + r.repair_wire_bytes
    rebuilt = r.rebuilt_delays
    if rebuilt:
        delay = (
            f"p50 {fmt_ms(percentile(rebuilt, 50))}, p99 {fmt_ms(percentile(rebuilt, 99))}, "
            f"max {fmt_ms(max(rebuilt))} ({len(rebuilt)} rebuilt)"
        )
    else:
        delay = "– (nothing needed rebuilding)"
    blocks = sum(r.blocks.values())
    lines = [
        f"Summary after {r.seconds:.1f} s{' (ended early)' if r.interrupted else ''}: seed {r.seed}; "
        f"the link and the traffic are invented demo figures.",
        row("", "without FEC", code),
        row(
            "datagrams lost",
            f"{r.link_source_lost} of {r.sent} ({fmt_percent(ratio(r.link_source_lost, r.sent))})",
            f"{r.lost_with_fec} of {r.sent} ({fmt_percent(ratio(r.lost_with_fec, r.sent))})",
        ),
        row(
            "camera stills complete",
            f"{r.images_complete_without_fec} of {r.images_sent}",
            f"{r.images_complete} of {r.images_sent}",
        ),
        row("corrupted datagrams", "–", f"{r.corrupted}"),
        row(
            "packets on the link",
            f"{r.sent}",
            f"{r.source_packets + r.repair_packets} (+{r.repair_packets} repair, "
            f"{fmt_percent(ratio(r.repair_packets, r.source_packets))} overhead)",
        ),
        row(
            "bytes on the link",
            fmt_bytes(r.app_bytes),
            f"{fmt_bytes(on_air)} (+{fmt_percent(ratio(on_air - r.app_bytes, r.app_bytes))}: "
            f"repair {fmt_bytes(r.repair_wire_bytes)}, headers {fmt_bytes(r.source_wire_bytes - r.app_bytes)})",
        ),
        row("delay of rebuilt datagrams", "–", delay),
        row(
            "planner's prediction",
            f"{fmt_percent(r.channel.average_loss)} lost",
            f"{fmt_percent(r.predicted_with_fec)} lost (exact, for the {blocks} blocks sent)",
        ),
        "",
        f"  link: lost {r.link_lost} of {r.link_packets} packets on the air ({fmt_percent(ratio(r.link_lost, r.link_packets))}); "
        f"configured: {describe_link(r.channel)}",
        f"  intact datagrams' one-way delay: p50 {fmt_ms(percentile(r.intact_delays, 50))}, "
        f"p99 {fmt_ms(percentile(r.intact_delays, 99))}",
        f"  acknowledgements back through the pair (over the same lossy radio): {r.acks_received} of {r.acks_sent}",
        f"  receiver counters (also on /metrics): lost {r.receiver_lost}, recovered {r.receiver_recovered}, "
        f"unrecovered {r.receiver_unrecovered}; duplicates at the sink {r.duplicates}",
        "  A short run sees few bursts, so measured losses scatter around the prediction.",
    ]
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# The trio shell
# --------------------------------------------------------------------------------------------


class SeqSet:
    """Which sequence numbers of one stream were seen: a growing bitmap, one bit per datagram."""

    def __init__(self) -> None:
        self._bits = bytearray()
        self.count = 0

    def add(self, seq: int) -> bool:
        """Record seq; False when it was already there (a duplicate)."""
        byte, bit = divmod(seq, 8)
        if byte >= len(self._bits):
            self._bits.extend(bytes(byte + 1 - len(self._bits) + 1024))
        if self._bits[byte] >> bit & 1:
            return False
        self._bits[byte] |= 1 << bit
        self.count += 1
        return True

    def __contains__(self, seq: int) -> bool:
        byte, bit = divmod(seq, 8)
        return byte < len(self._bits) and bool(self._bits[byte] >> bit & 1)


class LinkTap:
    """Counts every packet the relay's forward link carries, by kind, size and fate.

    It observes the relay's forward :class:`~fecproxy.impairment.ImpairedLink`
    (``relay.links['forward']``) through its ``on_air`` hook, so it sees each packet as it faces
    the loss model.  Only the public header layout of :mod:`fecproxy.packet` is read.
    """

    #: Finished blocks are folded into the (k', m') counter once this many are open in the tap.
    OPEN_BLOCKS = 8

    def __init__(self, link) -> None:
        self.link = link
        link.on_air = self.observe
        self.packets = self.lost = 0
        self.source_packets = self.repair_packets = 0
        self.source_bytes = self.repair_bytes = 0
        self.source_lost = 0
        self.lost_ids: set[tuple[int, int]] = set()
        self.blocks: Counter = Counter()
        self._open: dict[int, list[int]] = {}  # sbn -> [source packets, repair packets, k]

    def observe(self, data: bytes, lost: bool) -> None:
        self.packets += 1
        self.lost += lost
        if len(data) < wire.COMMON_HEADER.size:
            return
        version_type, _, _, sbn_esi = wire.COMMON_HEADER.unpack_from(data)
        kind, sbn = version_type & 0x0F, sbn_esi >> 8
        block = self._open.get(sbn)
        if block is None:
            block = self._open[sbn] = [0, 0, 0]
            if len(self._open) > self.OPEN_BLOCKS:
                self._fold(min(self._open))
        if kind == wire.PacketType.SOURCE:
            self.source_packets += 1
            self.source_bytes += len(data)
            block[0] += 1
            if lost:
                self.source_lost += 1
                ident = peek_id(memoryview(data)[wire.SOURCE_HEADER_BYTES :])
                if ident is not None:
                    self.lost_ids.add(ident)
        elif kind == wire.PacketType.REPAIR and len(data) >= wire.REPAIR_HEADER_BYTES:
            self.repair_packets += 1
            self.repair_bytes += len(data)
            block[1] += 1
            block[2] = wire.REPAIR_HEADER.unpack_from(data)[4]

    def _fold(self, sbn: int) -> None:
        source, repair, k = self._open.pop(sbn)
        self.blocks[(k or source, repair)] += 1

    def finish(self) -> Counter:
        for sbn in sorted(self._open):
            self._fold(sbn)
        return self.blocks


@dataclass
class DemoOptions:
    seconds: float = DEFAULT_SECONDS
    seed: int = DEFAULT_SEED
    loss: float = DEFAULT_LOSS
    burst: float = DEFAULT_BURST
    k: int = DEFAULT_K
    m: int = DEFAULT_M
    flush_ms: int = DEFAULT_FLUSH_MS
    rate: float = DEFAULT_TELEMETRY_RATE
    metrics_port: int = DEFAULT_METRICS_PORT
    live: bool = True


class DemoError(ValueError):
    """An option the demo cannot run with; the text says which and why."""


def build_configs(options: DemoOptions, sink: tuple, relay: tuple | None = None):
    """The receiver's config (relay unknown yet) or the sender's (relay given); raises ConfigError."""
    fec = {"block_size": options.k, "repair": options.m, "flush_ms": options.flush_ms}
    decoder = {"hold_ms": min(options.flush_ms + HOLD_MARGIN_MS, MAX_HOLD_MS)}
    common = {"link": {"bind": f"{LOOPBACK}:0"}, "fec": fec, "decoder": decoder}
    if relay is None:
        return parse_config({"role": "receiver", "forward": f"{sink[0]}:{sink[1]}", **common}, "demo receiver")
    common["link"]["peer"] = f"{relay[0]}:{relay[1]}"
    return parse_config({"role": "sender", "listen": f"{LOOPBACK}:0", **common}, "demo sender")


def check_options(options: DemoOptions) -> GilbertElliott:
    """Validate what the config parser does not see; returns the link's channel."""
    if not (math.isfinite(options.seconds) and 0 < options.seconds <= MAX_SECONDS):
        raise DemoError(f"--seconds must be > 0 and ≤ {MAX_SECONDS:g}, got {options.seconds!r}")
    if not (math.isfinite(options.rate) and 0 < options.rate <= MAX_TELEMETRY_RATE):
        raise DemoError(f"--rate must be > 0 and ≤ {MAX_TELEMETRY_RATE:g} datagrams/s, got {options.rate!r}")
    if not 0 <= options.metrics_port <= 65535:
        raise DemoError(f"--metrics-port must be 0..65535 (0 = any free port), got {options.metrics_port}")
    if not 1 <= options.k <= MAX_ENCODING_SYMBOLS - 1:
        raise DemoError(f"--k must be 1..{MAX_ENCODING_SYMBOLS - 1}, got {options.k}")
    if not 0 <= options.m <= min(options.k, MAX_ENCODING_SYMBOLS - options.k):
        raise DemoError(
            f"--m must be 0..{min(options.k, MAX_ENCODING_SYMBOLS - options.k)} with --k {options.k}: at most k "
            f"(RFC 6363 §8.2 keeps the repair rate at or below the source rate) and k + m ≤ {MAX_ENCODING_SYMBOLS} "
            f"(RFC 5510 §8.2, GF(2^8)); got {options.m}"
        )
    if not 0 <= options.loss < 1:
        raise DemoError(f"--loss must be in [0, 1), got {options.loss!r}")
    try:
        return GilbertElliott.from_loss_burst(options.loss, options.burst)
    except ChannelConfigError as error:
        raise DemoError(f"--loss/--burst: {error}") from None


class Station:
    """The weather station: telemetry at a steady rate and a camera still every few seconds."""

    def __init__(self, rate: float, seed: int) -> None:
        self.rate = rate
        self.rng = np.random.default_rng(seed)
        self.seq = {STREAM_TELEMETRY: 0, STREAM_CAMERA: 0}
        self.bytes = 0
        self.images_sent = 0
        self.image_chunks: dict[int, range] = {}  # image number -> its camera sequence numbers
        self.acks = 0
        self.corrupted_acks = 0

    @property
    def sent(self) -> int:
        return sum(self.seq.values())

    async def _send(self, sock, stream: int, body: bytes, address) -> None:
        data = pack_datagram(stream, self.seq[stream], trio.current_time(), body)
        await sock.sendto(data, address)
        self.seq[stream] += 1
        self.bytes += len(data)

    async def telemetry(self, sock, address) -> None:
        low, high = TELEMETRY_BYTES
        interval = 1.0 / self.rate
        next_send = trio.current_time()
        while True:
            size = int(self.rng.integers(low, high + 1))
            await self._send(sock, STREAM_TELEMETRY, self.rng.bytes(size - APP_OVERHEAD_BYTES), address)
            next_send += interval
            await trio.sleep_until(next_send)

    async def camera(self, sock, address) -> None:
        start = trio.current_time() + CAMERA_FIRST_S
        image_number = 0
        while True:
            await trio.sleep_until(start + image_number * CAMERA_INTERVAL_S)
            chunks = camera_chunks(image_number, self.rng.bytes(CAMERA_IMAGE_BYTES))
            first = self.seq[STREAM_CAMERA]
            next_send = trio.current_time()
            for body in chunks:
                await self._send(sock, STREAM_CAMERA, body, address)
                next_send += 1.0 / CAMERA_CHUNK_RATE
                await trio.sleep_until(next_send)
            self.image_chunks[image_number] = range(first, first + len(chunks))
            self.images_sent += 1
            image_number += 1

    async def receive_acks(self, sock) -> None:
        while True:
            data, _ = await sock.recvfrom(65536)
            datagram = unpack_datagram(data)
            if datagram is None or datagram.stream != STREAM_ACK:
                self.corrupted_acks += 1
            else:
                self.acks += 1


class Sink:
    """The station's server: checks every datagram, measures delay, acknowledges each stream."""

    def __init__(self, tap: LinkTap | None = None) -> None:
        self.tap = tap
        self.seen = {STREAM_TELEMETRY: SeqSet(), STREAM_CAMERA: SeqSet()}
        self.corrupted = 0
        self.duplicates = 0
        self.intact_delays = array("d")
        self.rebuilt_delays = array("d")
        self.recent_delays: list[float] = []  # since the live view last looked
        self.arrivals = 0
        self.reply_to: dict[int, tuple] = {}
        self.acks_sent = 0

    @property
    def delivered(self) -> int:
        return sum(s.count for s in self.seen.values())

    async def receive(self, sock) -> None:
        while True:
            data, address = await sock.recvfrom(65536)
            now = trio.current_time()
            datagram = unpack_datagram(data)
            if datagram is None or datagram.stream not in self.seen:
                self.corrupted += 1
                continue
            if not self.seen[datagram.stream].add(datagram.seq):
                self.duplicates += 1
                continue
            self.arrivals += 1
            self.reply_to[datagram.stream] = address
            delay = now - datagram.sent
            self.recent_delays.append(delay)
            if self.tap is not None and (datagram.stream, datagram.seq) in self.tap.lost_ids:
                self.rebuilt_delays.append(delay)
            else:
                self.intact_delays.append(delay)

    async def acknowledge(self, sock) -> None:
        """Every ACK_INTERVAL_S, one small datagram per stream back to where it came from."""
        while True:
            await trio.sleep(ACK_INTERVAL_S)
            for stream, address in list(self.reply_to.items()):
                body = ACK_BODY.pack(stream, self.seen[stream].count)
                await sock.sendto(pack_datagram(STREAM_ACK, self.acks_sent, trio.current_time(), body), address)
                self.acks_sent += 1


class LiveView:
    """Redraws the panel in place on a terminal; otherwise prints a plain line every few seconds."""

    def __init__(self, out, enabled: bool) -> None:
        self.out = out
        self.enabled = enabled
        self.tty = bool(getattr(out, "isatty", lambda: False)())
        self._drawn = 0
        self._last_plain = -math.inf

    def show(self, snapshot: LiveSnapshot) -> None:
        if not self.enabled:
            return
        lines = format_live(snapshot)
        if self.tty:
            up = f"\x1b[{self._drawn}F" if self._drawn else ""
            self.out.write(up + "".join(f"\x1b[2K  {line}\n" for line in lines))
            self._drawn = len(lines)
        elif snapshot.elapsed - self._last_plain >= PLAIN_INTERVAL_S - 1e-6:
            self._last_plain = snapshot.elapsed
            self.out.write("  " + " | ".join(lines) + "\n")
        self.out.flush()


def _fmt_addr(address) -> str:
    return f"{address[0]}:{address[1]}"


def _start_metrics(registry, port: int) -> tuple[object | None, str]:
    """Serve the receiver's /metrics; a busy port falls back to any free one, never to a crash."""
    from fecproxy.shell.metrics import serve

    try:
        server = serve(registry, LOOPBACK, port)
        return server.stop, f"http://{LOOPBACK}:{server.port}/metrics"
    except OSError as error:
        busy = f"port {port}: {error.strerror or error}"
    if port != 0:
        try:
            server = serve(registry, LOOPBACK, 0)
            return server.stop, f"http://{LOOPBACK}:{server.port}/metrics ({busy}, so a free port was taken)"
        except OSError as error:
            busy += f"; any free port: {error.strerror or error}"
    return None, f"off ({busy})"


async def run_demo(options: DemoOptions, out=None) -> DemoResult:
    """Wire everything up in one nursery, run for ``options.seconds``, wind down, return figures."""
    from fecproxy.shell.daemon import Daemon
    from fecproxy.shell.relay import RelayConfig, run_relay
    from fecproxy.linkmodel.impairment import LinkImpairment

    out = sys.stdout if out is None else out
    channel = check_options(options)
    stop_early = trio.Event()

    sink_sock = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
    telemetry_sock = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
    camera_sock = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
    stop_metrics = None
    with sink_sock, telemetry_sock, camera_sock:
        for sock in (sink_sock, telemetry_sock, camera_sock):
            await sock.bind((LOOPBACK, 0))
        sink_address = sink_sock.getsockname()
        receiver_config = build_configs(options, sink_address)
        async with trio.open_nursery() as nursery:
            nursery.start_soon(_watch_signals, stop_early)
            receiver = await nursery.start(Daemon(receiver_config, handle_signals=False).run)
            impairment = LinkImpairment(loss=channel)  # a radio path is usually alike both ways
            relay = await nursery.start(
                run_relay,
                RelayConfig(
                    listen=(LOOPBACK, 0), to=receiver.link_address[:2], forward=impairment, back=impairment, seed=options.seed
                ),
            )
            tap = LinkTap(relay.links["forward"])
            sender = await nursery.start(
                Daemon(build_configs(options, sink_address, relay.listen_address[:2]), handle_signals=False).run
            )
            stop_metrics, metrics_text = _start_metrics(receiver.registry, options.metrics_port)
            try:
                station, sink = Station(options.rate, options.seed), Sink(tap)
                _print_header(out, options, channel, sender, relay, receiver, sink_address, metrics_text)
                started = trio.current_time()
                async with trio.open_nursery() as traffic:
                    traffic.start_soon(sink.receive, sink_sock)
                    traffic.start_soon(sink.acknowledge, sink_sock)
                    traffic.start_soon(station.receive_acks, telemetry_sock)
                    traffic.start_soon(station.receive_acks, camera_sock)
                    live = LiveView(out, options.live)
                    traffic.start_soon(_live_loop, live, station, sink, tap, receiver, started)
                    async with trio.open_nursery() as sources:
                        sources.start_soon(station.telemetry, telemetry_sock, sender.listen_address)
                        sources.start_soon(station.camera, camera_sock, sender.listen_address)
                        with trio.move_on_at(started + options.seconds):
                            await stop_early.wait()
                        sources.cancel_scope.cancel()
                    ran_for = trio.current_time() - started
                    await _settle(station, sink, options, stop_early)
                    traffic.cancel_scope.cancel()

                await sender.stop()
                await receiver.stop()
                blocks = tap.finish()
                receiver_stats = receiver.decoder.stats
                return _result(
                    options, channel, ran_for, station, sink, tap, blocks, receiver_stats, stop_early.is_set()
                )
            finally:
                if stop_metrics is not None:
                    stop_metrics()
                nursery.cancel_scope.cancel()


def _print_header(out, options, channel, sender, relay, receiver, sink_address, metrics_text) -> None:
    story = (
        "An invented scenario with invented figures: a remote weather station sends sensor telemetry "
        f"({options.rate:g} datagrams/s of {TELEMETRY_BYTES[0]}–{TELEMETRY_BYTES[1]} bytes) and a "
        f"{CAMERA_IMAGE_BYTES // 1000} kB camera still every {CAMERA_INTERVAL_S:g} s (in {CAMERA_CHUNK_BYTES}-byte "
        f"datagrams) through a hill-top radio relay that {describe_link(channel)}, seed {options.seed}."
    )
    rows = [
        "fecproxy demo",
        *textwrap.wrap(story, HEADER_WIDTH, initial_indent="  ", subsequent_indent="  "),
        f"  station → sender {_fmt_addr(sender.listen_address)} → lossy relay {_fmt_addr(relay.listen_address)} "
        f"→ receiver {_fmt_addr(receiver.link_address)} → sink {_fmt_addr(sink_address)}",
        "  (the sink's acknowledgements travel back the same way)",
        f"  FEC: k={options.k} source + m={options.m} repair packets per block; blocks close after {options.flush_ms} ms",
        f"  receiver metrics: {metrics_text}",
        f"  running for {options.seconds:g} s (Ctrl-C ends early with the summary)",
        "",
    ]
    out.write("\n".join(rows) + "\n")
    out.flush()


async def _watch_signals(stop_early) -> None:
    """SIGINT/SIGTERM end the run early but still print the summary."""
    try:
        with trio.open_signal_receiver(signal.SIGINT, signal.SIGTERM) as signals:
            async for _ in signals:
                stop_early.set()
    except RuntimeError:  # not the main thread (an embedding test): no signal handling
        await trio.sleep_forever()


async def _live_loop(live: LiveView, station: Station, sink: Sink, tap: LinkTap, receiver, started: float) -> None:
    last_arrivals, last_time = 0, started
    while True:
        await trio.sleep_until(last_time + LIVE_INTERVAL_S)
        now = trio.current_time()
        recent, sink.recent_delays = sink.recent_delays, []
        live.show(
            LiveSnapshot(
                elapsed=now - started,
                rate=(sink.arrivals - last_arrivals) / (now - last_time),
                link_packets=tap.packets,
                link_lost=tap.lost,
                source_sent=station.sent,
                source_lost=tap.source_lost,
                recovered=len(sink.rebuilt_delays),
                unrecovered=receiver.decoder.stats.unrecovered,
                delay_p50=percentile(recent, 50),
                rebuilt_p50=percentile(sink.rebuilt_delays, 50),
                acks=station.acks,
            )
        )
        last_arrivals, last_time = sink.arrivals, now


async def _settle(station: Station, sink: Sink, options: DemoOptions, stop_early) -> None:
    """Wait until every datagram and ack is in, or the receiver must have given up on the rest."""
    limit = (options.flush_ms + min(options.flush_ms + HOLD_MARGIN_MS, MAX_HOLD_MS)) / 1000 + SETTLE_MARGIN_S
    with trio.move_on_after(limit):
        pressed = stop_early.is_set()
        while sink.delivered < station.sent or station.acks < sink.acks_sent:
            if pressed != stop_early.is_set():  # a second Ctrl-C: do not wait any longer
                return
            await trio.sleep(SETTLE_POLL_S)


def _result(options, channel, ran_for, station, sink, tap, blocks, receiver_stats, interrupted) -> DemoResult:
    seen_camera = sink.seen[STREAM_CAMERA]
    complete = without = 0
    for seqs in station.image_chunks.values():
        complete += all(seq in seen_camera for seq in seqs)
        without += not any((STREAM_CAMERA, seq) in tap.lost_ids for seq in seqs)
    return DemoResult(
        seconds=ran_for,
        seed=options.seed,
        k=options.k,
        m=options.m,
        flush_ms=options.flush_ms,
        channel=channel,
        sent=station.sent,
        app_bytes=station.bytes,
        delivered=sink.delivered,
        corrupted=sink.corrupted + station.corrupted_acks,
        duplicates=sink.duplicates,
        link_source_lost=tap.source_lost,
        source_packets=tap.source_packets,
        repair_packets=tap.repair_packets,
        source_wire_bytes=tap.source_bytes,
        repair_wire_bytes=tap.repair_bytes,
        link_packets=tap.packets,
        link_lost=tap.lost,
        rebuilt_delays=list(sink.rebuilt_delays),
        intact_delays=list(sink.intact_delays),
        images_sent=station.images_sent,
        images_complete=complete,
        images_complete_without_fec=without,
        acks_sent=sink.acks_sent,
        acks_received=station.acks,
        receiver_lost=receiver_stats.lost,
        receiver_recovered=receiver_stats.recovered,
        receiver_unrecovered=receiver_stats.unrecovered,
        blocks=blocks,
        interrupted=interrupted,
    )


# --------------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------------


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        "The weather station, the radio relay and all their figures are invented for this demo. "
        "Everything runs in one process on 127.0.0.1 and ends by itself."
    )
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS, help="how long the station sends")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed of the link's losses and of the traffic")
    parser.add_argument("--loss", type=float, default=DEFAULT_LOSS, help="average packet loss of the radio relay, 0..1")
    parser.add_argument("--burst", type=float, default=DEFAULT_BURST, help="mean length of a loss burst, in packets (≥ 1)")
    parser.add_argument("--k", type=int, default=DEFAULT_K, help="source datagrams per block")
    parser.add_argument("--m", type=int, default=DEFAULT_M, help="repair packets per full block (0 = no protection)")
    parser.add_argument(
        "--flush-ms", type=int, default=DEFAULT_FLUSH_MS, help="a block not full after this many ms is closed and protected as it is"
    )
    parser.add_argument("--rate", type=float, default=DEFAULT_TELEMETRY_RATE, help="telemetry datagrams per second")
    parser.add_argument(
        "--metrics-port",
        type=int,
        default=DEFAULT_METRICS_PORT,
        help=f"serve the receiver's Prometheus metrics on {LOOPBACK}:PORT (0 = any free port; a busy port falls back to a free one)",
    )
    parser.add_argument("--no-live", action="store_true", help="no live view, only the header and the summary")


def main(args: argparse.Namespace) -> int:
    options = DemoOptions(
        seconds=args.seconds,
        seed=args.seed,
        loss=args.loss,
        burst=args.burst,
        k=args.k,
        m=args.m,
        flush_ms=args.flush_ms,
        rate=args.rate,
        metrics_port=args.metrics_port,
        live=not args.no_live,
    )
    try:
        check_options(options)
        build_configs(options, (LOOPBACK, 1), (LOOPBACK, 1))  # settings errors before any socket opens
    except DemoError as error:
        print(f"fecproxy demo: {error}", file=sys.stderr)
        return 2
    except ConfigError as error:
        for message in error.messages:
            print(f"fecproxy demo: {_option_names(message)}", file=sys.stderr)
        return 2
    try:
        result = trio.run(run_demo, options)
    except KeyboardInterrupt:  # Ctrl-C before the demo's own handler was installed: nothing to sum up
        print("fecproxy demo: interrupted while starting", file=sys.stderr)
        return 130
    print()
    print(format_summary(result), flush=True)
    return 0


_OPTION_OF_KEY = {"fec.block_size": "--k", "fec.repair": "--m", "fec.flush_ms": "--flush-ms"}


def _option_names(message: str) -> str:
    """Config messages name YAML keys; the demo's user typed options."""
    for key, option in _OPTION_OF_KEY.items():
        message = message.replace(key, option)
    return message.replace("demo sender: ", "")

