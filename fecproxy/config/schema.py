"""The daemon's YAML configuration: read once, validated in full, then a frozen typed object.

Everything is checked here and nowhere else, once: the daemon receives a :class:`Config` whose
values it can trust and checks none of them again.  Validation never stops at the first fault:
every message is collected, each naming the file, the key path, the bad value and what is
expected, and they are raised together as one :class:`ConfigError`.

The schema is a table (section -> dataclass -> one checker per key); defaults live in the
dataclass fields, so the table, the defaults and :meth:`Config.effective` cannot drift apart.

Public API (re-exported by :mod:`fecproxy.config`): :func:`parse_config`, :class:`Config` and its
sections, :class:`ConfigError`, and the named limits and defaults.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from enum import StrEnum

from fecproxy.config.addresses import Address
from fecproxy.config.checkers import (
    AddressField,
    Bad,
    BadKeys,
    BitRate,
    Boolean,
    Choice,
    FilePath,
    Integer,
    NestedMapping,
    Number,
    SizeBoundaries,
)
from fecproxy.config.messages import closest, key_text, kind_of, or_list, show_value
from fecproxy.protocol import decoder as _decoder
from fecproxy.protocol import encoder as _encoder
from fecproxy.protocol import ordering as _ordering
from fecproxy.protocol import pacer as _pacer
from fecproxy.protocol import sliding_encoder as _sliding
from fecproxy.protocol import wire
from fecproxy.protocol.flows import FLOW_SLOTS
from fecproxy.protocol.keys import MasterKey
from fecproxy.protocol.repair_rule import DEFAULT_SHORT_BLOCK_REPAIR, ShortBlockRepair, repair_count

# --------------------------------------------------------------------------------------------
# Limits and defaults.  Each is named, with the reason for its value.
# --------------------------------------------------------------------------------------------

#: RFC 5510 §8.2: with GF(2^8) a block has n = k + m ≤ 255 encoding symbols.
MAX_ENCODING_SYMBOLS = wire.MAX_K

#: The sender's block shape and flush interval: the protocol core owns the defaults and their
#: reasons (fecproxy.protocol.encoder); the config keys show them in their own units.
DEFAULT_BLOCK_SIZE = _encoder.DEFAULT_BLOCK_SIZE
DEFAULT_REPAIR = _encoder.DEFAULT_REPAIR
DEFAULT_FLUSH_MS = round(_encoder.DEFAULT_FLUSH_INTERVAL * 1000)
#: Interleave depth and size classes: the encoder owns their defaults, bounds and reasons.
DEFAULT_INTERLEAVE = _encoder.DEFAULT_INTERLEAVE
MAX_INTERLEAVE = _encoder.MAX_INTERLEAVE
DEFAULT_SIZE_CLASSES = _encoder.DEFAULT_SIZE_CLASSES
MAX_SIZE_BOUNDARIES = _encoder.MAX_SIZE_BOUNDARIES
#: The sliding-window code (fec.code: sliding): the encoder owns its defaults, bounds and reasons.
DEFAULT_WINDOW = _sliding.DEFAULT_WINDOW
MAX_WINDOW = _sliding.MAX_WINDOW
DEFAULT_WINDOW_MS = round(_sliding.DEFAULT_WINDOW_AGE * 1000)
#: A window older than a minute protects nothing interactive; the same bound as flush_ms.
MAX_WINDOW_MS = 60_000
DEFAULT_REPAIR_INTERVAL = _sliding.DEFAULT_REPAIR_INTERVAL


class FecCode(StrEnum):
    """Which code the sender uses (the receiver decodes either, whatever its own setting)."""

    BLOCK = "block"  # Reed–Solomon blocks of k (RFC 5510)
    SLIDING = "sliding"  # sliding-window random linear code (RFC 8681)


#: A block held open for more than a minute protects nothing in time for any real-time use, and
#: keeps memory busy; beyond that the setting is surely a unit mistake (seconds for ms).
MAX_FLUSH_MS = 60_000

#: The wire format owns the default and its reason (fecproxy.protocol.wire.DEFAULT_MAX_DATAGRAM).
DEFAULT_MAX_DATAGRAM_BYTES = wire.DEFAULT_MAX_DATAGRAM
#: Room reserved for a future authentication tag (HMAC-SHA-256 output is 32 bytes).
AUTH_TAG_RESERVE_BYTES = wire.AUTH_TAG_RESERVE_BYTES
#: The largest UDP payload over IPv4: 65535 − 20 (IPv4 header, RFC 791) − 8 (UDP, RFC 768).
MAX_UDP_PAYLOAD_BYTES = 65_507
#: The largest datagram whose repair packet (with the tag reserve) still fits one UDP datagram.
MAX_DATAGRAM_BYTES_LIMIT = (
    MAX_UDP_PAYLOAD_BYTES - wire.REPAIR_HEADER_BYTES - wire.SYMBOL_PREFIX_BYTES - AUTH_TAG_RESERVE_BYTES
)

#: The decoder owns the hold time and its reason (fecproxy.protocol.decoder.DEFAULT_HOLD_TIME).
DEFAULT_HOLD_MS = round(_decoder.DEFAULT_HOLD_TIME * 1000)
#: An hour-long hold is never useful; a minute is already generous and bounds the memory held.
MAX_HOLD_MS = 60_000

#: In-order delivery owns its bound and its reason (fecproxy.protocol.ordering.DEFAULT_MAX_WAIT).
DEFAULT_MAX_WAIT_MS = round(_ordering.DEFAULT_MAX_WAIT * 1000)
MAX_MAX_WAIT_MS = round(_ordering.MAX_MAX_WAIT * 1000)

#: The decoder owns the open-block bound and its reason (decoder.DEFAULT_MAX_OPEN_BLOCKS).
DEFAULT_MAX_OPEN_BLOCKS = _decoder.DEFAULT_MAX_OPEN_BLOCKS
#: Worst case 65536 × 255 × 1403 bytes would be ~23 GiB; this cap stops a typo, the operator
#: still has to size memory for what they choose.
MAX_OPEN_BLOCKS_LIMIT = 65_536
#: The decoder owns its byte budget, its floor and their reasons (decoder.DEFAULT_MAX_MEMORY_BYTES).
DEFAULT_MAX_MEMORY_BYTES = _decoder.DEFAULT_MAX_MEMORY_BYTES
MIN_MEMORY_BYTES = _decoder.MIN_MEMORY_BYTES
#: 64 GiB: far above any machine this runs on; stops a typo, not a choice.
MAX_MEMORY_BYTES_LIMIT = 64 * 1024**3
#: A million rebuilds a second is far above what one core can do (~50 µs each): the cap stops a
#: typo; null (the default) means no cap.
MAX_REBUILDS_PER_S_LIMIT = 1_000_000

#: Flow ids are a 16-bit slot and an 8-bit generation (protocol.flows, planned wire format).
#: Half the slot space: free slots are handed out least recently freed first, so with at most
#: half of them in use a slot rests for at least 32 768 hand-outs before its next client.
MAX_FLOWS_LIMIT = FLOW_SLOTS // 2
#: Thousands of clients, each request from a fresh port (a resolver, a poller): 4096 flows hold
#: ~136 new clients a second for the 30 s first-exchange timeout before the oldest are recycled.
#: A receiver keeps one socket per flow, so 4096 needs the file-descriptor limit raised above
#: the usual soft limit of 1024 (from memory); the systemd unit sets it.
DEFAULT_MAX_FLOWS = 4096
#: Linux nf_conntrack forgets a UDP "stream" (traffic seen both ways) after 120 s (from memory);
#: a proxy that keeps a flow as long as a NAT on the path would is unsurprising to operators.
#: This is the timeout of established flows.
DEFAULT_FLOW_IDLE_TIMEOUT_S = 120
#: A flow still in its first exchange (no reply yet, or replies to its first request only) is
#: forgotten after 30 s idle, as stateful firewalls time out unreplied UDP (nf_conntrack: 30 s,
#: from memory): a one-off query is long answered by then.  Capped by idle_timeout_s.
DEFAULT_FLOW_FIRST_EXCHANGE_TIMEOUT_S = 30
#: A day: an idle flow kept longer than this is a leak, not a setting.
MAX_FLOW_IDLE_TIMEOUT_S = 86_400
#: A flow active within the last 2 s may still wait for its reply: a geostationary round trip
#: (~0.6 s, from memory) plus the default decoder hold on both sides (2 × 0.5 s) fits inside it,
#: so a full table refuses a new client rather than cut a live exchange (common practice, no
#: source).  0 = always evict the least recently active flow, never refuse.
DEFAULT_FLOW_PROTECT_S = 2
#: Protection beyond the longest idle timeout would mean never evicting at all.
MAX_FLOW_PROTECT_S = MAX_FLOW_IDLE_TIMEOUT_S

#: 4 MiB of socket buffer absorbs ~30 ms of 1400-byte datagrams at 100 000/s, enough to ride out
#: a scheduling hiccup of the event loop on a busy 2-core box.  Linux caps the request at
#: net.core.rmem_max / wmem_max unless raised, so the daemon should log what it actually got.
#: 0 keeps the operating system's default.
DEFAULT_SOCKET_BUFFER_BYTES = 4 * 1024 * 1024
#: SO_RCVBUF/SO_SNDBUF take a C int and Linux doubles the request (socket(7)), so the largest
#: value that cannot overflow is INT_MAX // 2.
MAX_SOCKET_BUFFER_BYTES = (2**31 - 1) // 2

#: log.stats_interval_s: one stats line a minute shows a quiet daemon is alive and what the link
#: did, at 1440 lines a day (a journal keeps that for months); common practice, no source.
DEFAULT_STATS_INTERVAL_S = 60
#: A day: beyond that a periodic line tells nothing a restart would not.
MAX_STATS_INTERVAL_S = 86_400

#: fec.adapt.target_residual: one datagram in a thousand left unrecovered, ten times under the
#: ~1 % loss that voice and video codecs conceal well (from memory; common practice, no source).
DEFAULT_TARGET_RESIDUAL = 1e-3
#: fec.adapt.min_repair: one repair packet per block even on a clean link, so the first loss after
#: a quiet spell is repaired while the report that shows it is still on its way.  Common practice,
#: no source.
DEFAULT_MIN_REPAIR = 1
#: fec.adapt.max_overhead: RFC 6363 §8.2 — the repair rate never above the source rate (packets and
#: bytes); an operator narrows it to what the link budget affords.
DEFAULT_MAX_OVERHEAD = 1.0
#: reports.interval_ms: one loss report a second.  A 66-byte packet per second (528 bit/s) costs
#: nothing even on a narrow radio link, and lets the sender follow a fading link within a few
#: seconds.  0 turns reports off.
DEFAULT_REPORT_INTERVAL_MS = 1000
#: A report period above a minute cannot follow a link; it also keeps the value inside the report's
#: 16-bit interval field (fecproxy.protocol.loss_report.MAX_INTERVAL_MS).
MAX_REPORT_INTERVAL_MS = 60_000


#: link.queue_ms: one second of air time.  It holds a 60 kB burst at 512 kbit/s; narrower links
#: need more (the trial configs set it), and more also means longer waits behind a burst.  CoDel's
#: 100 ms interval (RFC 8289 §4.2) is sized for the Internet, not a radio.  Common practice, no source.
DEFAULT_LINK_QUEUE_MS = 1000
#: A minute of air time is a store-and-forward buffer, not a queue.
MAX_LINK_QUEUE_MS = 60_000
#: link.mtu: Ethernet's 1500 bytes (RFC 894).  Bounds: IPv4's 576-byte minimum datagram every host
#: must accept (RFC 791 §3.1) and the largest IPv4 total length.
DEFAULT_LINK_MTU = 1500
MIN_LINK_MTU = 576
MAX_LINK_MTU = 65_535
#: link.rate bounds: the pacer's floor (no IP radio below 1200 bit/s, from memory) to 10 Gbit/s.
MIN_LINK_RATE_BPS = _pacer.MIN_RATE_BPS
MAX_LINK_RATE_BPS = 10e9

# --------------------------------------------------------------------------------------------
# Typed values
# --------------------------------------------------------------------------------------------


class Role(StrEnum):
    SENDER = "sender"
    RECEIVER = "receiver"


class LogLevel(StrEnum):
    DEBUG = "debug"
    INFO = "info"
    WARNING = "warning"
    ERROR = "error"


class DeliveryOrder(StrEnum):
    AS_AVAILABLE = "as_available"  # each datagram leaves the moment it arrives or is rebuilt
    IN_ORDER = "in_order"  # each flow's datagrams leave in the order the sender took them


class LogFormat(StrEnum):
    TEXT = "text"  # key=value fields on one line
    JSON = "json"  # one JSON object per line


class ConfigError(ValueError):
    """An invalid configuration; ``messages`` holds every fault found, one line each."""

    def __init__(self, messages: Iterable[str]) -> None:
        self.messages = tuple(messages)
        super().__init__("\n".join(self.messages))


class ConfigUnreadable(ConfigError):
    """The file could not be read at all (missing, a directory, no permission, too large)."""


# --------------------------------------------------------------------------------------------
# The configuration object
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LinkSection:
    bind: Address  # local address of the link side (port 0 = any free port)
    peer: Address | None = None  # the other proxy; None on a receiver = learned from traffic
    rate: float | None = None  # air rate in bit/s (IP/UDP headers counted); None = no pacing
    queue_ms: int = DEFAULT_LINK_QUEUE_MS  # air time the pacer may hold
    mtu: int = DEFAULT_LINK_MTU  # path MTU the operator declares (fecproxy check compares packets with it)

    @property
    def paced(self) -> bool:
        return self.rate is not None


@dataclass(frozen=True)
class AdaptSection:
    """fec.adapt: the sender chooses m for the next blocks from the receiver's loss reports."""

    target_residual: float = DEFAULT_TARGET_RESIDUAL
    min_repair: int = DEFAULT_MIN_REPAIR
    max_repair: int | None = None  # None = as many as max_overhead and n ≤ 255 allow
    max_overhead: float = DEFAULT_MAX_OVERHEAD

    def repair_ceiling(self, block_size: int) -> int:
        """The largest m the controller may choose for k = block_size."""
        by_overhead = int(block_size * self.max_overhead + 1e-9)
        ceiling = min(by_overhead, MAX_ENCODING_SYMBOLS - block_size)
        return ceiling if self.max_repair is None else min(ceiling, self.max_repair)


