"""The link-output pacer, sans-IO: fake clock, no sockets.

The rate rule is checked against RFC 2697 §2's token bucket as the RFC words it (a packet of B
bytes conforms when the bucket holds at least B tokens; tokens grow at CIR up to CBS), computed
here independently of the pacer; the drop rule against the issue's published order.
"""

from __future__ import annotations

from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.protocol.pacer import (
    IPV4_UDP_HEADER_BYTES,
    MAX_CONTROL_QUEUED,
    Departure,
    Pacer,
    PacerConfigError,
    PacerDrop,
    PacketKind,
    air_time,
)

SOURCE, REPAIR, CONTROL = PacketKind.SOURCE, PacketKind.REPAIR, PacketKind.CONTROL


def drain(pacer: Pacer[Any], now: float, until: float) -> list[tuple[float, Departure[Any]]]:
    """Run the fake clock from ``now`` to ``until`` waking at every deadline; (time, departure)."""
    out: list[tuple[float, Departure[Any]]] = []
    while True:
        for d in pacer.datagrams_to_send(now):
            out.append((now, d))
        deadline = pacer.next_deadline()
        if deadline is None or deadline > until:
            return out
        now = max(now, deadline)


def test_an_idle_link_sends_at_once():
    pacer: Pacer[None] = Pacer(256_000, 1.0)
    pacer.send(b"x" * 100, SOURCE, 5.0, None)
    (departure,) = pacer.datagrams_to_send(5.0)
    assert departure.packet == b"x" * 100 and departure.waited == 0.0
    assert pacer.next_deadline() is None


def test_a_burst_leaves_at_the_rfc_2697_token_bucket_times():
    # RFC 2697 §2: the bucket C starts full at CBS; it grows by CIR/8 bytes per second up to CBS;
    # a packet of B bytes may leave when C ≥ B, and then C -= B.  Reference computed from that text.
    rate, cbs, size = 64_000, 3000, 1200
    pacer: Pacer[None] = Pacer(rate, 10.0, burst_bytes=cbs)
    for _ in range(20):
        pacer.send(b"p" * size, SOURCE, 0.0, None)
    got = [t for t, _ in drain(pacer, 0.0, 100.0)]
    wire = size + IPV4_UDP_HEADER_BYTES
    expected, tokens, t = [], float(cbs), 0.0
    for _ in range(20):
        if tokens < wire:
            wait = (wire - tokens) / (rate / 8)
            t += wait
            tokens += wait * rate / 8
        tokens -= wire
        expected.append(t)
    assert got == pytest.approx(expected, abs=1e-9)
    # Past the first two (the burst), one packet per air time.
    assert got[5] - got[4] == pytest.approx(air_time(size, rate))


def test_repair_goes_before_source_oldest_repair_first_and_control_is_never_dropped():
    rate = 80_000  # 10 000 bytes/s; 0.1 s queue = 1000 wire bytes; burst of one 1500 packet
    pacer: Pacer[None] = Pacer(rate, 0.2, mtu=1500, burst_bytes=1500)
    pacer.send(b"s" * 1472, SOURCE, 0.0, None)  # takes the whole bucket
    assert len(pacer.datagrams_to_send(0.0)) == 1
    # 2000 bytes of queue: s1 (272+28=300), r1 (300), r2 (300), s2 (300), r3 (300), s3 (300) ...
    for kind in (SOURCE, REPAIR, REPAIR, SOURCE, REPAIR, SOURCE):
        pacer.send(bytes([len(kind)]) * 272, kind, 0.0, None)
    assert pacer.queued_bytes == 1800
    pacer.send(b"n" * 272, SOURCE, 0.0, None)  # needs 100 more: the oldest repair goes
    c = pacer.counters
    assert c.dropped[(REPAIR, PacerDrop.DISPLACED)] == 1
    pacer.send(b"n" * 272, REPAIR, 0.0, None)  # a new repair pushes out the next-oldest repair
    assert c.dropped[(REPAIR, PacerDrop.DISPLACED)] == 2
    for _ in range(3):
        pacer.send(b"n" * 272, SOURCE, 0.0, None)
    # The last repair went, then nothing but source is left: arriving source is refused.
    assert c.queued[REPAIR] == 0
    assert c.dropped[(SOURCE, PacerDrop.QUEUE_FULL)] >= 1
    assert c.dropped_of(SOURCE) == c.dropped[(SOURCE, PacerDrop.QUEUE_FULL)]  # no queued source was pushed out
    for _ in range(3):
        pacer.send(b"c" * 38, CONTROL, 0.0, None)
    assert c.queued[CONTROL] == 3 and c.dropped_of(CONTROL) == 0
    sent = drain(pacer, 0.0, 60.0)
    assert [d.kind for _, d in sent[:3]] == [CONTROL] * 3  # control first
    assert all(d.kind is SOURCE for _, d in sent[3:])


