"""Prometheus exposition of a daemon's counters.

The hot path never touches prometheus-client: the sans-IO cores count in plain ints, and this
collector reads them when Prometheus scrapes.  Names follow the Prometheus naming guide: one
prefix ``fecproxy_``, base units, counters end in ``_total``, labels only from small fixed sets.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import Protocol

from prometheus_client import CollectorRegistry, Histogram
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, InfoMetricFamily

from fecproxy import __version__


class DaemonView(Protocol):
    """What the collector reads from a daemon at scrape time (the daemon satisfies it; metrics
    never imports the daemon module, so the two cannot form an import cycle)."""

    encoder: object
    decoder: object
    config: object
    reloads: dict[str, int]

    def drop_counts(self) -> dict[str, int]: ...

    def send_errors(self) -> int: ...

    def flow_count(self) -> int: ...

    def loss_estimate(self) -> tuple[float, float] | None: ...

#: Every drop reason any layer can count; all are exported (as 0 until they happen) so alert
#: rules and dashboards can rely on the series existing.
DROP_REASONS = (
    "malformed",  # fails parsing
    "unsupported",  # version, type or flag this build does not speak
    "oversize",  # datagram or symbol above max_datagram_bytes
    "stale",  # retired sender session, or block far behind the window
    "late",  # source packet for a block already finished
    "duplicate",  # packet already held
    "inconsistent",  # contradicts what the block already holds (k, symbol size)
    "flow_limit",  # flow table full
    "unknown_flow",  # reply for a flow that has expired
    "no_peer",  # receiver has no peer address yet to send replies to
    "unreachable",  # receiver could not open a socket towards forward
    "internal_error",  # a bug in fecproxy: logged with a traceback, cost one packet
)
BLOCK_OUTCOMES = ("complete", "recovered", "expired", "evicted", "superseded")
#: From 1 ms (a fast LAN hop) to 2 s (well past any hold time we would configure).
RECOVERY_DELAY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.0)


class DaemonCollector:
    """Reads a daemon's counters at scrape time."""

    def __init__(self, daemon: "DaemonView"):
        self.daemon = daemon

    def describe(self) -> Iterable:
        return []

    def collect(self) -> Iterable:
        d = self.daemon
        enc = d.encoder.stats
        dec = d.decoder.stats

        def counter(name: str, doc: str, value: float) -> CounterMetricFamily:
            return CounterMetricFamily(name, doc, value=value)

        yield counter("fecproxy_source_packets_sent", "Source packets sent on the link.", enc.source_packets)
        yield counter("fecproxy_repair_packets_sent", "Repair packets sent on the link.", enc.repair_packets)
        yield counter("fecproxy_source_bytes_sent", "Bytes of source packets sent on the link, headers included.", enc.source_bytes)
        yield counter("fecproxy_repair_bytes_sent", "Bytes of repair packets sent on the link, headers included.", enc.repair_bytes)
        yield counter("fecproxy_blocks_sent", "Source blocks closed and protected.", enc.blocks)
        yield counter("fecproxy_short_blocks_sent", "Blocks closed by the flush timer before reaching k.", enc.short_blocks)
        received = CounterMetricFamily("fecproxy_link_packets_received", "Valid FEC packets received from the link.", labels=["kind"])
        received.add_metric(["source"], dec.source_received)
        received.add_metric(["repair"], dec.repair_received)
        yield received
        yield counter("fecproxy_source_packets_lost", "Source datagrams missing on the link, before recovery.", dec.lost)
        yield counter("fecproxy_datagrams_recovered", "Lost datagrams rebuilt from repair packets.", dec.recovered)
        yield counter("fecproxy_datagrams_unrecovered", "Lost datagrams not rebuilt (residual loss).", dec.unrecovered)
        yield counter("fecproxy_datagrams_delivered", "Datagrams handed to the application side.", dec.delivered)
        yield counter("fecproxy_repair_packets_unneeded", "Repair packets for blocks already complete.", dec.repair_unneeded)
        blocks = CounterMetricFamily("fecproxy_blocks_received", "Received blocks by how they ended.", labels=["outcome"])
        for outcome in BLOCK_OUTCOMES:
            blocks.add_metric([outcome], dec.blocks.get(outcome, 0))
        yield blocks
        dropped = CounterMetricFamily("fecproxy_packets_dropped", "Packets and datagrams dropped, by reason.", labels=["reason"])
        totals = d.drop_counts()
        for reason in DROP_REASONS:
            dropped.add_metric([reason], totals.get(reason, 0))
        yield dropped
        yield counter("fecproxy_send_errors", "Datagrams the OS refused to send.", d.send_errors())
        reloads = CounterMetricFamily("fecproxy_config_reloads", "SIGHUP reloads by result.", labels=["result"])
        for result in ("applied", "rejected"):
            reloads.add_metric([result], d.reloads.get(result, 0))
        yield reloads
        yield GaugeMetricFamily("fecproxy_flows", "Application flows in the flow table.", value=d.flow_count())
        estimate = d.loss_estimate()
        if estimate is not None:
            yield GaugeMetricFamily(
                "fecproxy_link_loss_ratio", "Estimated link loss of source packets (0-1), sliding window.", value=estimate[0]
            )
            yield GaugeMetricFamily(
                "fecproxy_link_mean_burst_packets", "Estimated mean length of loss bursts, in packets.", value=estimate[1]
            )
        fec = d.encoder.settings
        info = InfoMetricFamily("fecproxy", "Build and FEC parameters of this daemon.")
        info.add_metric(
            [], {"version": __version__, "role": d.config.role, "k": str(fec.block_size), "m": str(fec.repair)}
        )
        yield info


def build_registry(daemon: "DaemonView") -> tuple[CollectorRegistry, Histogram]:
    """A registry of this daemon's own (several daemons may share one process, as in the demo)."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(DaemonCollector(daemon))
    histogram = Histogram(
        "fecproxy_recovery_delay_seconds",
        "From a block's first packet to the delivery of a datagram rebuilt from it.",
        buckets=RECOVERY_DELAY_BUCKETS,
        registry=registry,
    )
    return registry, histogram


#: How often the metrics thread looks for a stop request.  prometheus-client's own
#: start_http_server keeps socketserver's 0.5 s, which alone spends half of the one second the
#: daemon has to exit after SIGTERM; 50 ms costs a negligible 20 wake-ups a second.
STOP_POLL_SECONDS = 0.05


def serve(registry: CollectorRegistry, host: str, port: int) -> Callable[[], None]:
    """Serve /metrics and the status page from a background thread; returns a function that stops
    it (quickly)."""
    import socket
    import threading
    from socketserver import ThreadingMixIn
    from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

    from prometheus_client import make_wsgi_app

    family = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)[0][0]

    class Server(ThreadingMixIn, WSGIServer):
        daemon_threads = True
        address_family = family

    class QuietHandler(WSGIRequestHandler):
        def log_message(self, format: str, *args) -> None:
            """Scrapes are not events: nothing is logged per request."""

    from fecproxy.shell.status import status_app

    # `/` and `/status.json` are the status page; every other path is prometheus-client's.
    app = status_app(registry, make_wsgi_app(registry))
    server = make_server(host, port, app, Server, handler_class=QuietHandler)
    thread = threading.Thread(
        target=server.serve_forever, kwargs={"poll_interval": STOP_POLL_SECONDS}, name="fecproxy-metrics", daemon=True
    )
    thread.start()

    def stop() -> None:
        server.shutdown()
        server.server_close()
        thread.join(timeout=1)

    stop.port = server.server_address[1]  # type: ignore[attr-defined]
    return stop