@dataclass(frozen=True)
class FecSection:
    block_size: int = DEFAULT_BLOCK_SIZE  # k
    repair: int = DEFAULT_REPAIR  # m
    flush_ms: int = DEFAULT_FLUSH_MS
    max_datagram_bytes: int = DEFAULT_MAX_DATAGRAM_BYTES
    short_block_repair: ShortBlockRepair = DEFAULT_SHORT_BLOCK_REPAIR
    allow_repair_above_source: bool = False
    adapt: AdaptSection | None = None  # None = m stays fixed at repair
    interleave: int = DEFAULT_INTERLEAVE  # D: open blocks per size class, fed in turn
    size_classes: tuple[int, ...] = DEFAULT_SIZE_CLASSES  # boundaries in bytes; () = one class
    code: FecCode = FecCode.BLOCK  # block by default: the code every earlier receiver decodes
    window: int = DEFAULT_WINDOW  # sliding: source packets in the encoding window
    window_ms: int = DEFAULT_WINDOW_MS  # sliding: oldest source packet the window keeps
    repair_interval: int = DEFAULT_REPAIR_INTERVAL  # sliding: one repair packet every this many

    @property
    def flush_seconds(self) -> float:
        """flush_ms in seconds, the unit of the cores' ``now``."""
        return self.flush_ms / 1000

    def repair_for(self, k_actual: int) -> int:
        """Repair packets for a block closed with k_actual ≤ block_size datagrams.

        A full block gets m.  A short block (closed by its flush timer) gets, by
        ``short_block_repair``: proportional = ceil(m·k'/k), which is ≥ 1 whenever m > 0, so
        sparse telemetry is neither left bare nor flooded; full = m.  m = 0 always gives 0.
        The rule itself lives in fecproxy.repair_rule, shared with the encoder and planner.
        """
        if isinstance(k_actual, bool) or not isinstance(k_actual, int) or not 1 <= k_actual <= self.block_size:
            raise ValueError(f"k_actual must be an integer 1..{self.block_size}, got {k_actual!r}")
        return repair_count(self.block_size, self.repair, k_actual, str(self.short_block_repair))


