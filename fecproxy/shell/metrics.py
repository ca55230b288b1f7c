"""Prometheus exposition of a daemon's counters.

The hot path never touches prometheus-client: the sans-IO cores count in plain ints, and this
collector reads them when Prometheus scrapes.  Names follow the Prometheus naming guide: one
prefix ``fecproxy_``, base units, counters end in ``_total``, labels only from small fixed sets.
"""

from __future__ import annotations

import math
import socket
from collections.abc import Callable, Iterable, Mapping
from typing import TYPE_CHECKING, Protocol
from weakref import WeakKeyDictionary

import trio
from prometheus_client import (
    CollectorRegistry,
    Histogram,
    PlatformCollector,
    ProcessCollector,
    disable_created_metrics,
    make_wsgi_app,
)
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, InfoMetricFamily

from fecproxy import __version__
from fecproxy.linkmodel.adaptation import DECISION_REASONS, DOWN, IGNORE_REASONS, UP
from fecproxy.protocol.events import BlockOutcome, DropReason
from fecproxy.protocol.ordering import WAIT_BUCKETS, OrderStats, SkipReason
from fecproxy.shell.history import History, keep_history
from fecproxy.shell.http_server import HttpServer, WsgiApp, open_listener
from fecproxy.shell.link_metrics import link_metrics
from fecproxy.shell.link_output import LinkFigures
from fecproxy.shell.status import read_samples, status_app

# prometheus-client adds a `<name>_created` series (the creation time) to every counter and
# histogram it owns; Prometheus does not need them and they double the series an operator sees
# (and the README table would not list them).  Process-wide, as the library offers it.
disable_created_metrics()

if TYPE_CHECKING:
    from fecproxy.linkmodel.feedback import Feedback
    from fecproxy.protocol.decoder import DecoderStats
    from fecproxy.protocol.encoder import EncoderStats

#: Why a well-formed loss report gave no decision (the labels of fecproxy_reports_ignored_total):
#: on another session than our encoder's (reports.OTHER_SESSION), or the controller's reasons.
REPORT_IGNORE_REASONS = ("other_session", *IGNORE_REASONS)


class DaemonView(Protocol):
    """Everything the collector reads from a daemon at scrape time, all of it public on the
    daemon.  Metrics never imports the daemon module (the daemon imports this one), so the two
    cannot form an import cycle."""

    @property
    def role(self) -> str: ...

    @property
    def encoder_stats(self) -> EncoderStats: ...

    @property
    def decoder_stats(self) -> DecoderStats: ...

    @property
    def block_shape(self) -> tuple[int, int]:
        """(k, m) of the blocks being sent now (a reload changes them)."""

    @property
    def interleave(self) -> int:
        """D, the open blocks per size class of the blocks being sent now."""

    @property
    def size_class_names(self) -> tuple[str, ...]:
        """The label values of the size classes in use (class names from fec.size_classes)."""

    @property
    def reloads(self) -> Mapping[str, int]:
        """SIGHUP reloads by result: "applied", "rejected"."""

    def drop_counts(self) -> dict[str, int]: ...

    def send_errors(self) -> int: ...

    def flow_count(self) -> int: ...

    def flows_evicted(self) -> int:
        """Flows recycled for a new client while still within their timeout."""

    def loss_estimate(self) -> tuple[float, float] | None:
        """(average loss, mean burst) of the link, or None before any sample."""

    @property
    def received_code(self) -> tuple[int | None, int | None]:
        """(k, m) of the peer's code as its repair packets show them; None before any."""

    @property
    def feedback(self) -> Feedback:
        """Loss reports sent and received, and the adaptation of the direction we send."""

    # Optional (read with getattr): ``order_stats`` -> OrderStats | None, in-order delivery's
    # counters (None when the daemon delivers as available).

    # Optional (read with getattr): ``link_figures()`` -> LinkFigures | None, the link output's
    # air budget and pacer queue; ``received_code_full`` -> bool | None.


