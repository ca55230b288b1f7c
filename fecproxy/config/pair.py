"""Checking a sender's and a receiver's config against each other.

Each config can be valid alone while the pair cannot work: different datagram limits, a key on
one side only, a receiver that gives up on a block before the sender has even sent its repair.
:func:`check_pair` names every such fault as one line with the side (the file) and the key, so
``fecproxy check SENDER.yaml RECEIVER.yaml`` can list them all at once.

Both directions are checked: each daemon encodes what it sends and decodes what it receives, so
the sender's ``decoder`` faces the receiver's ``fec`` exactly as the other way round.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from fecproxy.config.schema import Config, Role
from fecproxy.config.sections import FecCode
from fecproxy.linkmodel.airtime import LinkBudget
from fecproxy.protocol.auth import TRAILER_BYTES
from fecproxy.protocol.pacer import IPV4_UDP_HEADER_BYTES, IPV6_UDP_HEADER_BYTES

#: What the receiver's decoder counts per held packet and per block (README "Bounds": payload +
#: 160 bytes per packet + 1 KiB per block); used to tell whether one round of the peer's blocks
#: fits the memory budget.
_HELD_PACKET_OVERHEAD_BYTES = 160
_HELD_BLOCK_OVERHEAD_BYTES = 1024


@dataclass(frozen=True)
class Side:
    """One config of the pair and the name it is shown by (its file)."""

    config: Config
    source: str


@dataclass(frozen=True)
class Finding:
    """One fault or warning: ``source: key: text`` (warnings say so after the key)."""

    error: bool
    source: str
    key: str
    text: str

    def line(self) -> str:
        return f"{self.source}: {self.key}: {'' if self.error else 'warning: '}{self.text}"


def _fingerprints(config: Config) -> tuple[str | None, set[str]]:
    """(the key this side sends with, every key it accepts) as fingerprints."""
    auth = config.auth
    if auth.key is None:
        return None, set()
    accepted = {auth.key.fingerprint}
    if auth.previous_key is not None:
        accepted.add(auth.previous_key.fingerprint)
    return auth.key.fingerprint, accepted


class _Checker:
    def __init__(self, sender: Side, receiver: Side, delay_spread_ms: int):
        self.sender, self.receiver, self.spread = sender, receiver, delay_spread_ms
        self.found: list[Finding] = []

    def error(self, side: Side, key: str, text: str) -> None:
        self.found.append(Finding(True, side.source, key, text))

    def warn(self, side: Side, key: str, text: str) -> None:
        self.found.append(Finding(False, side.source, key, text))

    def run(self) -> list[Finding]:
        s, r = self.sender, self.receiver
        if s.config.role is not Role.SENDER or r.config.role is not Role.RECEIVER:
            for side, role in ((s, Role.SENDER), (r, Role.RECEIVER)):
                if side.config.role is not role:
                    self.error(side, "role", f"{side.config.role}; expected {role} (give the sender's file first)")
            return self.found
        self.same_value("fec.max_datagram_bytes", "larger datagrams are dropped by one side only")
        self.keys()
        for encoder, decoder in ((s, r), (r, s)):
            self.hold_covers_flush(encoder, decoder)
            self.blocks_fit(encoder, decoder)
            self.reports_for_adaptation(encoder, decoder)
            self.in_order_wait(encoder, decoder)
        self.flow_tables()
        self.link_budgets()
        self.addresses()
        return self.found

    def same_value(self, key: str, why: str) -> None:
        section, name = key.split(".")
        mine = getattr(getattr(self.sender.config, section), name)
        theirs = getattr(getattr(self.receiver.config, section), name)
        if mine != theirs:
            self.error(
                self.receiver,
                key,
                f"{theirs}, but {self.sender.source} has {mine}; expected the same on both sides ({why})",
            )

    def keys(self) -> None:
        s, r = self.sender, self.receiver
        s_auth, r_auth = s.config.auth, r.config.auth
        if s_auth.enabled != r_auth.enabled:
            keyed, bare = (s, r) if s_auth.enabled else (r, s)
            self.error(
                bare,
                "auth.key_file",
                f"not set, but {keyed.source} has a key; expected a key on both sides or on neither "
                f"(every packet between them would be dropped as `auth`)",
            )
            return
        if s_auth.encrypt != r_auth.encrypt:
            self.error(
                r,
                "auth.encrypt",
                f"{str(r_auth.encrypt).lower()}, but {s.source} has {str(s_auth.encrypt).lower()}; expected the same "
                f"on both sides",
            )
        s_sends, s_accepts = _fingerprints(s.config)
        r_sends, r_accepts = _fingerprints(r.config)
        if s_sends is None or r_sends is None:
            return  # keys not loaded (configs parsed from text): nothing to compare
        mismatched = False
        for sends, sender_side, accepts, other in ((s_sends, s, r_accepts, r), (r_sends, r, s_accepts, s)):
            if sends not in accepts:
                mismatched = True
                self.error(
                    other,
                    "auth.key_file",
                    f"accepts fingerprint {', '.join(sorted(accepts))}, but {sender_side.source} sends with "
                    f"fingerprint {sends}; expected the same key file on both sides (copy one to the other)",
                )
        if not mismatched and s_sends != r_sends:
            self.warn(
                r,
                "auth.key_file",
                f"fingerprint {r_sends}, {s.source} sends with {s_sends}: a key rollover is under way (both "
                f'accept both keys); finish it (README "Key rollover")',
            )

    def hold_covers_flush(self, encoder: Side, decoder: Side) -> None:
        """A block's repair is queued at most flush_ms after its first datagram; with pacing
        (``link.rate``) its m repair packets then take their air time to leave; its packets then
        reach the decoder up to the stated delay spread apart.  The decoder must hold an
        incomplete block at least that long, or it expires blocks whose repair is still on the way."""
        flush = encoder.config.fec.flush_ms
        hold = decoder.config.decoder.hold_ms
        repair_air = _repair_air_ms(encoder.config)
        needed = flush + repair_air + self.spread
        if hold < needed:
            air = f" + the repair's air time {repair_air} ms at its link.rate" if repair_air else ""
            spread = f" + the stated delay spread {self.spread} ms" if self.spread else ""
            self.error(
                decoder,
                "decoder.hold_ms",
                f"{hold} is below {encoder.source}'s fec.flush_ms {flush}{air}{spread} = {needed} ms; expected "
                f"hold_ms ≥ {needed} (a block would expire before its repair packets arrive)",
            )

    def in_order_wait(self, encoder: Side, decoder: Side) -> None:
        """With in-order delivery a datagram behind a gap waits at most max_wait_ms; a gap is
        rebuilt when its block's repair arrives, up to the encoder's flush time (plus air time
        and spread) after the block began: a shorter wait skips gaps that would have been rebuilt."""
        delivery = decoder.config.delivery
        if not delivery.in_order:
            return
        rebuilt = encoder.config.fec.flush_ms + _repair_air_ms(encoder.config) + self.spread
        if delivery.max_wait_ms < rebuilt:
            self.warn(
                decoder,
                "delivery.max_wait_ms",
                f"{delivery.max_wait_ms} is below the {rebuilt} ms a gap may take to be rebuilt ({encoder.source}'s "
                f"fec.flush_ms, plus air time and delay spread): such gaps are skipped although repair is on its way",
            )

    def link_budgets(self) -> None:
        """The two ends of one path: the same declared MTU, and pacing on both or neither (an
        unpaced side floods the modem buffer the paced side protects)."""
        s, r = self.sender, self.receiver
        s_link, r_link = s.config.link, r.config.link
        if s_link.mtu != r_link.mtu:
            self.warn(
                r,
                "link.mtu",
                f"{r_link.mtu}, but {s.source} declares {s_link.mtu}; expected the same path MTU on both sides",
            )
        if s_link.paced != r_link.paced:
            paced, bare = (s, r) if s_link.paced else (r, s)
            self.warn(
                bare,
                "link.rate",
                f"not set, but {paced.source} paces its link at {paced.config.link.rate:g} bit/s; on a shared "
                f"radio both sides should pace (this side's bursts would overflow the modem's buffer)",
            )

    def blocks_fit(self, encoder: Side, decoder: Side) -> None:
        """The decoder must hold at least one round of the encoder's open blocks (D per size
        class), in blocks and in bytes."""
        fec = encoder.config.fec
        if fec.code is FecCode.SLIDING:
            return  # no blocks: the sliding decoder's window has its own fixed bound (README "Bounds")
        classes = len(fec.size_classes) + 1
        open_at_once = fec.interleave * classes
        limits = decoder.config.decoder
        if limits.max_open_blocks < open_at_once:
            self.error(
                decoder,
                "decoder.max_open_blocks",
                f"{limits.max_open_blocks} is below the {open_at_once} blocks {encoder.source} keeps open at once "
                f"(fec.interleave {fec.interleave} × {classes} size classes); expected at least {open_at_once}",
            )
        repair = fec.repair if fec.adapt is None else max(fec.repair, fec.adapt.repair_ceiling(fec.block_size))
        per_block = (fec.block_size + repair) * (fec.max_datagram_bytes + _HELD_PACKET_OVERHEAD_BYTES)
        round_bytes = open_at_once * (per_block + _HELD_BLOCK_OVERHEAD_BYTES)
        if limits.max_memory_bytes < round_bytes:
            self.warn(
                decoder,
                "decoder.max_memory_bytes",
                f"{limits.max_memory_bytes} is below the {round_bytes} bytes of one round of {encoder.source}'s "
                f"largest blocks ({open_at_once} × (k {fec.block_size} + m {repair}) packets of up to "
                f"{fec.max_datagram_bytes} bytes); blocks would be evicted under full load",
            )

    def reports_for_adaptation(self, encoder: Side, decoder: Side) -> None:
        if encoder.config.fec.adapt is not None and decoder.config.reports.interval_ms == 0:
            self.error(
                decoder,
                "reports.interval_ms",
                f"0, but {encoder.source} sets fec.adapt, which chooses m from this side's loss reports; "
                f"expected reports.interval_ms > 0",
            )

    def flow_tables(self) -> None:
        s, r = self.sender, self.receiver
        s_flows, r_flows = s.config.flows, r.config.flows
        if r_flows.max < s_flows.max:
            self.error(
                r,
                "flows.max",
                f"{r_flows.max} is below {s.source}'s flows.max {s_flows.max}; expected at least as many (the "
                f"receiver would recycle flows the sender still carries)",
            )
        if r_flows.idle_timeout_s < s_flows.idle_timeout_s:
            self.warn(
                r,
                "flows.idle_timeout_s",
                f"{r_flows.idle_timeout_s} is below {s.source}'s {s_flows.idle_timeout_s}: a client quiet for "
                f"between the two reaches the server from a new port",
            )

    def addresses(self) -> None:
        s, r = self.sender, self.receiver
        peer, bind = s.config.link.peer, r.config.link.bind
        if peer is not None and bind.port != 0 and peer.port != bind.port:
            self.warn(
                r,
                "link.bind",
                f"port {bind.port}, but {s.source} sends to link.peer {peer}; expected the same port "
                f"(unless a NAT or a relay such as `fecproxy impair` between them maps one to the other)",
            )
        back, s_bind = r.config.link.peer, s.config.link.bind
        if back is not None and s_bind.port != 0 and back.port != s_bind.port:
            self.warn(
                r,
                "link.peer",
                f"{back}, but {s.source} binds its link to port {s_bind.port}; expected the same port "
                f"(unless a NAT or a relay such as `fecproxy impair` between them maps one to the other)",
            )


def _repair_air_ms(config: Config) -> int:
    """Air time, in whole ms rounded up, of one full block's repair packets at ``link.rate``
    (0 without pacing): what the last repair waits after its block closes on an idle link."""
    link, fec = config.link, config.fec
    if link.rate is None:
        return 0
    ipv6 = any(a is not None and a.is_ipv6 for a in (link.bind, link.peer))
    budget = LinkBudget(
        rate_bps=link.rate,
        datagram_bytes=fec.max_datagram_bytes,
        trailer_bytes=TRAILER_BYTES if config.auth.enabled else 0,
        header_bytes=IPV6_UDP_HEADER_BYTES if ipv6 else IPV4_UDP_HEADER_BYTES,
        mtu=link.mtu,
    )
    repair = fec.repair if fec.adapt is None else max(fec.repair, fec.adapt.repair_ceiling(fec.block_size))
    if fec.code is FecCode.SLIDING:
        repair = 1  # the flush timer sends one repair packet for what no repair covers yet
    return math.ceil(repair * budget.repair_wire_bytes / budget.rate_bytes * 1000)


def check_pair(sender: Side, receiver: Side, delay_spread_ms: int = 0) -> list[Finding]:
    """Every fault and warning of the pair, errors and warnings in the order found."""
    return _Checker(sender, receiver, delay_spread_ms).run()
