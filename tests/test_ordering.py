"""In-order delivery (protocol/ordering.py): pure tests with a fake clock, then properties.

The properties are the issue's acceptance: for any loss and arrival pattern, each flow's delivered
sequence increases without duplicates, no datagram waits beyond the bound, and every datagram not
delivered was lost beyond repair or skipped after the bound (counted).
"""

from __future__ import annotations

import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import Delivery, SessionStarted
from fecproxy.protocol.ordering import WAIT_BUCKETS, WINDOW, InOrderDelivery, SkipReason

WAIT = 0.1


def d(seq: int, flow: int = 1, data: bytes = b"x") -> Delivery:
    return Delivery(flow, data, seq=seq)


def seqs(deliveries: list[Delivery]) -> list[int]:
    return [x.seq for x in deliveries]


def test_in_order_datagrams_pass_at_once_without_wait():
    order = InOrderDelivery(WAIT)
    for i in range(5):
        assert seqs(order.push(d(i), 1.0 + i)) == [i]
    assert order.next_deadline() is None
    assert order.stats.released == 5 and order.stats.held == 0
    assert order.stats.wait_counts[0] == 5 and order.stats.wait_sum == 0


def test_a_datagram_after_a_gap_waits_until_the_gap_is_filled():
    order = InOrderDelivery(WAIT)
    assert seqs(order.push(d(0), 0.0)) == [0]
    assert order.push(d(2), 0.010) == []
    assert order.push(d(3), 0.012) == []
    assert order.next_deadline() == pytest.approx(0.110)
    assert seqs(order.push(d(1), 0.030)) == [1, 2, 3]  # rebuilt: released in order
    assert order.next_deadline() is None
    assert order.stats.held == 2 and order.stats.gaps_skipped == 0
    assert order.stats.wait_sum == pytest.approx(0.020 + 0.018)


def test_the_bound_skips_the_gap_and_counts_it_and_the_late_one_is_dropped():
    order = InOrderDelivery(WAIT)
    order.push(d(0), 0.0)
    order.push(d(3), 0.010)
    order.push(d(5), 0.020)
    assert order.on_timer(0.109) == []
    assert seqs(order.on_timer(0.110)) == [3]  # 1 and 2 skipped
    assert order.stats.skipped[SkipReason.MAX_WAIT] == 2
    assert order.next_deadline() == pytest.approx(0.120)
    assert seqs(order.on_timer(order.next_deadline())) == [5]
    assert order.stats.gaps_skipped == 3
    assert order.push(d(1), 0.2) == [] and order.push(d(4), 0.2) == []
    assert order.stats.late == 2
    assert seqs(order.push(d(6), 0.2)) == [6]


def test_given_up_blocks_release_the_gaps_their_waiters_came_before():
    order = InOrderDelivery(WAIT)
    order.push(d(0), 0.0)
    order.push(d(2), 0.010)
    order.push(d(5, flow=2), 0.050)  # flow 2 waits for 0..4
    # The decoder's oldest open block was first seen at 0.03: flow 1's gap (its waiter came at
    # 0.01) cannot be rebuilt any more; flow 2's may.
    assert seqs(order.give_up_before(0.030, 0.040)) == [2]
    assert order.stats.skipped[SkipReason.GIVEN_UP] == 1
    assert seqs(order.give_up_before(None, 0.060)) == [5]
    assert order.stats.skipped[SkipReason.GIVEN_UP] == 6


def test_a_flow_joined_far_in_starts_where_it_is_and_a_restart_is_followed():
    order = InOrderDelivery(WAIT)
    assert seqs(order.push(d(20000), 0.0)) == [20000]
    assert seqs(order.push(d(20001), 0.0)) == [20001]
    # The sender started again (0 is far behind 20002, beyond the late window): follow it.
    assert seqs(order.push(d(0), 0.1)) == [0]
    assert order.stats.restarts == 1
    assert seqs(order.push(d(1), 0.1)) == [1]