@dataclass(frozen=True)
class DecoderSection:
    hold_ms: int = DEFAULT_HOLD_MS
    max_open_blocks: int = DEFAULT_MAX_OPEN_BLOCKS
    max_memory_bytes: int = DEFAULT_MAX_MEMORY_BYTES  # everything held for the peer (README "Bounds")
    max_rebuilds_per_s: int | None = None  # decode-work cap; None = no cap

    @property
    def hold_seconds(self) -> float:
        return self.hold_ms / 1000


@dataclass(frozen=True)
class DeliverySection:
    """What this daemon hands its applications: as available (the default: no added wait) or
    each flow in order, a datagram after a gap waiting at most max_wait_ms for it."""

    order: DeliveryOrder = DeliveryOrder.AS_AVAILABLE
    max_wait_ms: int = DEFAULT_MAX_WAIT_MS

    @property
    def in_order(self) -> bool:
        return self.order is DeliveryOrder.IN_ORDER

    @property
    def max_wait_seconds(self) -> float:
        return self.max_wait_ms / 1000


@dataclass(frozen=True)
class FlowsSection:
    max: int = DEFAULT_MAX_FLOWS
    idle_timeout_s: int = DEFAULT_FLOW_IDLE_TIMEOUT_S  # established flows
    first_exchange_timeout_s: int = DEFAULT_FLOW_FIRST_EXCHANGE_TIMEOUT_S  # capped by idle_timeout_s
    protect_s: int = DEFAULT_FLOW_PROTECT_S  # never evict a flow active this recently


