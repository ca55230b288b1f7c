"""The trio shell's small parts, each on its own: GRO splitting, structured log lines, the
metrics collector against a stand-in daemon, and what a reload keeps.

Sockets only on 127.0.0.1; no timing assertions.
"""

from __future__ import annotations

import logging
import math
import socket
import sys
import urllib.request
from io import StringIO
from pathlib import Path

import pytest
import trio

from fecproxy.config import parse_config_text
from fecproxy.linkmodel.feedback import Feedback
from fecproxy.protocol.decoder import BlockDecoder, DecoderStats
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings, EncoderStats
from fecproxy.protocol.events import DropReason
from fecproxy.shell import logs, udp
from fecproxy.shell.metrics import build_registry, serve
from fecproxy.shell.settings import RESTART_KEYS, ReloadRejected, keep_fixed, needs_restart, read_new_config

LOOPBACK = "127.0.0.1"


# ------------------------------------------------------------------------------ udp


def test_split_coalesced_cuts_at_the_segment_size_with_a_shorter_tail():
    data = b"aaaabbbbcc"
    assert udp.split_coalesced(data, 4) == [b"aaaa", b"bbbb", b"cc"]
    assert udp.split_coalesced(data, 10) == [data]
    assert udp.split_coalesced(data, 0) == [data]  # a zero segment size means "not coalesced"


def test_gro_segment_size_reads_the_kernels_cmsg_and_defaults_to_the_read_size():
    cmsg = (udp.SOL_UDP, udp.UDP_GRO, (300).to_bytes(4, sys.byteorder))  # a native int, as linux/udp.h sends it
    assert udp.gro_segment_size([cmsg], 1200) == 300
    assert udp.gro_segment_size([], 1200) == 1200
    assert udp.gro_segment_size([(socket.SOL_SOCKET, 1, b"\0\0\0\0")], 1200) == 1200


def test_gso_send_and_gro_read_round_trip_on_loopback():
    receiver = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sender = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    with receiver, sender:
        receiver.bind((LOOPBACK, 0))
        receiver.settimeout(5)
        if not udp.enable_coalescing(receiver):
            pytest.skip("no UDP_GRO on this kernel")
        datagrams = [bytes([i]) * 100 for i in range(8)]
        try:
            sender.sendmsg([b"".join(datagrams)], udp.gso_control(100), 0, receiver.getsockname())
        except OSError:
            pytest.skip("no UDP_SEGMENT on this kernel")
        got: list[bytes] = []
        buffer = bytearray(udp.MAX_UDP_PAYLOAD)
        while len(got) < len(datagrams):
            size, ancillary, _, _ = receiver.recvmsg_into([buffer], udp.GRO_CMSG_SPACE)
            got += udp.split_coalesced(bytes(buffer[:size]), udp.gro_segment_size(ancillary, size))
        assert got == datagrams


def test_udp_log_lines_are_structured_events():
    stream = StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(logs.KeyValueFormatter())
    udp.log.addHandler(handler)
    try:
        logs.log_event(udp.log, logging.ERROR, "gso_unavailable", error="[Errno 5] EIO", fallback="sendto")
    finally:
        udp.log.removeHandler(handler)
    line = stream.getvalue().strip()
    assert " event=gso_unavailable " in line and "event=event=" not in line
    assert line.endswith('error="[Errno 5] EIO" fallback=sendto')


def test_no_shell_module_writes_its_own_event_field():
    """Every shell log line goes through logs.log_event, which writes event= itself."""
    shell = Path(udp.__file__).parent
    for path in shell.glob("*.py"):
        assert "event=" not in path.read_text(encoding="utf-8").replace("event={", ""), path.name


# ------------------------------------------------------------------------------ metrics


class StandInDaemon:
    """Only what metrics.DaemonView declares: the collector must need nothing more."""

    role = "receiver"
    block_shape = (8, 2)
    interleave = 1
    size_class_names = ("le256", "gt256")
    reloads = {"applied": 1, "rejected": 0}

    def __init__(self):
        self.encoder_stats = EncoderStats()
        self.decoder_stats = DecoderStats()
        self.decoder_stats.recovered = 3
        self.feedback = Feedback(BlockEncoder(EncoderSettings(), 1), BlockDecoder())  # no reports yet

    def drop_counts(self):
        return {"late": 2}

    def send_errors(self):
        return 0

    def flow_count(self):
        return 1

    def flows_evicted(self):
        return 0

    def loss_estimate(self):
        return (0.05, 2.0)

    received_code = (16, 4)

    def link_figures(self):
        return None  # not paced


def _get(url: str) -> str:
    with urllib.request.urlopen(url, timeout=5) as response:
        return response.read().decode()


async def test_collector_reads_only_the_daemon_view_and_serve_exposes_it(nursery):
    registry, _ = build_registry(StandInDaemon())
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
    idle = StandInDaemon()
    idle.loss_estimate = lambda: None
    idle.received_code = (None, None)
    registry, _ = build_registry(idle)
    values = {sample.name: sample.value for family in registry.collect() for sample in family.samples}
    for name in (
        "fecproxy_link_loss_ratio",
        "fecproxy_link_mean_burst_packets",
        "fecproxy_received_code_source_symbols",
        "fecproxy_received_code_repair_symbols",
    ):
        assert math.isnan(values[name]), name


# ------------------------------------------------------------------------------ reload

SENDER = """
role: sender
listen: 127.0.0.1:5000
link: {{bind: 127.0.0.1:0, peer: 127.0.0.1:6000}}
fec: {{block_size: {k}, repair: 4}}
"""


