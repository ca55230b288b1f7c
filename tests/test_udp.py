"""The shell's UDP sockets (fecproxy.shell.udp): GRO splitting, a GSO send read back with GRO, and
socket buffers the kernel caps.  Sockets only on 127.0.0.1; no timing assertions."""

from __future__ import annotations

import socket
import sys
from io import StringIO
from pathlib import Path

import pytest

from fecproxy.shell import logs, udp

LOOPBACK = "127.0.0.1"


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