def test_a_restarted_sender_s_flows_are_new_flows_and_the_old_ones_go_on_reset():
    order = InOrderDelivery(WAIT)
    old, new = 0x1111, 0x2222
    order.push(Delivery(1, b"a", seq=5000, session=old), 0.0)
    order.push(Delivery(1, b"b", seq=5002, session=old), 0.0)  # waits for 5001
    # The restarted sender counts flow 1 from 0 again, in its own session: not late, not behind.
    assert [x.data for x in order.push(Delivery(1, b"n0", seq=0, session=new), 0.01)] == [b"n0"]
    assert order.stats.late == 0
    # The decoder now follows the new session: the old one's waiting datagram goes, in order,
    # and the new session's flow keeps its place.
    assert [x.data for x in order.reset(0.02, keep=new)] == [b"b"]
    assert [x.data for x in order.push(Delivery(1, b"n1", seq=1, session=new), 0.03)] == [b"n1"]
    assert order.stats.held_datagrams == 0


def test_sequence_numbers_wrap_around():
    order = InOrderDelivery(WAIT)
    out = []
    for i, seq in enumerate([65534, 65535, 1, 0, 2]):
        out += order.push(d(seq), i * 0.001)
    assert seqs(out) == [65534, 65535, 0, 1, 2]


def test_a_datagram_far_ahead_pushes_the_front_within_the_window():
    order = InOrderDelivery(WAIT)
    order.push(d(0), 0.0)
    order.push(d(2), 0.0)
    out = order.push(d(WINDOW + 10), 0.001)
    assert seqs(out) == [2, WINDOW + 10]  # 1 and 3..WINDOW + 9 skipped: no use waiting for so many
    assert order.stats.skipped[SkipReason.WINDOW] == WINDOW + 8
    assert order.stats.held_datagrams == 0


def test_the_byte_budget_makes_the_longest_waiter_move_on():
    order = InOrderDelivery(WAIT, max_held_bytes=2000)
    order.push(d(0, data=bytes(1000)), 0.0)
    order.push(d(2, data=bytes(1000)), 0.001)
    order.push(d(0, flow=2, data=bytes(1000)), 0.002)
    out = order.push(d(2, flow=2, data=bytes(1000)), 0.003)
    assert [(x.flow, x.seq) for x in out] == [(1, 2)]
    assert order.stats.skipped[SkipReason.MEMORY] == 1
    assert order.stats.held_bytes <= 2000


def test_the_flow_limit_releases_what_the_oldest_flow_held():
    order = InOrderDelivery(WAIT, max_flows=2)
    order.push(d(1, flow=1), 0.0)  # waits for 0
    order.push(d(0, flow=2), 0.0)
    out = order.push(d(0, flow=3), 0.0)
    assert [(x.flow, x.seq) for x in out] == [(1, 1), (3, 0)]
    assert order.stats.skipped[SkipReason.CLOSED] == 1


def test_close_releases_everything_in_order():
    order = InOrderDelivery(WAIT)
    order.push(d(3), 0.0)
    order.push(d(1), 0.0)
    assert seqs(order.close(0.05)) == [1, 3]
    assert order.stats.skipped[SkipReason.CLOSED] == 2
    assert order.stats.held_bytes == 0 and order.next_deadline() is None


def test_the_wait_histogram_counts_each_release_once():
    order = InOrderDelivery(WAIT)
    order.push(d(0), 0.0)
    order.push(d(2), 0.0)
    order.push(d(1), 0.003)
    assert sum(order.stats.wait_counts) == order.stats.released == 3
    assert order.stats.wait_counts[WAIT_BUCKETS.index(0.005)] == 1


def test_bad_bounds_are_refused():
    with pytest.raises(ValueError):
        InOrderDelivery(0)
    with pytest.raises(ValueError):
        InOrderDelivery(WAIT, max_flows=0)


def drive(order: InOrderDelivery, arrivals: list[tuple[float, Delivery]]) -> list[tuple[float, Delivery]]:
    """Feed arrivals at their times, firing the timer exactly at each deadline in between (what
    the shell's cancel scope does); returns (release time, delivery)."""
    out: list[tuple[float, Delivery]] = []
    for at, delivery in arrivals:
        deadline = order.next_deadline()
        while deadline is not None and deadline <= at:
            out += [(deadline, x) for x in order.on_timer(deadline)]
            deadline = order.next_deadline()
        out += [(at, x) for x in order.push(delivery, at)]
    deadline = order.next_deadline()
    while deadline is not None:
        out += [(deadline, x) for x in order.on_timer(deadline)]
        deadline = order.next_deadline()
    return out