def test_reload_takes_tunables_and_keeps_what_needs_a_restart():
    running = parse_config_text(SENDER.format(k=16))
    new = parse_config_text(SENDER.format(k=8).replace("5000", "5001"))
    assert needs_restart(running, new) == ["listen"]
    kept = keep_fixed(running, new)
    assert kept.fec.block_size == 8
    assert all(getattr(kept, key) == getattr(running, key) for key in RESTART_KEYS)


def test_reload_reports_log_and_flow_table_size_as_needing_a_restart():
    """Logging is set up once and the flow table built at its size once: a reload says so, and
    the running config keeps showing what is in force."""
    running = parse_config_text(SENDER.format(k=16))
    new = parse_config_text(SENDER.format(k=16) + "log: {level: debug}\nflows: {max: 100, idle_timeout_s: 60}\n")
    assert needs_restart(running, new) == ["log", "flows.max"]
    kept = keep_fixed(running, new)
    assert kept.log == running.log and kept.flows.max == running.flows.max
    assert kept.flows.idle_timeout_s == 60  # applied


def test_reload_without_a_config_file_is_rejected_with_a_reason(tmp_path):
    with pytest.raises(ReloadRejected, match="without a config file"):
        read_new_config(None)
    with pytest.raises(ReloadRejected, match="cannot read"):
        read_new_config(tmp_path / "missing.yaml")


def test_reload_applies_flow_timeouts_and_protect_but_flows_max_needs_a_restart():
    from fecproxy.shell.settings import apply_flow_timeouts, flow_table

    flows = "flows: {{max: {max}, idle_timeout_s: {idle}, first_exchange_timeout_s: 10, protect_s: {protect}}}\n"
    running = parse_config_text(SENDER.format(k=16) + flows.format(max=100, idle=60, protect=2))
    new = parse_config_text(SENDER.format(k=16) + flows.format(max=200, idle=90, protect=0))
    assert needs_restart(running, new) == ["flows.max"]
    kept = keep_fixed(running, new)
    assert (kept.flows.max, kept.flows.idle_timeout_s, kept.flows.protect_s) == (100, 90, 0)
    table = flow_table(running)
    apply_flow_timeouts(table, kept)
    assert (table.max_flows, table.idle_timeout, table.first_exchange_timeout, table.protect) == (100, 90.0, 10.0, 0.0)


# ------------------------------------------------------------------------------ open-file limit


def test_open_file_limit_is_raised_to_the_need_within_the_hard_limit():
    import resource

    from fecproxy.shell.fdlimit import FD_RESERVE, ensure_open_files, files_needed

    assert files_needed(4096, holds_flow_sockets=True) == 4096 + FD_RESERVE
    assert files_needed(4096, holds_flow_sockets=False) == FD_RESERVE
    calls = []

    def limits(soft, hard):
        return dict(getrlimit=lambda which: (soft, hard), setrlimit=lambda which, value: calls.append(value))

    assert ensure_open_files(500, **limits(1024, 4096)).raised_from is None and calls == []
    raised = ensure_open_files(4160, **limits(1024, 524288))
    assert (raised.soft, raised.raised_from, raised.enough) == (4160, 1024, True) and calls == [(4160, 524288)]
    short = ensure_open_files(4160, **limits(1024, 2048))
    assert (short.soft, short.enough, short.flows_that_fit) == (2048, False, 2048 - FD_RESERVE)
    assert ensure_open_files(4160, **limits(1024, resource.RLIM_INFINITY)).soft == 4160

    def refuse(which, value):
        raise ValueError("not permitted")

    kept = ensure_open_files(4160, getrlimit=lambda which: (1024, 8192), setrlimit=refuse)
    assert (kept.soft, kept.raised_from, kept.enough) == (1024, None, False)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads net.core.rmem_max (Linux)")
def test_a_buffer_the_kernel_caps_is_reported_with_the_sysctl_to_raise(monkeypatch):
    rmem_max = int(Path("/proc/sys/net/core/rmem_max").read_text())
    monkeypatch.setattr(udp, "_reported_caps", set())
    stream = StringIO()
    logs.setup_logging("info", "text", stream)
    try:
        sock = udp.open_udp_socket(LOOPBACK, 0, receive_buffer=2 * rmem_max, purpose="link.bind")
        try:
            assert udp.granted_buffer(sock, "receive") == rmem_max  # socket(7): capped at rmem_max
        finally:
            sock.close()
        udp.open_udp_socket(LOOPBACK, 0, receive_buffer=2 * rmem_max).close()  # reported once only
    finally:
        logs.setup_logging()
    lines = [line for line in stream.getvalue().splitlines() if "socket_buffer_capped" in line]
    assert len(lines) == 1
    line = lines[0]
    assert "level=warning" in line and "socket=link.bind" in line and "key=sockets.receive_buffer_bytes" in line
    assert f"asked={2 * rmem_max}" in line and f"granted={rmem_max}" in line and "net.core.rmem_max" in line


def test_a_buffer_within_the_cap_is_granted_in_full_and_not_reported(monkeypatch):
    monkeypatch.setattr(udp, "_reported_caps", set())
    sock = udp.open_udp_socket(LOOPBACK, 0, receive_buffer=65536, send_buffer=65536)
    try:
        assert udp.granted_buffer(sock, "receive") == 65536 and udp.granted_buffer(sock, "send") == 65536
    finally:
        sock.close()
    assert not udp._reported_caps
