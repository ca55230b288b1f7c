"""The configuration's typed values and sections: the frozen dataclasses a parsed config is made
of (the whole :class:`~fecproxy.config.schema.Config` is in the schema, beside the parser).

Re-exported by :mod:`fecproxy.config.schema` (and so by :mod:`fecproxy.config`).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from enum import StrEnum

from fecproxy.config.addresses import Address
from fecproxy.config.limits import (
    DEFAULT_BLOCK_SIZE,
    DEFAULT_FLOW_FIRST_EXCHANGE_TIMEOUT_S,
    DEFAULT_FLOW_IDLE_TIMEOUT_S,
    DEFAULT_FLOW_PROTECT_S,
    DEFAULT_FLUSH_MS,
    DEFAULT_HOLD_MS,
    DEFAULT_INTERLEAVE,
    DEFAULT_LINK_MTU,
    DEFAULT_LINK_QUEUE_MS,
    DEFAULT_MAX_DATAGRAM_BYTES,
    DEFAULT_MAX_FLOWS,
    DEFAULT_MAX_MEMORY_BYTES,
    DEFAULT_MAX_OPEN_BLOCKS,
    DEFAULT_MAX_OVERHEAD,
    DEFAULT_MAX_WAIT_MS,
    DEFAULT_MIN_REPAIR,
    DEFAULT_REPAIR,
    DEFAULT_REPAIR_INTERVAL,
    DEFAULT_REPORT_INTERVAL_MS,
    DEFAULT_SIZE_CLASSES,
    DEFAULT_SOCKET_BUFFER_BYTES,
    DEFAULT_STATS_INTERVAL_S,
    DEFAULT_TARGET_RESIDUAL,
    DEFAULT_WINDOW,
    DEFAULT_WINDOW_MS,
    MAX_ENCODING_SYMBOLS,
)
from fecproxy.protocol.keys import MasterKey
from fecproxy.protocol.repair_rule import DEFAULT_SHORT_BLOCK_REPAIR, ShortBlockRepair, repair_count

# --------------------------------------------------------------------------------------------
# Typed values
# --------------------------------------------------------------------------------------------


class FecCode(StrEnum):
    """Which code the sender uses (the receiver decodes either, whatever its own setting)."""

    BLOCK = "block"  # Reed–Solomon blocks of k (RFC 5510)
    SLIDING = "sliding"  # sliding-window random linear code (RFC 8681)


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
        The rule itself lives in fecproxy.protocol.repair_rule, shared with the encoder and planner.
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
