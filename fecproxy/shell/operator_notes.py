"""What a daemon tells its operator without being asked: the periodic ``stats`` line and the
rate-limited warnings about datagrams it must drop.

Kept apart from the daemon so the daemon stays the mover of bytes; everything here reads counters
the cores and the link output keep, and logs.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping

import trio

from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.adaptation import STALE_AFTER_INTERVALS, Decision, ReportsResumed, ReportsStale
from fecproxy.protocol.events import PeerAddressChanged, PeerCodeSettled
from fecproxy.protocol.pacer import PacketKind
from fecproxy.protocol.peer_view import PeerHeard, PeerSilent
from fecproxy.shell.logs import log_event

log = logging.getLogger("fecproxy.shell.daemon")

#: At most one ``oversize_datagram`` warning per 10 s: an application that sends too-long
#: datagrams all the time (iperf3's default length) is told a few times a minute, with the count
#: since the last line (common practice, no source).
OVERSIZE_WARN_INTERVAL_S = 10.0


class OversizeWarning:
    """Rate-limited warning for application datagrams above ``fec.max_datagram_bytes``."""

    def __init__(self) -> None:
        self._last: float | None = None
        self._count = 0
        self._largest = 0

    def note(self, count: int, largest: int, limit: int, now: float) -> None:
        """``count`` datagrams over ``limit`` bytes were dropped, the longest ``largest`` bytes."""
        self._count += count
        self._largest = max(self._largest, largest)
        if self._last is not None and now - self._last < OVERSIZE_WARN_INTERVAL_S:
            return
        log_event(
            log,
            logging.WARNING,
            "oversize_datagram",
            size=self._largest,
            limit=limit,
            dropped=self._count,
            key="fec.max_datagram_bytes",
            detail=f"application datagrams above {limit} bytes are dropped (counted as oversize); raise "
            "fec.max_datagram_bytes on both sides (fecproxy check says what fits link.mtu), or send shorter ones",
        )
        self._last, self._count, self._largest = now, 0, 0


async def stats_loop(
    interval: float,
    snapshot: Callable[[], dict[str, int]],
    extra: Callable[[], Mapping[str, object]],
) -> None:
    """One INFO line every ``interval`` seconds with the counters since the previous line, so a
    long run shows it is alive and what the link did without a metrics endpoint.  ``extra``
    gives fields that are states, not counts (flows, the peer's reported loss, silence)."""
    previous = snapshot()
    while True:
        await trio.sleep(interval)
        now = snapshot()
        delta = {key: now[key] - previous[key] for key in now}
        previous = now
        expected = delta["lost"] + delta["received_source"]
        fields: dict[str, object] = dict(
            interval_s=interval,
            datagrams_in=delta["datagrams_in"],
            datagrams_out=delta["delivered"],
            link_packets_in=delta["received_source"] + delta["received_repair"],
            link_packets_out=delta["source_sent"] + delta["repair_sent"],
            # Ratios of the interval's source datagrams; "-" when the peer sent none.
            link_loss=round(delta["lost"] / expected, 6) if expected else "-",
            residual_loss=round(delta["unrecovered"] / expected, 6) if expected else "-",
            recovered=delta["recovered"],
            dropped=delta["dropped"],
            oversize=delta["oversize"],
        )
        if "air_source" in delta:
            fields["air_kbps"] = round(sum(delta[f"air_{kind.value}"] for kind in PacketKind) * 8 / interval / 1000, 1)
            fields["queue_dropped"] = delta["queue_dropped"]
        fields.update(extra())
        log_event(log, logging.INFO, "stats", **fields)


def ratio_field(value: float) -> object:
    """A ratio for a log line: rounded, or "-" while unknown (NaN)."""
    return "-" if math.isnan(value) else round(value, 6)


def log_core_event(event: object, repair: int) -> bool:
    """Log an event of the cores that only informs the operator; False for any other event (the
    daemon acts on those).  ``repair``: the m this side sends with now."""
    if isinstance(event, PeerAddressChanged):
        # A receiver without link.peer says where its replies go, and every change of it.
        log_event(
            log,
            logging.INFO,
            "peer_learned" if event.previous is None else "peer_changed",
            old=format_sockaddr(event.previous) if event.previous is not None else "-",
            new=format_sockaddr(event.address),
        )
    elif isinstance(event, PeerSilent):
        log_event(
            log,
            logging.WARNING,
            "peer_silent",
            quiet_s=round(event.at - event.last_heard_at, 1),
            detail="nothing valid from the peer (no loss report, no packet): peer down or return path cut",
        )
    elif isinstance(event, PeerHeard):
        log_event(log, logging.INFO, "peer_heard", silent_s=round(event.silent_for, 1))
    elif isinstance(event, PeerCodeSettled):
        # INFO the first time per peer session, DEBUG when it changes later (an adapting peer
        # changes m often).
        log_event(
            log,
            logging.INFO if event.first else logging.DEBUG,
            "peer_code",
            k=event.configured[0] if event.configured else event.k,
            m=event.configured[1] if event.configured else event.m,
            blocks="full" if event.configured else "short blocks only so far",
            detail="decoding the peer's blocks (k from its repair packets, m = highest repair ESI - k + 1)",
        )
    elif isinstance(event, Decision):
        link, choice = event.link, event.choice
        log_event(
            log,
            logging.INFO,
            "adapted",
            direction=event.direction,
            reason=event.reason,
            m_from=event.previous.repair,
            m=choice.repair,
            depth=choice.depth,
            k_effective=choice.k_effective,
            loss=f"{link.loss:.4f}",
            burst=f"{link.mean_burst:.2f}",
            basis=link.basis,
            samples=link.samples,
            predicted_residual=f"{choice.residual_loss:.2e}",
        )
    elif isinstance(event, ReportsStale):
        log_event(
            log,
            logging.WARNING,
            "loss_reports_stale",
            holding_m=repair,
            detail=f"no loss report from the peer for {STALE_AFTER_INTERVALS} intervals (return path down?): m is held",
        )
    elif isinstance(event, ReportsResumed):
        log_event(log, logging.INFO, "loss_reports_resumed", m=repair)
    else:
        return False
    return True


__all__ = ["OVERSIZE_WARN_INTERVAL_S", "OversizeWarning", "log_core_event", "ratio_field", "stats_loop"]