#: The link figures of a view that has no link output: nothing paced, nothing sent.
UNPACED = LinkFigures(None, {}, 0, 0, 0.0, {})

#: From 1 ms (a fast LAN hop) to 2 s (well past any hold time we would configure).
RECOVERY_DELAY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.0)


class DaemonCollector:
    """Reads a daemon's counters at scrape time."""

    def __init__(self, daemon: DaemonView):
        self.daemon = daemon

    def describe(self) -> Iterable:
        return []

    def collect(self) -> Iterable:
        d = self.daemon
        enc = d.encoder_stats
        dec = d.decoder_stats

        def counter(name: str, doc: str, value: float) -> CounterMetricFamily:
            return CounterMetricFamily(name, doc, value=value)

        yield counter("fecproxy_source_packets_sent", "Source packets sent on the link.", enc.source_packets)
        yield counter("fecproxy_repair_packets_sent", "Repair packets sent on the link.", enc.repair_packets)
        yield counter(
            "fecproxy_source_bytes_sent",
            "Bytes of source packets sent on the link, headers included.",
            enc.source_bytes,
        )
        yield counter(
            "fecproxy_repair_bytes_sent",
            "Bytes of repair packets sent on the link, headers included.",
            enc.repair_bytes,
        )
        yield counter("fecproxy_blocks_sent", "Source blocks closed and protected.", enc.blocks)
        yield counter(
            "fecproxy_short_blocks_sent", "Blocks closed by the flush timer before reaching k.", enc.short_blocks
        )
        yield counter(
            "fecproxy_blocks_repair_capped",
            "Blocks whose repair count was cut so repair bytes stay at or below source bytes (RFC 6363 §8.2).",
            enc.repair_capped,
        )
        # Per size class, beside the unlabelled totals (which rules and dashboards use): the label
        # values are the class names made from fec.size_classes, a small fixed set.
        for name, doc in (
            ("source_packets", "Source packets sent on the link, by datagram size class."),
            ("repair_packets", "Repair packets sent on the link, by datagram size class."),
            ("source_bytes", "Bytes of source packets sent on the link, headers included, by size class."),
            ("repair_bytes", "Bytes of repair packets sent on the link, headers included, by size class."),
        ):
            family = CounterMetricFamily(f"fecproxy_class_{name}_sent", doc, labels=["class"])
            for class_name in d.size_class_names:
                family.add_metric([class_name], getattr(enc.classes.get(class_name), name, 0))
            yield family
        received = CounterMetricFamily(
            "fecproxy_link_packets_received", "Valid FEC packets received from the link.", labels=["kind"]
        )
        received.add_metric(["source"], dec.source_received)
        received.add_metric(["repair"], dec.repair_received)
        yield received
        yield counter(
            "fecproxy_source_packets_lost", "Source datagrams missing on the link, before recovery.", dec.lost
        )
        yield counter("fecproxy_datagrams_recovered", "Lost datagrams rebuilt from repair packets.", dec.recovered)
        yield counter("fecproxy_datagrams_unrecovered", "Lost datagrams not rebuilt (residual loss).", dec.unrecovered)
        yield counter("fecproxy_datagrams_delivered", "Datagrams handed to the application side.", dec.delivered)
        yield counter(
            "fecproxy_repair_packets_unneeded", "Repair packets for blocks already complete.", dec.repair_unneeded
        )
        blocks = CounterMetricFamily(
            "fecproxy_blocks_received", "Received blocks by how they ended.", labels=["outcome"]
        )
        # Every block outcome and drop reason is exported (as 0 until it happens), so alert rules
        # and dashboards can rely on the series existing; the protocol core owns both lists
        # (fecproxy.protocol.events) and the label values are the members' strings.
        for outcome in BlockOutcome:
            blocks.add_metric([outcome.value], dec.blocks.get(outcome, 0))
        yield blocks
        dropped = CounterMetricFamily(
            "fecproxy_packets_dropped", "Packets and datagrams dropped, by reason.", labels=["reason"]
        )
        totals = d.drop_counts()
        for reason in DropReason:
            dropped.add_metric([reason.value], totals.get(reason, 0))
        yield dropped
        yield counter("fecproxy_send_errors", "Datagrams the OS refused to send.", d.send_errors())
        reloads = CounterMetricFamily("fecproxy_config_reloads", "SIGHUP reloads by result.", labels=["result"])
        for result in ("applied", "rejected"):
            reloads.add_metric([result], d.reloads.get(result, 0))
        yield reloads
        yield GaugeMetricFamily("fecproxy_flows", "Application flows in the flow table.", value=d.flow_count())
        yield counter(
            "fecproxy_flows_evicted",
            "Flows recycled for a new client before their timeout (table full).",
            d.flows_evicted(),
        )
        # Present from the start, NaN until the peer's first block is in (no traffic measured
        # yet), so a dashboard or `fecproxy plan --from-metrics` can tell "idle" from "down".
        loss, burst = d.loss_estimate() or (math.nan, math.nan)
        yield GaugeMetricFamily(
            "fecproxy_link_loss_ratio",
            "Estimated loss of the peer's source packets on the link into this daemon (0-1), sliding window; "
            "NaN until the first block from the peer.",
            value=loss,
        )
        yield GaugeMetricFamily(
            "fecproxy_link_mean_burst_packets",
            "Estimated mean length of loss bursts on the link into this daemon, in packets; "
            "NaN until the first block from the peer.",
            value=burst,
        )
        received_k, received_m = d.received_code
        yield GaugeMetricFamily(
            "fecproxy_received_code_source_symbols",
            "k of the code this daemon decodes (the peer's block size, from its repair packets); "
            "NaN until one arrives.",
            value=math.nan if received_k is None else received_k,
        )
        yield GaugeMetricFamily(
            "fecproxy_received_code_repair_symbols",
            "m of the code this daemon decodes (highest repair ESI seen - k + 1, a lower bound if the last "
            "repair packets were lost); NaN until a repair packet arrives.",
            value=math.nan if received_m is None else received_m,
        )
        yield from _feedback_metrics(d.feedback, d.block_shape, d.received_code)
        sliding = getattr(d, "sliding_shape", None)
        if sliding is not None:  # fec.code: sliding
            yield GaugeMetricFamily(
                "fecproxy_sliding_window_packets",
                "Source packets the sliding-window code's encoding window holds at most (fec.window).",
                value=sliding[0],
            )
            yield GaugeMetricFamily(
                "fecproxy_sliding_repair_interval_packets",
                "Source packets per repair packet of the sliding-window code now (fec.repair_interval, or as "
                "fec.adapt chose it).",
                value=sliding[1],
            )
        yield from _order_metrics(getattr(d, "order_stats", None))
        try:
            now: float | None = trio.current_time()  # the cores' clock: scrapes run in the daemon's trio loop
        except RuntimeError:  # read outside a trio run (a test): "seconds since" is unknown
            now = None
        figures = getattr(d, "link_figures", lambda: None)()
        full = getattr(d, "received_code_full", None)
        yield from link_metrics(figures or UNPACED, d.feedback.peer, now, full)
        k, m = d.block_shape
        info = InfoMetricFamily(
            "fecproxy",
            "Build of this daemon, its role and the code it sends with (k, m, interleave depth, size classes; "
            "on a receiver: its replies). "
            "The code it decodes: fecproxy_received_code_source_symbols and _repair_symbols.",
        )
        info.add_metric(
            [],
            {
                "version": __version__,
                "role": d.role,
                "fec_code": "block" if sliding is None else "sliding",
                "k": str(k),
                "m": str(m),
                "interleave": str(d.interleave),
                "size_classes": ",".join(d.size_class_names),
            },
        )
        yield info