def test_control_beyond_its_memory_cap_is_counted():
    pacer: Pacer[None] = Pacer(9600, 2.0)
    for _ in range(MAX_CONTROL_QUEUED + 5):
        pacer.send(b"c" * 1400, CONTROL, 0.0, None)
    c = pacer.counters
    assert c.dropped[(CONTROL, PacerDrop.CONTROL_LIMIT)] == 5  # nothing drained meanwhile
    assert c.queued[CONTROL] == MAX_CONTROL_QUEUED
    assert c.offered[CONTROL] == c.sent[CONTROL] + c.queued[CONTROL] + c.dropped_of(CONTROL)


def test_a_queue_that_cannot_hold_one_packet_is_refused_with_the_figure():
    with pytest.raises(PacerConfigError, match="less than one 1500-byte packet at 9600 bit/s .1273 ms"):
        Pacer(9600, 0.5)


def test_close_counts_what_is_left():
    pacer: Pacer[None] = Pacer(9600, 5.0)
    for _ in range(4):
        pacer.send(b"x" * 1000, SOURCE, 0.0, None)
    pacer.datagrams_to_send(0.0)
    left = pacer.close()
    assert left == pacer.counters.dropped[(SOURCE, PacerDrop.SHUTDOWN)] > 0
    assert pacer.queued_packets == 0 and pacer.next_deadline() is None


events = st.lists(
    st.tuples(
        st.sampled_from(list(PacketKind)),
        st.integers(min_value=1, max_value=1472),
        st.floats(min_value=0.0, max_value=0.05),
    ),
    max_size=400,
)


@settings(max_examples=60, deadline=None)
@given(events=events, rate=st.sampled_from([9600, 64_000, 256_000]), queue_s=st.sampled_from([1.3, 2.0, 4.0]))
def test_counters_add_up_memory_is_bounded_and_the_rate_holds(events, rate, queue_s):
    pacer: Pacer[int] = Pacer(rate, queue_s)
    now, sent_bytes, start = 0.0, 0, 0.0
    for i, (kind, size, dt) in enumerate(events):
        now += dt
        pacer.send(b"\0" * size, kind, now, i)
        for d in pacer.datagrams_to_send(now):
            sent_bytes += len(d.packet) + IPV4_UDP_HEADER_BYTES
        c = pacer.counters
        for k in PacketKind:
            assert c.offered[k] == c.sent[k] + c.queued[k] + c.dropped_of(k)
        control_bytes = MAX_CONTROL_QUEUED * (1472 + IPV4_UDP_HEADER_BYTES)
        assert pacer.queued_bytes <= pacer.limit_bytes + control_bytes
        assert pacer.held_entries() <= 4 * (pacer.queued_packets + 64) + 8
        # Token bucket conformance: never more than CBS + CIR·t bytes in any run from the start.
        assert sent_bytes <= pacer.burst_bytes + (now - start) * rate / 8 + 1e-6
    assert sum(pacer.counters.dropped[(CONTROL, r)] for r in (PacerDrop.QUEUE_FULL, PacerDrop.DISPLACED)) == 0
