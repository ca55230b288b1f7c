"""The daemon's YAML configuration: read once, validated in full, then a frozen typed object.

Everything is checked here and nowhere else, once: the daemon receives a :class:`Config` whose
values it can trust and checks none of them again.  Validation never stops at the first fault:
every message is collected, each naming the file, the key path, the bad value and what is
expected, and they are raised together as one :class:`ConfigError`.

The schema is a table (section -> dataclass -> one checker per key, :mod:`fecproxy.config.tables`);
defaults live in the dataclass fields (:mod:`fecproxy.config.sections`), with the named limits
(:mod:`fecproxy.config.limits`), so the table, the defaults and :meth:`Config.effective` cannot
drift apart.

Public API (re-exported by :mod:`fecproxy.config`): :func:`parse_config`, :class:`Config` and its
sections, :class:`ConfigError`, and the named limits and defaults.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import math
from collections.abc import Mapping
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from fecproxy.config.addresses import Address
from fecproxy.config.checkers import (
    Bad,
    BadKeys,
    Checker,
)
from fecproxy.config.limits import (
    AUTH_TAG_RESERVE_BYTES,
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
    MAX_UDP_PAYLOAD_BYTES,
    MAX_WINDOW,
    MAX_WINDOW_MS,
    MIN_LINK_MTU,
    MIN_LINK_RATE_BPS,
    MIN_MEMORY_BYTES,
)
from fecproxy.config.messages import key_text, kind_of, show_value
from fecproxy.config.sections import (
    AdaptSection,
    AuthSection,
    ConfigError,
    ConfigUnreadable,
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
from fecproxy.config.tables import (
    _DEFAULTS,
    _OPTIONAL,
    _PURPOSE,
    _ROLE_RULES,
    _SECTIONS,
    _TOP_SCALARS,
    ALL_KEY_PATHS,
    CRYPTO_INSTALL_HINT,
    CRYPTO_PACKAGE,
    TOP_LEVEL_KEYS,
    _suggest,
)
from fecproxy.protocol.flows import FLOW_SLOTS
from fecproxy.protocol.keys import MasterKey
from fecproxy.protocol.repair_rule import DEFAULT_SHORT_BLOCK_REPAIR, ShortBlockRepair, repair_count

#: The package's configuration API (fecproxy.config re-exports it): the parser, the Config and
#: its sections, the named limits and defaults.
__all__ = [
    "DEFAULT_SHORT_BLOCK_REPAIR",
    "FLOW_SLOTS",
    "MasterKey",
    "ShortBlockRepair",
    "repair_count",
    "Config",
    "parse_config",
    "crypto_available",
    "ALL_KEY_PATHS",
    "TOP_LEVEL_KEYS",
    "CRYPTO_PACKAGE",
    "CRYPTO_INSTALL_HINT",
    "MAX_ENCODING_SYMBOLS",
    "DEFAULT_BLOCK_SIZE",
    "DEFAULT_REPAIR",
    "DEFAULT_FLUSH_MS",
    "DEFAULT_INTERLEAVE",
    "MAX_INTERLEAVE",
    "DEFAULT_SIZE_CLASSES",
    "MAX_SIZE_BOUNDARIES",
    "DEFAULT_WINDOW",
    "MAX_WINDOW",
    "DEFAULT_WINDOW_MS",
    "MAX_WINDOW_MS",
    "DEFAULT_REPAIR_INTERVAL",
    "FecCode",
    "MAX_FLUSH_MS",
    "DEFAULT_MAX_DATAGRAM_BYTES",
    "AUTH_TAG_RESERVE_BYTES",
    "MAX_UDP_PAYLOAD_BYTES",
    "MAX_DATAGRAM_BYTES_LIMIT",
    "DEFAULT_HOLD_MS",
    "MAX_HOLD_MS",
    "DEFAULT_MAX_WAIT_MS",
    "MAX_MAX_WAIT_MS",
    "DEFAULT_MAX_OPEN_BLOCKS",
    "MAX_OPEN_BLOCKS_LIMIT",
    "DEFAULT_MAX_MEMORY_BYTES",
    "MIN_MEMORY_BYTES",
    "MAX_MEMORY_BYTES_LIMIT",
    "MAX_REBUILDS_PER_S_LIMIT",
    "MAX_FLOWS_LIMIT",
    "DEFAULT_MAX_FLOWS",
    "DEFAULT_FLOW_IDLE_TIMEOUT_S",
    "DEFAULT_FLOW_FIRST_EXCHANGE_TIMEOUT_S",
    "MAX_FLOW_IDLE_TIMEOUT_S",
    "DEFAULT_FLOW_PROTECT_S",
    "MAX_FLOW_PROTECT_S",
    "DEFAULT_SOCKET_BUFFER_BYTES",
    "MAX_SOCKET_BUFFER_BYTES",
    "DEFAULT_STATS_INTERVAL_S",
    "MAX_STATS_INTERVAL_S",
    "DEFAULT_TARGET_RESIDUAL",
    "DEFAULT_MIN_REPAIR",
    "DEFAULT_MAX_OVERHEAD",
    "DEFAULT_REPORT_INTERVAL_MS",
    "MAX_REPORT_INTERVAL_MS",
    "DEFAULT_LINK_QUEUE_MS",
    "MAX_LINK_QUEUE_MS",
    "DEFAULT_LINK_MTU",
    "MIN_LINK_MTU",
    "MAX_LINK_MTU",
    "MIN_LINK_RATE_BPS",
    "MAX_LINK_RATE_BPS",
    "Role",
    "LogLevel",
    "DeliveryOrder",
    "LogFormat",
    "ConfigError",
    "ConfigUnreadable",
    "LinkSection",
    "AdaptSection",
    "FecSection",
    "DecoderSection",
    "DeliverySection",
    "FlowsSection",
    "SocketsSection",
    "LogSection",
    "MetricsSection",
    "AuthSection",
    "ReportsSection",
]


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

    def effective(self) -> dict[str, Any]:
        """Every key with defaults filled in, nested as in the YAML; absent addresses are None.

        The result is plain data (str, int, bool, None): safe to dump as YAML and to feed back
        to :func:`parse_config`, which gives an equal Config (keys loaded from key files aside:
        only their paths are shown).
        """
        document: dict[str, Any] = {}
        for name in TOP_LEVEL_KEYS:
            value = getattr(self, name)
            if name in _SECTIONS:  # the YAML keys only: never the loaded key material
                document[name] = {key: _plain(getattr(value, key)) for key in _SECTIONS[name][1]}
            else:
                document[name] = _plain(value)
        return document


def _plain(value: object) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, Address):
        return {f.name: _plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, Address):
        return str(value)
    if isinstance(value, StrEnum):
        return value.value
    if isinstance(value, tuple):
        return [_plain(item) for item in value]
    return value


# --------------------------------------------------------------------------------------------
# Parsing
# --------------------------------------------------------------------------------------------


class _Parser:
    """One pass over a document: every fault becomes a message; good values are kept by path."""

    def __init__(self, source: str):
        self.source = source
        self.errors: list[str] = []
        self.values: dict[str, Any] = {}  # what each checker returned, by key path
        self.bad: set[str] = set()  # paths (and sections) that already have a message

    def error(self, path: str, text: str) -> None:
        self.errors.append(f"{self.source}: {path}: {text}")
        self.bad.add(path)

    def run(self, document: object) -> Config:
        if document is None:
            raise ConfigError(
                [f"{self.source}: the document is empty; expected a mapping with at least role and link.bind"]
            )
        if not isinstance(document, Mapping):
            raise ConfigError(
                [
                    f"{self.source}: the document is {kind_of(document)}; "
                    "expected a mapping of settings (key: value lines)"
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

    def value(self, path: str, raw: object, check: Checker) -> None:
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

    def section(self, name: str, raw: object) -> None:
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

    def check_adapt(self, k: int, allow: bool | None) -> None:
        adapt = self.values.get("fec.adapt")
        if adapt is None:
            return
        if adapt.max_repair is not None:
            if adapt.min_repair > adapt.max_repair:
                self.error(
                    "fec.adapt.min_repair",
                    f"{adapt.min_repair} is above fec.adapt.max_repair "
                    f"{adapt.max_repair}; expected min_repair ≤ max_repair",
                )
            if k + adapt.max_repair > MAX_ENCODING_SYMBOLS:
                self.error(
                    "fec.adapt.max_repair",
                    f"{adapt.max_repair} is too large with fec.block_size {k}; expected block_size + max_repair ≤ "
                    f"{MAX_ENCODING_SYMBOLS} (RFC 5510 §8.2: n ≤ 255 in "
                    f"GF(2^8)), so max_repair ≤ {MAX_ENCODING_SYMBOLS - k}",
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
                f"{adapt.max_overhead:g} allows with fec.block_size "
                f"{k}; expected min_repair ≤ block_size × max_overhead",
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
                f"{show_value(previous)} is the same file as auth.key_file; expected "
                "the old key's file during a rollover, or no previous_key_file",
            )
        if self.values.get("auth.encrypt") is True and not crypto_available():
            self.error(
                "auth.encrypt",
                f"true needs the {CRYPTO_PACKAGE} package, which is not installed; "
                f"run {CRYPTO_INSTALL_HINT}, or set auth.encrypt: false",
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