@dataclass(frozen=True)
class SocketsSection:
    receive_buffer_bytes: int = DEFAULT_SOCKET_BUFFER_BYTES  # 0 = the OS default
    send_buffer_bytes: int = DEFAULT_SOCKET_BUFFER_BYTES  # 0 = the OS default


@dataclass(frozen=True)
class LogSection:
    level: LogLevel = LogLevel.INFO
    format: LogFormat = LogFormat.TEXT
    stats_interval_s: int = DEFAULT_STATS_INTERVAL_S  # 0 = no periodic stats line


@dataclass(frozen=True)
class MetricsSection:
    listen: Address | None = None  # Prometheus endpoint; None = disabled

    @property
    def enabled(self) -> bool:
        return self.listen is not None


@dataclass(frozen=True)
class AuthSection:
    """Packet authentication with a pre-shared key (RFC 6363 §9); off when key_file is unset.

    ``key_file`` and ``previous_key_file`` are paths as written in the YAML (relative ones are
    taken from the config file's directory).  :func:`fecproxy.config.load_config` reads them and
    fills ``key`` and ``previous_key``; the keys never appear in a repr or in :meth:`Config.effective`.
    """

    key_file: str | None = None  # 64 hex digits, mode 0600 (`fecproxy keygen PATH`)
    previous_key_file: str | None = None  # also accepted during a key rollover
    encrypt: bool = False  # ChaCha20-Poly1305 over source and repair packets alike
    key: MasterKey | None = field(default=None, repr=False)
    previous_key: MasterKey | None = field(default=None, repr=False)

    @property
    def enabled(self) -> bool:
        return self.key_file is not None


@dataclass(frozen=True)
class ReportsSection:
    interval_ms: int = DEFAULT_REPORT_INTERVAL_MS  # 0 = send no loss reports

    @property
    def enabled(self) -> bool:
        return self.interval_ms > 0


@dataclass(frozen=True)
class Config:
    """One daemon's settings.  Build it with :func:`parse_config` or :func:`load_config`."""

    role: Role
    link: LinkSection
    listen: Address | None = None  # sender: applications send their datagrams here
    forward: Address | None = None  # receiver: rebuilt datagrams are delivered here
    fec: FecSection = FecSection()
    decoder: DecoderSection = DecoderSection()
    delivery: DeliverySection = DeliverySection()
    flows: FlowsSection = FlowsSection()
    sockets: SocketsSection = SocketsSection()
    log: LogSection = LogSection()
    metrics: MetricsSection = MetricsSection()
    reports: ReportsSection = ReportsSection()
    auth: AuthSection = AuthSection()

    def effective(self) -> dict:
        """Every key with defaults filled in, nested as in the YAML; absent addresses are None.

        The result is plain data (str, int, bool, None): safe to dump as YAML and to feed back
        to :func:`parse_config`, which gives an equal Config (keys loaded from key files aside:
        only their paths are shown).
        """
        document: dict = {}
        for name in TOP_LEVEL_KEYS:
            value = getattr(self, name)
            if name in _SECTIONS:  # the YAML keys only: never the loaded key material
                document[name] = {key: _plain(getattr(value, key)) for key in _SECTIONS[name][1]}
            else:
                document[name] = _plain(value)
        return document


def _plain(value):
    if dataclasses.is_dataclass(value) and not isinstance(value, Address):
        return {f.name: _plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, Address):
        return str(value)
    if isinstance(value, StrEnum):
        return value.value
    if isinstance(value, tuple):
        return [_plain(item) for item in value]
    return value


def _suggest(name: str, section: str | None) -> str:
    """The hint after "unknown key": a near miss here, the same key elsewhere, or the list."""
    local = list(_SECTIONS[section][1]) if section else list(TOP_LEVEL_KEYS)
    prefix = f"{section}." if section else ""
    near = closest(name, local)
    if near:
        return f"did you mean {prefix}{near}?"
    elsewhere = [path for path in ALL_KEY_PATHS if path.rsplit(".", 1)[-1] == name.lower() and path != prefix + name]
    if elsewhere:
        return f"did you mean {or_list(elsewhere)}?"
    near_anywhere = closest(name, [path.rsplit(".", 1)[-1] for path in ALL_KEY_PATHS])
    if near_anywhere:
        paths = [path for path in ALL_KEY_PATHS if path.rsplit(".", 1)[-1] == near_anywhere]
        return f"did you mean {or_list(paths)}?"
    return f"valid keys here are {', '.join(local)}"


