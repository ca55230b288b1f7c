"""The metrics collector against a stand-in daemon view: it reads nothing else, and the metrics port
serves what it reads.  Sockets only on 127.0.0.1."""

from __future__ import annotations

import math
import urllib.request

import trio
from support.stand_in_view import StandInView, a_receiver

from fecproxy.protocol.events import DropReason
from fecproxy.shell.metrics import build_registry, serve

LOOPBACK = "127.0.0.1"


def _get(url: str) -> str:
    with urllib.request.urlopen(url, timeout=5) as response:
        return response.read().decode()


async def test_collector_reads_only_the_daemon_view_and_serve_exposes_it(nursery):
    registry, _ = build_registry(a_receiver())
    server = serve(registry, LOOPBACK, 0)
    try:
        await nursery.start(server.run)
        assert server.address == (LOOPBACK, server.port) and server.port > 0
        text = await trio.to_thread.run_sync(_get, f"http://{LOOPBACK}:{server.port}/metrics")
    finally:
        server.stop()
    assert "fecproxy_datagrams_recovered_total 3.0" in text
    assert 'fecproxy_packets_dropped_total{reason="late"} 2.0' in text
    assert all(f'reason="{reason}"' in text for reason in DropReason)
    assert (
        'fecproxy_info{fec_code="block",interleave="1",k="8",m="2",role="receiver",size_classes="le256,gt256"' in text
    )
    assert "fecproxy_link_loss_ratio 0.05" in text
    assert "fecproxy_received_code_source_symbols 16.0" in text and "fecproxy_received_code_repair_symbols 4.0" in text
    assert "_created" not in text  # no creation-time series beside the counters and the histogram


def test_link_and_code_gauges_are_present_as_nan_before_traffic():
    """An idle daemon exposes its estimate and the peer's code as NaN, not by their absence."""
    idle = StandInView(estimate=None, received_code=(None, None))
    registry, _ = build_registry(idle)
    values = {sample.name: sample.value for family in registry.collect() for sample in family.samples}
    for name in (
        "fecproxy_link_loss_ratio",
        "fecproxy_link_mean_burst_packets",
        "fecproxy_received_code_source_symbols",
        "fecproxy_received_code_repair_symbols",
    ):
        assert math.isnan(values[name]), name
