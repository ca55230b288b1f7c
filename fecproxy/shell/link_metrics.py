"""Prometheus families of the link's air budget and of the far end (issue "a link that is narrow").

Read at scrape time from the link output's figures and the feedback's peer view; kept beside
:mod:`fecproxy.shell.metrics` so that module keeps the core counters only.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from fecproxy.protocol.pacer import PacerDrop, PacketKind
from fecproxy.protocol.peer_view import PeerView
from fecproxy.shell.link_output import LinkFigures


def link_metrics(
    link: LinkFigures, peer: PeerView, now: float | None, received_full: bool | None = None
) -> Iterable[object]:
    """Every series exists from the start (NaN or 0 until it means something), so alert rules
    and dashboards can rely on it."""
    yield GaugeMetricFamily(
        "fecproxy_link_rate_bytes_per_second",
        "The configured air rate of the link (link.rate / 8), IP/UDP headers counted; NaN when not paced.",
        value=math.nan if link.rate_bps is None else link.rate_bps / 8,
    )
    air = CounterMetricFamily(
        "fecproxy_link_air_bytes_sent",
        "Bytes put on the link by packet kind, IP/UDP headers counted: rate() over link.rate is the air rate used.",
        labels=["kind"],
    )
    for kind in PacketKind:
        air.add_metric([kind.value], link.air_bytes.get(kind, 0))
    yield air
    yield GaugeMetricFamily(
        "fecproxy_received_code_full_blocks",
        "1 when fecproxy_received_code_* come from a full block (the peer's code as configured), 0 while only "
        "short blocks (closed by the peer's flush timer) were seen; NaN before any repair packet.",
        value=math.nan if received_full is None else int(received_full),
    )
    yield GaugeMetricFamily(
        "fecproxy_link_queue_packets", "Packets waiting in the pacer for the air (0 when not paced).",
        value=link.queue_packets,
    )  # fmt: skip
    yield GaugeMetricFamily(
        "fecproxy_link_queue_bytes", "Bytes waiting in the pacer, IP/UDP headers counted.", value=link.queue_bytes
    )
    yield GaugeMetricFamily(
        "fecproxy_link_queue_delay_seconds",
        "How long the packet that left the pacer last had waited in it.",
        value=link.queue_delay,
    )
    dropped = CounterMetricFamily(
        "fecproxy_link_queue_dropped",
        "Packets the pacer dropped, by kind and reason (queue_full, displaced, control_limit, shutdown).",
        labels=["kind", "reason"],
    )
    for kind in PacketKind:
        for reason in PacerDrop:
            dropped.add_metric([kind.value, reason.value], link.dropped.get((kind, reason), 0))
    yield dropped
    before, after = peer.peer_loss()
    yield GaugeMetricFamily(
        "fecproxy_peer_link_loss_ratio",
        "Loss before recovery the peer reports on the direction this daemon sends (0-1); NaN until reported.",
        value=before,
    )
    yield GaugeMetricFamily(
        "fecproxy_peer_residual_loss_ratio",
        "Loss after recovery the peer reports on the direction this daemon sends (0-1); NaN until reported.",
        value=after,
    )
    yield GaugeMetricFamily(
        "fecproxy_peer_last_heard_seconds",
        "Seconds since anything valid came from the peer; NaN until it was heard once.",
        value=math.nan if now is None else peer.seconds_since_heard(now),
    )
    yield GaugeMetricFamily(
        "fecproxy_peer_silent",
        "1 while the peer is silent (peer_silent logged), else 0; "
        "NaN until the peer reports (silence is then not tracked).",
        value=int(peer.silent) if peer.reporting else math.nan,
    )


__all__ = ["link_metrics"]