_ADAPT = NestedMapping(
    AdaptSection,
    {
        "target_residual": Number(0, 1, low_open=True, high_open=True, expected="a number 0 < x < 1, e.g. 0.001"),
        "min_repair": Integer(
            0, MAX_ENCODING_SYMBOLS - 1, f"an integer 0..{MAX_ENCODING_SYMBOLS - 1} with min_repair ≤ max_repair"
        ),
        "max_repair": Integer(
            0,
            MAX_ENCODING_SYMBOLS - 1,
            f"an integer 0..{MAX_ENCODING_SYMBOLS - 1} with block_size + max_repair ≤ {MAX_ENCODING_SYMBOLS}, or null",
        ),
        "max_overhead": Number(
            0,
            MAX_ENCODING_SYMBOLS,
            low_open=True,
            expected="a number 0 < x ≤ 1 (above 1 only with fec.allow_repair_above_source)",
        ),
    },
    "fec.adapt",
    nullable=frozenset({"max_repair"}),  # null = no ceiling beyond n ≤ 255 and max_overhead
)

_ADDRESS_TO_BIND = AddressField(bindable=True)
_DESTINATION = AddressField(bindable=False)

# --------------------------------------------------------------------------------------------
# The schema table: YAML key -> checker, with defaults taken from the dataclasses above.
# --------------------------------------------------------------------------------------------

TOP_LEVEL_KEYS = (
    "role",
    "listen",
    "forward",
    "link",
    "fec",
    "decoder",
    "delivery",
    "flows",
    "sockets",
    "log",
    "metrics",
    "reports",
    "auth",
)

_TOP_SCALARS: dict[str, Callable] = {
    "role": Choice(Role, "role"),
    "listen": _ADDRESS_TO_BIND,
    "forward": _DESTINATION,
}

_SECTIONS: dict[str, tuple[type, dict[str, Callable]]] = {
    "link": (
        LinkSection,
        {
            "bind": _ADDRESS_TO_BIND,
            "peer": _DESTINATION,
            "rate": BitRate(MIN_LINK_RATE_BPS, MAX_LINK_RATE_BPS),
            "queue_ms": Integer(1, MAX_LINK_QUEUE_MS, f"an integer number of milliseconds 1..{MAX_LINK_QUEUE_MS}"),
            "mtu": Integer(MIN_LINK_MTU, MAX_LINK_MTU, f"an integer number of bytes {MIN_LINK_MTU}..{MAX_LINK_MTU}"),
        },
    ),
    "fec": (
        FecSection,
        {
            "block_size": Integer(
                1,
                MAX_ENCODING_SYMBOLS,
                f"an integer 1..{MAX_ENCODING_SYMBOLS} with block_size + repair ≤ {MAX_ENCODING_SYMBOLS}",
            ),
            "repair": Integer(
                0,
                MAX_ENCODING_SYMBOLS - 1,
                f"an integer 0..{MAX_ENCODING_SYMBOLS - 1} with block_size + repair ≤ {MAX_ENCODING_SYMBOLS}",
            ),
            "flush_ms": Integer(1, MAX_FLUSH_MS, f"an integer number of milliseconds 1..{MAX_FLUSH_MS}"),
            "max_datagram_bytes": Integer(
                1,
                MAX_DATAGRAM_BYTES_LIMIT,
                f"an integer 1..{MAX_DATAGRAM_BYTES_LIMIT} (a repair packet must fit one UDP datagram)",
            ),
            "short_block_repair": Choice(ShortBlockRepair, "short-block rule"),
            "allow_repair_above_source": Boolean(),
            "adapt": _ADAPT,
            "interleave": Integer(1, MAX_INTERLEAVE, f"an integer 1..{MAX_INTERLEAVE} (1 = no interleaving)"),
            "size_classes": SizeBoundaries(MAX_SIZE_BOUNDARIES, MAX_DATAGRAM_BYTES_LIMIT),
            "code": Choice(FecCode, "code"),
            "window": Integer(1, MAX_WINDOW, f"an integer 1..{MAX_WINDOW} (source packets)"),
            "window_ms": Integer(1, MAX_WINDOW_MS, f"an integer number of milliseconds 1..{MAX_WINDOW_MS}"),
            "repair_interval": Integer(
                1, MAX_WINDOW, f"an integer 1..{MAX_WINDOW} with repair_interval ≤ window (source packets per repair)"
            ),
        },
    ),
    "decoder": (
        DecoderSection,
        {
            "hold_ms": Integer(1, MAX_HOLD_MS, f"an integer number of milliseconds 1..{MAX_HOLD_MS}"),
            "max_open_blocks": Integer(1, MAX_OPEN_BLOCKS_LIMIT),
            "max_memory_bytes": Integer(MIN_MEMORY_BYTES, MAX_MEMORY_BYTES_LIMIT),
            "max_rebuilds_per_s": Integer(
                1, MAX_REBUILDS_PER_S_LIMIT, f"an integer 1..{MAX_REBUILDS_PER_S_LIMIT}, or null for no cap"
            ),
        },
    ),
    "delivery": (
        DeliverySection,
        {
            "order": Choice(DeliveryOrder, "delivery order"),
            "max_wait_ms": Integer(
                1,
                MAX_MAX_WAIT_MS,
                f"an integer number of milliseconds 1..{MAX_MAX_WAIT_MS} (in order: ≤ decoder.hold_ms)",
            ),
        },
    ),
    "flows": (
        FlowsSection,
        {
            "max": Integer(1, MAX_FLOWS_LIMIT, f"an integer 1..{MAX_FLOWS_LIMIT} (half the 16-bit flow slot space)"),
            "idle_timeout_s": Integer(
                1, MAX_FLOW_IDLE_TIMEOUT_S, f"an integer number of seconds 1..{MAX_FLOW_IDLE_TIMEOUT_S}"
            ),
            "first_exchange_timeout_s": Integer(
                1, MAX_FLOW_IDLE_TIMEOUT_S, f"an integer number of seconds 1..{MAX_FLOW_IDLE_TIMEOUT_S}"
            ),
            "protect_s": Integer(
                0, MAX_FLOW_PROTECT_S, f"an integer number of seconds 0..{MAX_FLOW_PROTECT_S} (0 = never refuse)"
            ),
        },
    ),
    "sockets": (
        SocketsSection,
        {
            "receive_buffer_bytes": Integer(
                0, MAX_SOCKET_BUFFER_BYTES, f"an integer 0..{MAX_SOCKET_BUFFER_BYTES} (0 = OS default)"
            ),
            "send_buffer_bytes": Integer(
                0, MAX_SOCKET_BUFFER_BYTES, f"an integer 0..{MAX_SOCKET_BUFFER_BYTES} (0 = OS default)"
            ),
        },
    ),
    "log": (
        LogSection,
        {
            "level": Choice(LogLevel, "log level"),
            "format": Choice(LogFormat, "log format"),
            "stats_interval_s": Integer(
                0, MAX_STATS_INTERVAL_S, f"an integer number of seconds 0..{MAX_STATS_INTERVAL_S} (0 = no stats lines)"
            ),
        },
    ),
    "metrics": (MetricsSection, {"listen": _ADDRESS_TO_BIND}),
    "reports": (
        ReportsSection,
        {
            "interval_ms": Integer(
                0,
                MAX_REPORT_INTERVAL_MS,
                f"an integer number of milliseconds 0..{MAX_REPORT_INTERVAL_MS} (0 = no reports)",
            ),
        },
    ),
    "auth": (AuthSection, {"key_file": FilePath(), "previous_key_file": FilePath(), "encrypt": Boolean()}),
}

