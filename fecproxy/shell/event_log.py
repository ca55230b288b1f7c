"""The log line of each event the cores return: what the daemon's one handler writes after it has
acted on the event (:meth:`fecproxy.shell.daemon.Daemon._handle_event`).

Wording only, no decision: which events exist and when they come is the cores' business
(:mod:`fecproxy.protocol.events`, :mod:`fecproxy.linkmodel.feedback`).  The lines go to the
daemon's logger, whose name log filters and the status page's history rely on.
"""

from __future__ import annotations

import logging
import math

from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.adaptation import STALE_AFTER_INTERVALS, Decision, ReportsResumed, ReportsStale
from fecproxy.protocol.events import (
    BlockReport,
    Dropped,
    DropReason,
    HoldTooShort,
    PeerAddressChanged,
    PeerCodeSettled,
    SessionProven,
    SessionStarted,
)
from fecproxy.protocol.peer_view import PeerHeard, PeerSilent
from fecproxy.shell.logs import log_event

log = logging.getLogger("fecproxy.shell.daemon")


def log_core_event(event: object, repair: int) -> None:
    """Log ``event`` if it has a line; ``repair`` is the m the encoder uses now."""
    if isinstance(event, BlockReport):
        if event.unrecovered:
            log_event(
                log,
                logging.DEBUG,
                "block_unrecovered",
                sbn=event.sbn,
                k=event.k,
                lost=event.lost,
                outcome=event.outcome,
            )
    elif isinstance(event, Dropped):
        if event.notice is not None and event.reason is DropReason.OVERSIZE:
            log_event(
                log,
                logging.WARNING,
                "datagram_size_mismatch",
                detail=f"{event.detail}: set max_datagram_bytes alike on both sides ({event.notice})",
            )
        elif event.notice is not None:
            # One line per kind of failure per interval: a peer with the wrong key says so
            # plainly, a flood of forgeries does not flood the log.
            kind = getattr(event.error, "kind", event.reason)
            log_event(log, logging.WARNING, "auth_failed", kind=kind, detail=event.notice)
        elif event.reason is not DropReason.AUTH:
            log_event(log, logging.DEBUG, "dropped", reason=event.reason, detail=event.detail)
    elif isinstance(event, PeerAddressChanged):
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
    elif isinstance(event, HoldTooShort):
        # Half again what the late repair needed, rounded up to 100 ms: room for jitter.
        suggested = math.ceil(event.waited * 1500 / 100) * 100
        log_event(
            log,
            logging.WARNING,
            "hold_too_short",
            hold_ms=round(event.hold * 1000),
            repair_after_ms=round(event.waited * 1000),
            detail=f"repair came for blocks already given up: the peer flushes later than decoder.hold_ms; "
            f"set decoder.hold_ms: {suggested} (at most one line a minute)",
        )
    elif isinstance(event, SessionProven):
        log_event(
            log,
            logging.INFO,
            "session_proven",
            session=f"{event.session:08x}",
            young=event.young,
            released=event.released,
        )
    elif isinstance(event, SessionStarted):
        log_event(
            log,
            logging.INFO,
            "peer_session",
            session=f"{event.session:08x}",
            previous=f"{event.previous:08x}" if event.previous is not None else "-",
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


def stats_fields(interval: float, delta: dict[str, int], states: dict[str, object]) -> dict[str, object]:
    """The periodic ``stats`` line's fields: the counters' change over the interval, then the
    states now (flows, peer, far end)."""
    expected = delta["lost"] + delta["received_source"]
    return dict(
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
        **{key: delta[key] for key in ("air_bytes", "queue_dropped") if key in delta},
        **states,
        # In order only: datagrams that waited behind a gap, and gaps skipped.
        **{key: delta[key] for key in ("held", "gaps_skipped") if key in delta},
    )