def _feedback_metrics(feedback: Feedback, shape: tuple[int, int], received: tuple[int | None, int | None]) -> Iterable:
    """The code per link direction and the loss-report loop.  ``code="send"``: the code this
    daemon encodes with now (m moves with fec.adapt); ``"receive"``: the peer's code as its repair
    packets show it (the same figures as fecproxy_received_code_*; NaN until known; D is not on
    the wire, so it has no "receive" series).  A fixed label set, so a pair's two scrapes line up."""
    k, m = shape
    received_k, received_m = (math.nan if value is None else value for value in received)
    for name, doc, sent, seen in (
        (
            "fecproxy_code_source_symbols",
            "Source datagrams per full block (k): of the code this daemon sends with, and the one it receives.",
            k,
            received_k,
        ),
        (
            "fecproxy_code_repair_symbols",
            "Repair packets per full block (m): of the code this daemon sends with, and the one it receives.",
            m,
            received_m,
        ),
        (
            "fecproxy_code_interleave_depth",
            "Blocks interleaved on the link (D; 1 = none) this daemon sends.",
            feedback.depth,
            None,
        ),
    ):
        # `code`, not `direction`: one meaning per label name across the package, and `direction`
        # is the link direction (forward/return) on fecproxy impair's metrics.
        gauge = GaugeMetricFamily(name, doc, labels=["code"])
        gauge.add_metric(["send"], sent)
        if seen is not None:
            gauge.add_metric(["receive"], seen)
        yield gauge
    stats = feedback.stats
    yield CounterMetricFamily("fecproxy_reports_sent", "Loss reports sent to the peer.", value=stats.sent)
    yield CounterMetricFamily(
        "fecproxy_reports_received", "Loss reports received on our own session.", value=stats.received
    )
    ignored = CounterMetricFamily(
        "fecproxy_reports_ignored", "Loss reports that gave no decision, by reason.", labels=["reason"]
    )
    counts = feedback.ignored()
    for reason in REPORT_IGNORE_REASONS:
        ignored.add_metric([reason], counts.get(reason, 0))
    yield ignored
    adaptations = CounterMetricFamily(
        "fecproxy_adaptations",
        "Changes of m (or D) made from loss reports, by change (up, down) and reason.",
        labels=["change", "reason"],
    )
    decisions = feedback.decisions()
    for change in (UP, DOWN):
        for reason in DECISION_REASONS:
            adaptations.add_metric([change, reason], decisions.get((change, reason), 0))
    yield adaptations
    yield GaugeMetricFamily(
        "fecproxy_reports_stale",
        "1 while no loss report came for 5 intervals and m is held; else 0.",
        value=int(feedback.stale),
    )