@settings(max_examples=150, deadline=None)
@given(
    flows=st.integers(1, 3),
    count=st.integers(1, 60),
    loss=st.floats(0.0, 0.5),
    jitter=st.integers(0, 12),
    spacing=st.floats(0.0005, 0.05),
    seed=st.integers(0, 2**32 - 1),
)
def test_any_loss_and_arrival_pattern_keeps_order_bound_and_count(flows, count, loss, jitter, spacing, seed):
    rng = random.Random(seed)
    sent = [(flow, seq) for seq in range(count) for flow in range(flows)]
    rng.shuffle(sent)
    sent.sort(key=lambda fs: fs[1])  # each flow in order, flows interleaved
    arriving = [fs for fs in sent if rng.random() >= loss]
    # Any arrival pattern: each datagram moves up to `jitter` places (a rebuild comes late).
    keys = [i + rng.uniform(0, jitter) for i in range(len(arriving))]
    arriving = [fs for _, fs in sorted(zip(keys, arriving, strict=True))]
    arrivals = [(i * spacing, Delivery(flow, b"%d" % seq, seq=seq)) for i, (flow, seq) in enumerate(arriving)]
    arrived_at = {(x.flow, x.seq): at for at, x in arrivals}
    order = InOrderDelivery(WAIT)
    released = drive(order, arrivals)

    for flow in range(flows):
        got = [x.seq for _, x in released if x.flow == flow]
        assert got == sorted(set(got)), "increasing, without duplicates"
    for at, x in released:
        assert at - arrived_at[(x.flow, x.seq)] <= WAIT + 1e-9, "never held beyond the bound"
    delivered = {(x.flow, x.seq) for _, x in released}
    lost = set(sent) - set(arriving)
    undelivered_arrivals = set(arriving) - delivered
    assert len(undelivered_arrivals) == order.stats.late, "an arrival not delivered was late: counted"
    # Every sequence number the front passed without delivering it was skipped, and counted once:
    # the lost ones and those whose place was skipped before they came.
    passed = sum(max((s for f, s in arriving if f == flow), default=-1) + 1 for flow in range(flows))
    assert order.stats.gaps_skipped == passed - len(delivered)
    assert order.stats.gaps_skipped <= len(lost) + order.stats.late
    assert order.stats.held_bytes == 0 and order.stats.held_datagrams == 0


