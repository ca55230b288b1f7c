"""HOST:PORT as written in a config or on a command line, and a socket address as printed.

One owner for both directions, so every command parses and shows addresses alike.
"""

from __future__ import annotations

import ipaddress
import re
from dataclasses import dataclass
from typing import Any

from fecproxy.config.messages import clip, kind_of, show_value


class AddressError(ValueError):
    """A HOST:PORT string that does not parse; the text says what is wrong with it."""


@dataclass(frozen=True)
class Address:
    """A socket address as written in the config; hostnames are resolved later, by the daemon."""

    host: str
    port: int

    def __str__(self) -> str:
        return f"[{self.host}]:{self.port}" if self.is_ipv6 else f"{self.host}:{self.port}"

    @property
    def is_ipv6(self) -> bool:
        return ":" in self.host.split("%", 1)[0]

    @property
    def is_ip_literal(self) -> bool:
        try:
            ipaddress.ip_address(self.host)
        except ValueError:
            return False
        return True

    @property
    def is_unspecified(self) -> bool:
        """0.0.0.0 or :: — "every local address", fine to bind, meaningless to send to."""
        return self.host in ("0.0.0.0", "::")

    @property
    def is_loopback(self) -> bool:
        try:
            return ipaddress.ip_address(self.host).is_loopback
        except ValueError:
            return self.host.lower() == "localhost"


# RFC 1123 §2.1 host name: labels of letters, digits and inner hyphens, each 1..63 characters,
# the whole name at most 253 (RFC 1035 §2.3.4 gives 255 octets on the wire, 253 as text).
_LABEL = r"[A-Za-z0-9](?:[A-Za-z0-9-]{0,61}[A-Za-z0-9])?"
_HOSTNAME = re.compile(rf"{_LABEL}(?:\.{_LABEL})*\.?")
_MAX_HOSTNAME_CHARS = 253
_LOOKS_NUMERIC = re.compile(r"[0-9.]+")
_PORT = re.compile(r"[0-9]+")


def parse_address(text: str, *, allow_port_zero: bool = False, allow_unspecified: bool = True) -> Address:
    """Parse HOST:PORT, [IPv6]:PORT or hostname:PORT; raise AddressError saying what is wrong.

    Port 0 means "any free port" and makes sense only for an address we bind.  The unspecified
    hosts 0.0.0.0 and :: likewise make sense only to bind, never as a destination.
    """
    if not isinstance(text, str):
        raise AddressError(f"is {kind_of(text)}, not a HOST:PORT string")
    text = text.strip()
    if not text:
        raise AddressError("is empty")
    if text.startswith("["):
        close = text.find("]")
        if close < 0:
            raise AddressError("has no closing ] after the IPv6 address")
        host, rest = text[1:close], text[close + 1 :]
        if not rest.startswith(":"):
            raise AddressError("has no :PORT after ]")
        port_text = rest[1:]
        try:
            host = str(ipaddress.IPv6Address(host))
        except ValueError:
            raise AddressError(f"has [{clip(host)}], which is not an IPv6 address") from None
    else:
        host, sep, port_text = text.rpartition(":")
        if not sep:
            raise AddressError("has no port")
        if ":" in host:
            raise AddressError(
                f"looks like an IPv6 address without brackets; write it as [{clip(host)}]:{clip(port_text)}"
            )
        if not host:
            raise AddressError("has no host before the colon")
        if _LOOKS_NUMERIC.fullmatch(host):
            try:
                host = str(ipaddress.IPv4Address(host))
            except ValueError:
                raise AddressError(f"has {clip(host)}, which is not a valid IPv4 address") from None
        elif len(host) > _MAX_HOSTNAME_CHARS or not _HOSTNAME.fullmatch(host):
            raise AddressError(f"has {show_value(host)}, which is neither an IP address nor a valid host name")
    if not port_text:
        raise AddressError("has no port")
    if not _PORT.fullmatch(port_text):
        raise AddressError(f"has port {show_value(port_text)}, which is not a number")
    low = 0 if allow_port_zero else 1
    port = int(port_text) if len(port_text) <= 5 else None  # never int() a huge digit string
    if port is None or not low <= port <= 65535:
        raise AddressError(f"has port {clip(port_text, 10)}, out of range {low}..65535")
    address = Address(host, port)
    if address.is_unspecified and not allow_unspecified:
        raise AddressError(f"has the unspecified host {host}, which cannot be a destination")
    return address


def format_sockaddr(address: tuple[Any, ...] | None) -> str:
    """A socket address tuple (IPv4 or IPv6) as ``host:port`` / ``[host]:port``; "-" for none."""
    if address is None:
        return "-"
    host, port = address[0], address[1]
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"


def metrics_url(text: str) -> str:
    """A metrics endpoint as an operator types it: ``host:port`` (as in ``metrics.listen``),
    ``http://host:port`` or a full URL; the default path is /metrics.  ``fecproxy watch`` and
    ``fecproxy plan --from-metrics`` both take it so."""
    url = text if "://" in text else f"http://{text}"
    scheme, _, rest = url.partition("://")
    return url if "/" in rest else f"{url}/metrics"