def _order_metrics(stats: OrderStats | None) -> Iterable:
    """In-order delivery (delivery.order: in_order): the wait it added, what waited, the gaps it
    skipped by reason.  Exported on every daemon (zeros when it delivers as available), so rules
    and dashboards can rely on the series existing."""
    stats = stats if stats is not None else OrderStats()
    cumulative, buckets = 0, []
    for bound, count in zip(WAIT_BUCKETS, stats.wait_counts, strict=False):
        cumulative += count
        buckets.append((f"{bound:g}" if bound else "0.0", cumulative))
    buckets.append(("+Inf", sum(stats.wait_counts)))
    yield HistogramMetricFamily(
        "fecproxy_delivery_wait_seconds",
        "Wait added by in-order delivery to each datagram handed on (0 when it came in order).",
        buckets=buckets,
        sum_value=stats.wait_sum,
    )
    yield CounterMetricFamily(
        "fecproxy_delivery_held", "Datagrams that waited behind a gap (in-order delivery).", value=stats.held
    )
    yield GaugeMetricFamily(
        "fecproxy_delivery_held_datagrams", "Datagrams waiting behind a gap now.", value=stats.held_datagrams
    )
    skipped = CounterMetricFamily(
        "fecproxy_delivery_gaps_skipped",
        "Sequence numbers in-order delivery passed over without a datagram, by reason.",
        labels=["reason"],
    )
    for reason in SkipReason:
        skipped.add_metric([reason.value], stats.skipped.get(reason, 0))
    yield skipped
    yield CounterMetricFamily(
        "fecproxy_delivery_flow_restarts",
        "Flows whose sequence jumped far back (a restarted peer), followed afresh.",
        value=stats.restarts,
    )