@settings(max_examples=60, deadline=None)
@given(
    count=st.integers(20, 120),
    loss=st.floats(0.0, 0.3),
    burst=st.integers(1, 3),
    interleave=st.integers(1, 3),
    seed=st.integers(0, 2**32 - 1),
)
def test_through_encoder_and_decoder_every_missing_datagram_is_lost_or_counted(count, loss, burst, interleave, seed):
    """Two flows, two size classes and interleaving, so a flow's datagrams cross blocks and
    rebuilt ones come late; the link loses runs of packets and delays some."""
    rng = random.Random(seed)
    encoder = BlockEncoder(
        EncoderSettings(block_size=4, repair=2, flush_interval=0.02, interleave=interleave, size_classes=(50,)), 7
    )
    decoder = BlockDecoder(DecoderSettings(hold_time=0.3))
    order = InOrderDelivery(WAIT)
    link: list[tuple[float, bytes]] = []
    now = 0.0
    for i in range(count):
        now += 0.002
        flow = i % 2
        size = 20 if rng.random() < 0.5 else 120
        link += [(now, p) for p in encoder.send(bytes([i % 256]) * size + b"%d" % i, flow, now)]
        link += [(now, p) for p in encoder.on_timer(now)]
    link += [(now + 0.05, p) for p in encoder.close()]
    kept: list[tuple[float, bytes]] = []
    dropping = 0
    for at, packet in link:
        if dropping or rng.random() < loss:
            dropping = dropping - 1 if dropping else burst - 1
            continue
        kept.append((at + (0.03 if rng.random() < 0.05 else 0.0), packet))  # a few arrive late
    kept.sort(key=lambda ap: ap[0])

    released: list[tuple[float, Delivery]] = []
    from_decoder: list[tuple[float, Delivery]] = []

    def handle(events, at):
        for event in events:
            if isinstance(event, Delivery):
                from_decoder.append((at, event))
                released.extend((at, x) for x in order.push(event, at))

    def run_timers_until(at: float) -> None:
        while True:
            deadlines = [t for t in (order.next_deadline(), decoder.next_deadline()) if t is not None and t <= at]
            if not deadlines:
                return
            deadline = min(deadlines)
            handle(decoder.on_timer(deadline), deadline)
            released.extend((deadline, x) for x in order.on_timer(deadline))

    for at, packet in kept:
        run_timers_until(at)
        handle(decoder.receive(packet, None, at), at)
    end = (kept[-1][0] if kept else 0.0) + 2.0
    run_timers_until(end)
    released.extend((end, x) for x in order.close(end))

    arrived_at = {(x.flow, x.seq): at for at, x in from_decoder}
    for flow in (0, 1):
        got = [x.seq for _, x in released if x.flow == flow]
        assert got == sorted(set(got))
    for at, x in released:
        assert at - arrived_at[(x.flow, x.seq)] <= WAIT + 1e-9
    delivered = {(x.flow, x.seq) for _, x in released}
    decoded = set(arrived_at)
    assert len(decoded) == len(from_decoder), "the decoder delivers each datagram once"
    # Not delivered: lost beyond repair (the decoder never had it) or late after its skip (counted).
    assert len(decoded - delivered) == order.stats.late
    expected = {(i % 2, i // 2) for i in range(count)}
    assert decoded <= expected


def test_flows_of_a_session_joined_mid_stream_start_at_their_first_datagram():
    """A restarted receiver joins flows at seq ~2000 (< WINDOW): they go at once, no gap counted
    (the datagrams before went to the previous process), while a flow that first shows up after
    the join window is a new flow again, waited for from 0."""
    order = InOrderDelivery(WAIT)
    assert order.reset(1.0, joined=True) == []
    assert seqs(order.push(d(2000, flow=1), 1.01)) == [2000]
    assert seqs(order.push(d(2001, flow=1), 1.02)) == [2001]
    assert seqs(order.push(d(37, flow=2), 1.05)) == [37]
    assert order.next_deadline() is None
    assert order.stats.gaps_skipped == 0 and order.stats.held == 0
    assert order.push(d(3, flow=3), 1.0 + WAIT + 0.01) == []  # after the window: seq 0..2 may come
    assert order.stats.held == 1


def test_a_session_heard_from_its_start_still_waits_for_a_new_flows_first_datagrams():
    order = InOrderDelivery(WAIT)
    assert order.reset(1.0) == []
    assert order.push(d(2000), 1.01) == []
    assert seqs(order.on_timer(1.01 + WAIT)) == [2000]
    assert order.stats.skipped[SkipReason.MAX_WAIT] == 2000


def test_the_decoder_says_a_session_first_heard_far_in_was_joined():
    """The receiver's decoder, started while the sender's session is at block 300: joined; a
    session heard from its first block: not joined."""
    settings = EncoderSettings(block_size=2, repair=1, flush_interval=0.02, size_classes=())
    for first_sbn, joined in ((300, True), (0, False)):
        encoder = BlockEncoder(settings, 9, first_sbn=first_sbn)
        decoder = BlockDecoder(DecoderSettings(hold_time=0.3))
        events = [e for p in encoder.send(b"reading", 1, 0.0) for e in decoder.receive(p, None, 0.0)]
        assert [e for e in events if isinstance(e, SessionStarted)] == [SessionStarted(9, None, joined)]


def test_the_decoder_says_a_sliding_session_first_heard_far_in_was_joined():
    """The same for the sliding-window code, by ESI: a receiver restarted under a running
    sliding-code sender joins its flows where they are."""
    from fecproxy.protocol import wire

    decoder = BlockDecoder(DecoderSettings(hold_time=0.3))
    events = decoder.receive(wire.encode_sliding_source(9, 5000, 1, b"reading", 5000), None, 0.0)
    assert [e for e in events if isinstance(e, SessionStarted)] == [SessionStarted(9, None, True)]