#: Keys whose absence (or null) means "not set" rather than "take a default".
_OPTIONAL = {
    "listen",
    "forward",
    "link.peer",
    "link.rate",
    "metrics.listen",
    "fec.adapt",
    "auth.key_file",
    "auth.previous_key_file",
    "decoder.max_rebuilds_per_s",
}
#: The optional package behind auth.encrypt, and how to get it.
CRYPTO_PACKAGE = "cryptography"
CRYPTO_INSTALL_HINT = "pip install 'fecproxy[crypto]'"

#: Role rules, looked up by role: key -> "required" | "forbidden" | "optional".
_ROLE_RULES: dict[Role, dict[str, str]] = {
    Role.SENDER: {"listen": "required", "forward": "forbidden", "link.peer": "required"},
    Role.RECEIVER: {"listen": "forbidden", "forward": "required", "link.peer": "optional"},
}
_PURPOSE = {
    "listen": "the address applications send their datagrams to",
    "forward": "the address rebuilt datagrams are delivered to",
    "link.peer": "the other proxy's link address",
}


def _all_paths() -> list[str]:
    paths = list(TOP_LEVEL_KEYS)
    for section, (_, keys) in _SECTIONS.items():
        paths += [f"{section}.{key}" for key in keys]
    return paths


def _defaults() -> dict[str, object]:
    """path -> default value; required keys are absent from this map."""
    defaults: dict[str, object] = {}
    for section, (cls, keys) in _SECTIONS.items():
        for f in dataclasses.fields(cls):
            if f.name in keys and f.default is not dataclasses.MISSING:
                defaults[f"{section}.{f.name}"] = f.default
    for name in ("listen", "forward"):
        defaults[name] = None
    return defaults


ALL_KEY_PATHS = _all_paths()
_DEFAULTS = _defaults()

# --------------------------------------------------------------------------------------------
# Parsing
# --------------------------------------------------------------------------------------------