def add_process_collectors(registry: CollectorRegistry) -> None:
    """prometheus-client's own collectors of the process (``process_*``: start time, memory, CPU,
    open and maximum file descriptors, from /proc on Linux) and of the Python build
    (``python_info``).  Several registries in one process (the demo) each show the same process."""
    ProcessCollector(registry=registry)
    PlatformCollector(registry=registry)


#: For each registry :func:`build_registry` made, one with the daemon's own families only (no
#: ``process_*``, no ``python_info``): what the history samples every second.  The process
#: collector lists /proc/self/fd, about 50 ms with 4 000 flow sockets open: fine once a scrape,
#: too much once a second on the event loop.
_OWN_FAMILIES: WeakKeyDictionary[CollectorRegistry, CollectorRegistry] = WeakKeyDictionary()


def own_families(registry: CollectorRegistry) -> CollectorRegistry:
    """The daemon's own families of a registry from :func:`build_registry` (else the registry)."""
    return _OWN_FAMILIES.get(registry, registry)


def build_registry(daemon: DaemonView) -> tuple[CollectorRegistry, Histogram]:
    """A registry of this daemon's own (several daemons may share one process, as in the demo)."""
    registry = CollectorRegistry(auto_describe=False)
    own = CollectorRegistry(auto_describe=False)
    collector = DaemonCollector(daemon)
    registry.register(collector)
    own.register(collector)
    add_process_collectors(registry)
    histogram = Histogram(
        "fecproxy_recovery_delay_seconds",
        "From a block's first packet to the delivery of a datagram rebuilt from it.",
        buckets=RECOVERY_DELAY_BUCKETS,
        registry=registry,
    )
    own.register(histogram)
    _OWN_FAMILIES[registry] = own
    return registry, histogram


class MetricsServer(HttpServer):
    """A bound /metrics endpoint: ``address`` is where it listens (the bound port when 0 was asked
    for); it answers from :meth:`run`, a task in the owner's nursery, which also samples the
    ``history`` (if any) for /status.json; ``stop()`` ends both."""

    def __init__(self, sock: socket.socket, app: WsgiApp, registry: CollectorRegistry, history: History | None):
        super().__init__(sock, app)
        self.registry, self.history = registry, history

    async def run(self, *, task_status: trio.TaskStatus[None] = trio.TASK_STATUS_IGNORED) -> None:
        async with trio.open_nursery() as nursery:
            if self.history is not None:
                own = own_families(self.registry)
                nursery.start_soon(keep_history, self.history, lambda: read_samples(own)[0].items())
            await super().run(task_status=task_status)
            nursery.cancel_scope.cancel()


def serve(
    registry: CollectorRegistry,
    host: str,
    port: int,
    *,
    history: History | None = None,
    facts: Callable[[], dict] | None = None,
) -> MetricsServer:
    """Bind the metrics port for the registry (/metrics at every path but the status page's).

    The one metrics HTTP server of the package: the daemon, the demo and the impairment relay all
    make theirs here, then start its ``run`` in their nursery (:mod:`fecproxy.shell.http_server`:
    no thread, bounded connections).  With a ``history``, /status.json can hand out its samples
    and events (:mod:`fecproxy.shell.history`).  Raises OSError when the address cannot be
    resolved or bound.
    """
    # `/` and `/status.json` are the status page; every other path is prometheus-client's.
    app = status_app(registry, make_wsgi_app(registry), history=history, facts=facts)
    return MetricsServer(open_listener(host, port), app, registry, history)
