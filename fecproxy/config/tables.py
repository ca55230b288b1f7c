"""The schema table: each YAML key and the checker of its value, section by section, with the
role rules and the key paths and defaults derived from them.

The parser (:mod:`fecproxy.config.schema`) walks these tables; the defaults live in the section
dataclasses (:mod:`fecproxy.config.sections`), so the tables, the defaults and
``Config.effective`` cannot drift apart.
"""

from __future__ import annotations

import dataclasses

from fecproxy.config.checkers import (
    AddressField,
    BitRate,
    Boolean,
    Checker,
    Choice,
    FilePath,
    Integer,
    NestedMapping,
    Number,
    SizeBoundaries,
)
from fecproxy.config.limits import (
    MAX_DATAGRAM_BYTES_LIMIT,
    MAX_ENCODING_SYMBOLS,
    MAX_FLOW_IDLE_TIMEOUT_S,
    MAX_FLOW_PROTECT_S,
    MAX_FLOWS_LIMIT,
    MAX_FLUSH_MS,
    MAX_HOLD_MS,
    MAX_INTERLEAVE,
    MAX_LINK_MTU,
    MAX_LINK_QUEUE_MS,
    MAX_LINK_RATE_BPS,
    MAX_MAX_WAIT_MS,
    MAX_MEMORY_BYTES_LIMIT,
    MAX_OPEN_BLOCKS_LIMIT,
    MAX_REBUILDS_PER_S_LIMIT,
    MAX_REPORT_INTERVAL_MS,
    MAX_SIZE_BOUNDARIES,
    MAX_SOCKET_BUFFER_BYTES,
    MAX_STATS_INTERVAL_S,
    MAX_WINDOW,
    MAX_WINDOW_MS,
    MIN_LINK_MTU,
    MIN_LINK_RATE_BPS,
    MIN_MEMORY_BYTES,
)
from fecproxy.config.messages import closest, or_list
from fecproxy.config.sections import (
    AdaptSection,
    AuthSection,
    DecoderSection,
    DeliveryOrder,
    DeliverySection,
    FecCode,
    FecSection,
    FlowsSection,
    LinkSection,
    LogFormat,
    LogLevel,
    LogSection,
    MetricsSection,
    ReportsSection,
    Role,
    SocketsSection,
)
from fecproxy.protocol.repair_rule import ShortBlockRepair

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

_TOP_SCALARS: dict[str, Checker] = {
    "role": Choice(Role, "role"),
    "listen": _ADDRESS_TO_BIND,
    "forward": _DESTINATION,
}

_SECTIONS: dict[str, tuple[type, dict[str, Checker]]] = {
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