class _Parser:
    """One pass over a document: every fault becomes a message; good values are kept by path."""

    def __init__(self, source: str):
        self.source = source
        self.errors: list[str] = []
        self.values: dict[str, object] = {}
        self.bad: set[str] = set()  # paths (and sections) that already have a message

    def error(self, path: str, text: str) -> None:
        self.errors.append(f"{self.source}: {path}: {text}")
        self.bad.add(path)

    def run(self, document) -> Config:
        if document is None:
            raise ConfigError(
                [f"{self.source}: the document is empty; expected a mapping with at least role and link.bind"]
            )
        if not isinstance(document, Mapping):
            raise ConfigError(
                [
                    f"{self.source}: the document is {kind_of(document)}; expected a mapping of settings (key: value lines)"
                ]
            )
        for key, raw in document.items():
            name = key_text(key)
            if name in _TOP_SCALARS:
                self.value(name, raw, _TOP_SCALARS[name])
            elif name in _SECTIONS:
                self.section(name, raw)
            else:
                self.error(name, f"unknown key; {_suggest(name, None)}")
        first_exchange_given = "flows.first_exchange_timeout_s" in self.values
        self.given = set(self.values)
        self.fill_defaults()
        self.check_role()
        self.check_fec()
        self.check_delivery()
        self.check_addresses()
        self.check_link()
        self.check_auth()
        self.check_flow_timeouts(first_exchange_given)
        if self.errors:
            raise ConfigError(self.errors)
        return self.build()

    def value(self, path: str, raw, check: Callable) -> None:
        if raw is None:
            if path in _OPTIONAL:
                return  # null = not set
            self.error(path, f"has no value (null); expected {check.expected}")
            return
        try:
            self.values[path] = check(raw)
        except Bad as bad:
            self.error(path, f"{show_value(raw)} {bad}")
        except BadKeys as bad:
            for key, text in bad.faults:
                self.error(f"{path}.{key}", text)
            self.bad.add(path)

    def section(self, name: str, raw) -> None:
        if raw is None:
            return  # "metrics:" with everything commented out is an empty section
        keys = _SECTIONS[name][1]
        if not isinstance(raw, Mapping):
            self.error(
                name, f"{show_value(raw)} is {kind_of(raw)}; expected a mapping of {name} settings ({', '.join(keys)})"
            )
            return
        for key, value in raw.items():
            key_name = key_text(key)
            path = f"{name}.{key_name}"
            if key_name in keys:
                self.value(path, value, keys[key_name])
            else:
                self.error(path, f"unknown key; {_suggest(key_name, name)}")

    def fill_defaults(self) -> None:
        for path in ALL_KEY_PATHS:
            if path in _SECTIONS or path in self.values or path in self.bad or path in _OPTIONAL:
                continue
            if path.split(".", 1)[0] in self.bad:
                continue  # its section was not a mapping: already reported
            if path in _DEFAULTS:
                self.values[path] = _DEFAULTS[path]
            elif path == "role":
                self.error(path, f"missing; expected {_TOP_SCALARS['role'].expected}")
            else:
                section, key = path.split(".", 1)
                self.error(path, f"missing; expected {_SECTIONS[section][1][key].expected}")

    def check_role(self) -> None:
        role = self.values.get("role")
        if role is None:
            return
        for path, rule in _ROLE_RULES[role].items():
            if path in self.bad or path.split(".", 1)[0] in self.bad:
                continue
            present = path in self.values
            checker = _TOP_SCALARS.get(path) or _SECTIONS["link"][1]["peer"]
            if rule == "required" and not present:
                self.error(path, f"missing; a {role} needs {_PURPOSE[path]}; expected {checker.expected}")
            elif rule == "forbidden" and present:
                other = Role.RECEIVER if role is Role.SENDER else Role.SENDER
                self.error(
                    path,
                    f"{show_value(str(self.values[path]))} is set but role is {role}; "
                    f"expected no {path} on a {role} ({path} is for the {other}; remove it)",
                )

    def check_fec(self) -> None:
        k = self.values.get("fec.block_size")
        m = self.values.get("fec.repair")
        allow = self.values.get("fec.allow_repair_above_source")
        self.check_sliding()
        if k is None or m is None:
            return
        if k + m > MAX_ENCODING_SYMBOLS:
            self.error(
                "fec.repair",
                f"{m} is too large with fec.block_size {k}; expected block_size + repair ≤ "
                f"{MAX_ENCODING_SYMBOLS} (RFC 5510 §8.2: n ≤ 255 in GF(2^8)), so repair ≤ {MAX_ENCODING_SYMBOLS - k}",
            )
        elif m > k and allow is False:
            self.error(
                "fec.repair",
                f"{m} is above fec.block_size {k}; expected repair ≤ block_size (RFC 6363 §8.2 keeps the "
                f"repair rate at or below the source rate), or set fec.allow_repair_above_source: true",
            )
        self.check_adapt(k, allow)

    def check_sliding(self) -> None:
        """The sliding window's own keys, and what of the block code's layout it cannot use."""
        window, interval = self.values.get("fec.window"), self.values.get("fec.repair_interval")
        if window is not None and interval is not None and interval > window:
            self.error(
                "fec.repair_interval",
                f"{interval} is above fec.window {window}; expected repair_interval ≤ window (a repair packet "
                "covers the window, so a longer interval leaves source packets no repair covers)",
            )
        if self.values.get("fec.code") != FecCode.SLIDING:
            return
        depth = self.values.get("fec.interleave")
        if depth is not None and depth > 1:
            self.error(
                "fec.interleave",
                f"{depth} is set but fec.code is sliding; expected 1 (interleaving spreads the packets of blocks; "
                "the sliding window already covers each datagram by several repair packets in a row: "
                "use fec.window for burst protection), or fec.code: block",
            )
        classes = self.values.get("fec.size_classes")
        if "fec.size_classes" in getattr(self, "given", ()) and classes:
            self.error(
                "fec.size_classes",
                f"{list(classes)} is set but fec.code is sliding; expected [] or no size_classes "
                "(the sliding code keeps one window for all datagram sizes, so its repair packets are as long "
                "as the window's longest datagram), or fec.code: block",
            )

    def check_delivery(self) -> None:
        wait, hold = self.values.get("delivery.max_wait_ms"), self.values.get("decoder.hold_ms")
        in_order = self.values.get("delivery.order") is DeliveryOrder.IN_ORDER  # the bound is unused otherwise
        if in_order and wait is not None and hold is not None and wait > hold:
            self.error(
                "delivery.max_wait_ms",
                f"{wait} is above decoder.hold_ms {hold}; expected max_wait_ms ≤ hold_ms (a gap cannot be "
                f"rebuilt once the decoder gives up its block, so waiting longer only delays what follows)",
            )

    def check_adapt(self, k: int, allow) -> None:
        adapt = self.values.get("fec.adapt")
        if adapt is None:
            return
        if adapt.max_repair is not None:
            if adapt.min_repair > adapt.max_repair:
                self.error(
                    "fec.adapt.min_repair",
                    f"{adapt.min_repair} is above fec.adapt.max_repair {adapt.max_repair}; expected min_repair ≤ max_repair",
                )
            if k + adapt.max_repair > MAX_ENCODING_SYMBOLS:
                self.error(
                    "fec.adapt.max_repair",
                    f"{adapt.max_repair} is too large with fec.block_size {k}; expected block_size + max_repair ≤ "
                    f"{MAX_ENCODING_SYMBOLS} (RFC 5510 §8.2: n ≤ 255 in GF(2^8)), so max_repair ≤ {MAX_ENCODING_SYMBOLS - k}",
                )
        if adapt.max_overhead > 1 and allow is False:
            self.error(
                "fec.adapt.max_overhead",
                f"{adapt.max_overhead:g} is above 1; expected max_overhead ≤ 1 (RFC 6363 §8.2 keeps the repair rate "
                f"at or below the source rate), or set fec.allow_repair_above_source: true",
            )
        elif (
            adapt.max_repair is None or adapt.min_repair <= adapt.max_repair
        ) and adapt.min_repair > adapt.repair_ceiling(k):
            self.error(
                "fec.adapt.min_repair",
                f"{adapt.min_repair} is above the {adapt.repair_ceiling(k)} repair packets that fec.adapt.max_overhead "
                f"{adapt.max_overhead:g} allows with fec.block_size {k}; expected min_repair ≤ block_size × max_overhead",
            )
        if self.values.get("reports.interval_ms") == 0:
            self.error(
                "fec.adapt",
                "is set but reports.interval_ms is 0; expected reports.interval_ms > 0 (adaptation needs loss reports)",
            )

    def check_addresses(self) -> None:
        """Catch two sockets on one UDP port, and a destination that is this proxy itself."""
        bind = self.values.get("link.bind")
        if bind is None:
            return
        listen = self.values.get("listen")
        if listen is not None and _same_local_port(listen, bind):
            self.error(
                "listen",
                f"{show_value(str(listen))} uses the same UDP port as link.bind {show_value(str(bind))}; "
                f"expected two different ports (both are bound on this host)",
            )
        for path in ("link.peer", "forward"):
            destination = self.values.get(path)
            if destination is not None and _is_self(destination, bind):
                self.error(
                    path,
                    f"{show_value(str(destination))} is this proxy's own link.bind {show_value(str(bind))}; "
                    f"expected {_PURPOSE[path]}, which must differ from link.bind",
                )

    def check_link(self) -> None:
        """The pacer's queue must hold at least one full-size packet at the rate."""
        rate, queue_ms, mtu = (self.values.get(f"link.{key}") for key in ("rate", "queue_ms", "mtu"))
        if rate is None or queue_ms is None or mtu is None:
            return
        needed = math.ceil(mtu * 8 / rate * 1000)
        if queue_ms < needed:
            self.error(
                "link.queue_ms",
                f"{queue_ms} holds less than one {mtu}-byte packet (link.mtu) at link.rate {rate:g} bit/s; "
                f"expected at least {needed}",
            )

    def check_auth(self) -> None:
        key_file = self.values.get("auth.key_file")
        previous = self.values.get("auth.previous_key_file")
        if key_file is None and "auth.key_file" not in self.bad:
            if previous is not None:
                self.error(
                    "auth.previous_key_file",
                    f"{show_value(previous)} is set without auth.key_file; expected auth.key_file (the key this side "
                    f"sends with) as well: previous_key_file is only the second key accepted during a rollover",
                )
            if self.values.get("auth.encrypt") is True:
                self.error(
                    "auth.encrypt",
                    "true needs auth.key_file; expected a key file on both sides (`fecproxy keygen PATH`)",
                )
        if key_file is not None and previous is not None and key_file == previous:
            self.error(
                "auth.previous_key_file",
                f"{show_value(previous)} is the same file as auth.key_file; expected the old key's file during a rollover, or no previous_key_file",
            )
        if self.values.get("auth.encrypt") is True and not crypto_available():
            self.error(
                "auth.encrypt",
                f"true needs the {CRYPTO_PACKAGE} package, which is not installed; run {CRYPTO_INSTALL_HINT}, or set auth.encrypt: false",
            )

    def check_flow_timeouts(self, first_exchange_given: bool) -> None:
        first = self.values.get("flows.first_exchange_timeout_s")
        idle = self.values.get("flows.idle_timeout_s")
        if not (isinstance(first, int) and isinstance(idle, int) and first > idle):
            return
        if not first_exchange_given:  # the default follows a shorter idle_timeout_s down
            self.values["flows.first_exchange_timeout_s"] = idle
        else:
            self.error(
                "flows.first_exchange_timeout_s",
                f"{first} is above flows.idle_timeout_s {idle}; expected at most idle_timeout_s (a flow that "
                f"has not been answered yet is never kept longer than an established one)",
            )

    def build(self) -> Config:
        sections = {}
        for name, (cls, keys) in _SECTIONS.items():
            sections[name] = cls(**{key: self.values.get(f"{name}.{key}") for key in keys})
        return Config(
            role=self.values["role"],
            listen=self.values.get("listen"),
            forward=self.values.get("forward"),
            **sections,
        )


def _same_local_port(a: Address, b: Address) -> bool:
    if a.port != b.port or a.port == 0:
        return False
    if a.host == b.host:
        return True
    same_family = a.is_ip_literal and b.is_ip_literal and a.is_ipv6 == b.is_ipv6
    return same_family and (a.is_unspecified or b.is_unspecified)


def _is_self(destination: Address, bind: Address) -> bool:
    if destination.port != bind.port:
        return False
    if destination.host == bind.host:
        return True
    return bind.is_unspecified and destination.is_loopback and destination.is_ipv6 == bind.is_ipv6


def crypto_available() -> bool:
    """Whether auth.encrypt can work here: the optional ChaCha20-Poly1305 provider is installed."""
    return importlib.util.find_spec(CRYPTO_PACKAGE) is not None


def parse_config(document: object, source: str = "<config>") -> Config:
    """Validate an already-loaded document (a mapping, as from YAML); raise ConfigError listing
    every fault.  Used by :func:`load_config`, by SIGHUP reloads and by tests."""
    return _Parser(source).run(document)
