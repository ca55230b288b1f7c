"""Warnings about a valid config: settings the daemon accepts but an operator should reconsider.

Errors stop a daemon (``schema``); these only speak.  ``fecproxy check`` prints them on stderr,
one line each, naming the file and the key, and still exits 0: a bench on a closed network may
well run without a key.  The rules here are the ones README's "Caution" and "Link security"
state in prose.
"""

from __future__ import annotations

from fecproxy.config.schema import Config, Role
from fecproxy.linkmodel.airtime import largest_link_packet, max_datagram_for_mtu
from fecproxy.protocol.auth import TRAILER_BYTES
from fecproxy.protocol.pacer import IPV4_UDP_HEADER_BYTES, IPV6_UDP_HEADER_BYTES


def warnings_for(config: Config, source: str) -> list[str]:
    """Every warning for one side's config, as ``SOURCE: KEY: text`` lines."""
    found: list[str] = []
    keyless = not config.auth.enabled
    bind = config.link.bind
    if keyless and not bind.is_loopback:
        found.append(
            f"{source}: link.bind: warning: {bind} is reachable from other hosts but auth.key_file is not set; "
            f"anyone who can send to it can inject datagrams towards "
            f"{'the applications' if config.role is Role.SENDER else 'forward'}: make a key "
            f"(`fecproxy keygen link.key`) and set auth.key_file on both sides"
        )
    if keyless and config.role is Role.RECEIVER and config.link.peer is None and not bind.is_loopback:
        found.append(
            f"{source}: link.peer: warning: not set, so the peer is learned from traffic, and auth.key_file is not "
            f"set: whoever sends a well-formed packet first receives the replies; set link.peer or auth.key_file"
        )
    metrics = config.metrics.listen
    if metrics is not None and metrics.is_unspecified:
        found.append(
            f"{source}: metrics.listen: warning: {metrics} listens on every address of this host; the metrics and "
            f"the status page are readable by anyone who can reach it: bind a loopback or management address"
        )
    too_big = mtu_report(config)[1]
    if too_big is not None:
        found.append(f"{source}: link.mtu: warning: {too_big}")
    return found


def mtu_report(config: Config) -> tuple[str, str | None]:
    """(a comment line for ``check``'s output, a warning's text or None): the largest link packet
    against ``link.mtu``, per IP version the link addresses use (both when a name hides it)."""
    link, fec = config.link, config.fec
    trailer = TRAILER_BYTES if config.auth.enabled else 0
    addresses = [a for a in (link.bind, link.peer) if a is not None and a.is_ip_literal and not a.is_unspecified]
    if addresses and all(a.is_ipv6 for a in addresses):
        families = [("IPv6", IPV6_UDP_HEADER_BYTES)]
    elif addresses and not any(a.is_ipv6 for a in addresses):
        families = [("IPv4", IPV4_UDP_HEADER_BYTES)]
    else:
        families = [("IPv4", IPV4_UDP_HEADER_BYTES), ("IPv6", IPV6_UDP_HEADER_BYTES)]
    payload = largest_link_packet(fec.max_datagram_bytes, trailer)
    fits = {name: max_datagram_for_mtu(link.mtu, header, trailer) for name, header in families}
    sizes = ", ".join(f"{payload + header} bytes over {name}" for name, header in families)
    limits = " or ".join(f"{fits[name]} ({name})" for name, _ in families)
    what = "repair packet (header + symbol prefix + datagram" + (" + auth trailer)" if trailer else ")")
    if all(fec.max_datagram_bytes <= limit for limit in fits.values()):
        return (
            f"# link.mtu {link.mtu}: largest link packet {sizes}, fits; fec.max_datagram_bytes up to {limits} fits\n",
            None,
        )
    return (
        f"# link.mtu {link.mtu}: largest link packet {sizes}: IP fragments\n",
        f"{link.mtu} is less than the largest link packet: with fec.max_datagram_bytes {fec.max_datagram_bytes} "
        f"the largest {what} is {sizes}, above the MTU, so IP fragments it (a lost fragment loses the packet); "
        f"set fec.max_datagram_bytes ≤ {limits}, or link.mtu to the path's real MTU",
    )
