"""Flow tables: bounded, expiring, recycling maps of application conversations to flow ids.

Pure bookkeeping with ``now`` passed in, so every test uses a fake clock.  Three state machines
(hypothesis.stateful) drive the tables with random operations against plain models of the
documented rules: the sender's table, the receiver's table, and the two joined by a link that
loses and reorders packets, where a reply must never reach a client it was not meant for.
"""

from __future__ import annotations

import pytest
from hypothesis import settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, precondition, rule

from fecproxy.protocol.flows import (
    FLOW_SLOTS,
    GENERATIONS,
    REPLACE_AFTER_PROTECT_FRACTION,
    ClientFlowTable,
    CloseReason,
    FlowClosed,
    Opened,
    PeerFlowTable,
    Verdict,
    flow_id,
    generation_of,
    is_newer_generation,
    slot_of,
)

CLIENT_A = ("127.0.0.1", 40001)
CLIENT_B = ("127.0.0.1", 40002)
CLIENT_C = ("127.0.0.1", 40003)

SHORT, LONG, PROTECT = 30.0, 120.0, 2.0


def clients_table(max_flows=4, *, short=SHORT, long=LONG, protect=PROTECT, slots=FLOW_SLOTS) -> ClientFlowTable:
    return ClientFlowTable(max_flows, first_exchange_timeout=short, idle_timeout=long, protect=protect, slots=slots)


def peer_table(max_flows=4, *, short=SHORT, long=LONG, protect=PROTECT) -> PeerFlowTable:
    return PeerFlowTable(max_flows, first_exchange_timeout=short, idle_timeout=long, protect=protect)


# ------------------------------------------------------------------------------ identifiers


def test_flow_id_packs_a_16_bit_slot_and_an_8_bit_generation():
    assert (FLOW_SLOTS, GENERATIONS) == (2**16, 2**8)
    flow = flow_id(0xBEEF, 0x2A)
    assert flow == 0xBEEF2A and flow < 2**24
    assert (slot_of(flow), generation_of(flow)) == (0xBEEF, 0x2A)


def test_generations_compare_as_serial_numbers():
    assert is_newer_generation(1, 0) and is_newer_generation(127, 0)
    assert not is_newer_generation(128, 0) and not is_newer_generation(0, 0)
    assert is_newer_generation(0, 255) and is_newer_generation(5, 250)  # across the wrap
    assert not is_newer_generation(250, 5)


@pytest.mark.parametrize(
    "make",
    [
        lambda: clients_table(0),
        lambda: clients_table(5, slots=4),
        lambda: clients_table(1, slots=FLOW_SLOTS + 1),
        lambda: peer_table(FLOW_SLOTS + 1),
        lambda: clients_table(short=0.0),
        lambda: peer_table(long=-1.0),
        lambda: peer_table(protect=-0.5),
    ],
)
def test_rejects_impossible_settings(make):
    with pytest.raises(ValueError):
        make()


# ------------------------------------------------------------------------------ sender table


def test_each_client_keeps_its_flow_and_slots_go_in_order():
    table = clients_table()
    a = table.request(CLIENT_A, 0.0)
    b = table.request(CLIENT_B, 0.1)
    assert (a, b) == (flow_id(0, 0), flow_id(1, 0))
    assert table.request(CLIENT_A, 0.2) == a
    assert len(table) == 2
    assert table.client_of(a) == CLIENT_A and table.client_of(b) == CLIENT_B
    assert table.client_of(flow_id(2, 0)) is None


def test_full_table_evicts_the_least_recently_active_flow():
    table = clients_table(3)
    a, b, c = (table.request(client, t) for client, t in ((CLIENT_A, 0.0), (CLIENT_B, 1.0), (CLIENT_C, 2.0)))
    table.request(CLIENT_A, 3.0)  # A is busy again: B is now the least recently active
    d = table.request("D", 10.0)
    assert d is not None and table.stats.evicted == 1
    assert table.client_of(b) is None and table.flow_of(CLIENT_B) is None
    assert {table.client_of(f) for f in (a, c, d)} == {CLIENT_A, CLIENT_C, "D"}
    # The freed slot waits behind the never-used ones: slot 3 is handed out before slot 1 again.
    assert slot_of(d) == 3
    e = table.request("E", 11.0)  # evicts C (active at 2.0)
    assert slot_of(e) == 4 and table.flow_of(CLIENT_C) is None


def test_full_table_refuses_only_while_every_flow_is_protected():
    table = clients_table(2, protect=2.0)
    table.request(CLIENT_A, 0.0)
    table.request(CLIENT_B, 1.0)
    assert table.request(CLIENT_C, 1.5) is None  # A was active 1.5 s ago: protected
    assert table.request(CLIENT_C, 1.999) is None
    assert table.stats.evicted == 0
    c = table.request(CLIENT_C, 2.0)  # A idle for exactly the protected interval: evictable
    assert c is not None and table.flow_of(CLIENT_A) is None and table.stats.evicted == 1
    assert table.request(CLIENT_A, 2.5) is None  # B (1.0) and C (2.0) are both protected
    assert table.request(CLIENT_B, 2.5) is not None  # known clients are always served


def test_zero_protection_never_refuses():
    table = clients_table(1, protect=0.0)
    for i in range(10):
        assert table.request(("10.0.0.1", i), 5.0) is not None
    assert table.stats.evicted == 9


def test_a_flow_past_its_timeout_is_recycled_before_any_live_one_is_evicted():
    table = clients_table(2, short=5.0, long=100.0)
    a = table.request(CLIENT_A, 0.0)
    table.reply(a, 0.5)
    table.request(CLIENT_A, 1.0)  # established: lives 100 s
    table.request(CLIENT_B, 2.0)  # first exchange: lives 5 s
    assert table.request(CLIENT_C, 7.0) is not None
    assert table.flow_of(CLIENT_B) is None and table.flow_of(CLIENT_A) == a
    assert (table.stats.expired, table.stats.evicted) == (1, 0)


def test_generation_steps_each_time_a_slot_gets_a_new_client():
    table = clients_table(1, slots=1, protect=0.0)
    flows = [table.request(("10.0.0.1", i), float(i)) for i in range(GENERATIONS + 2)]
    assert [generation_of(f) for f in flows[:3]] == [0, 1, 2]
    assert {slot_of(f) for f in flows} == {0}
    # 256 hand-outs of one slot wrap the generation: the documented limit of 8 bits.
    assert flows[GENERATIONS] == flows[0] and flows[GENERATIONS + 1] == flows[1]


def test_a_reply_for_an_earlier_client_of_a_slot_reaches_nobody():
    table = clients_table(1, slots=1, protect=0.0)
    old = table.request(CLIENT_A, 0.0)
    new = table.request(CLIENT_B, 1.0)
    assert slot_of(old) == slot_of(new) and old != new
    assert table.reply(old, 1.5) is None  # the caller counts unknown_flow
    assert not table.is_established(old) and table.client_of(old) is None
    assert table.reply(new, 1.5) == CLIENT_B


def test_two_tier_expiry():
    table = clients_table(8, short=30.0, long=120.0)
    silent = table.request("silent", 0.0)  # no reply ever
    single = table.request("single", 0.0)
    table.reply(single, 0.1)  # one exchange
    table.reply(single, 0.2)  # ... still one: more replies to the same request
    chat = table.request("chat", 0.0)
    table.reply(chat, 0.1)
    table.request("chat", 0.2)  # the client spoke again after a reply: established
    assert not table.is_established(silent) and not table.is_established(single)
    assert table.is_established(chat)
    assert table.next_deadline() == 30.0
    assert table.expire(29.9) == []
    gone = table.expire(30.2)
    assert [(c.client, c.reason) for c in gone] == [("silent", CloseReason.EXPIRED), ("single", CloseReason.EXPIRED)]
    assert table.next_deadline() == 120.2
    assert [c.client for c in table.expire(120.2)] == ["chat"]
    assert len(table) == 0 and table.next_deadline() is None
    assert table.stats.expired == 3


def test_established_stays_established_whatever_comes():
    table = clients_table()
    flow = table.request(CLIENT_A, 0.0)
    table.reply(flow, 1.0)
    table.request(CLIENT_A, 2.0)
    table.reply(flow, 3.0)
    table.reply(flow, 4.0)
    assert table.is_established(flow)
    assert table.next_deadline() == 4.0 + LONG


def test_short_timeout_never_exceeds_the_long_one():
    table = clients_table(short=30.0, long=10.0)
    table.request(CLIENT_A, 0.0)
    assert table.short_timeout == 10.0 and table.next_deadline() == 10.0


def test_new_timeouts_apply_to_existing_flows():
    """A SIGHUP reload changes the timeouts without touching the flows."""
    table = clients_table()
    chat = table.request("chat", 0.0)
    table.reply(chat, 0.0)
    table.request("chat", 0.0)
    table.request("once", 0.0)
    table.first_exchange_timeout, table.idle_timeout = 5.0, 7.0
    assert table.next_deadline() == 5.0
    assert [c.client for c in table.expire(7.0)] == ["once", "chat"]


def test_remove_and_unknown_flows_are_harmless():
    table = clients_table(2)
    a = table.request(CLIENT_A, 0.0)
    assert table.remove(flow_id(9, 0)) is None and table.remove(-1) is None
    assert table.reply(flow_id(9, 0), 1.0) is None and table.reply(-5, 1.0) is None
    assert table.remove(a) == FlowClosed(a, CloseReason.REMOVED, CLIENT_A)
    assert len(table) == 0 and table.stats == type(table.stats)()


def test_a_clock_that_goes_back_keeps_the_tiers_in_order():
    table = clients_table()
    table.request(CLIENT_A, 10.0)
    table.request(CLIENT_B, 5.0)  # taken as 10.0
    assert table.next_deadline() == 10.0 + SHORT
    assert [c.client for c in table.expire(10.0 + SHORT)] == [CLIENT_A, CLIENT_B]


def test_thousands_of_clients_never_refused():
    """A resolver's clients, one fresh port per query, each query answered once."""
    table = clients_table(4096, protect=2.0)
    now = 0.0
    for i in range(20_000):
        now = i * 0.005  # 200 new clients a second
        flow = table.request(("192.0.2.7", 1024 + i), now)
        assert flow is not None
        assert table.reply(flow, now + 0.001) == ("192.0.2.7", 1024 + i)
    assert len(table) == 4096
    # 200/s for 30 s would need 6000 flows: the table recycles the oldest instead of refusing.
    assert table.stats.evicted == 20_000 - 4096
    assert table.next_deadline() == pytest.approx((20_000 - 4096) * 0.005 + 0.001 + SHORT)


# ------------------------------------------------------------------------------ receiver table


def test_receiver_opens_a_conversation_per_slot_and_generation():
    table = peer_table()
    first = flow_id(7, 0)
    assert table.request(first, 0.0) == Opened(first)
    assert table.request(first, 0.1) is Verdict.CURRENT
    assert table.reply(first, 0.2) is True
    second = flow_id(7, 1)
    # While the first conversation is active, a newer generation is a damaged or forged id.
    assert table.request(second, 0.3) is Verdict.STALE and table.flow_in(7) == first
    later = 0.2 + PROTECT * REPLACE_AFTER_PROTECT_FRACTION  # quiet long enough: the sender recycled it
    assert table.request(second, later) == Opened(second, (FlowClosed(first, CloseReason.REPLACED),))
    assert table.stats.replaced == 1 and len(table) == 1
    # A late datagram of the first client: dropped, never delivered on the new socket.
    assert table.request(first, later + 0.1) is Verdict.STALE
    assert table.reply(first, later + 0.2) is False  # the old socket's late reply
    assert table.flow_in(7) == second and first not in table and second in table


def test_receiver_takes_a_wrapped_generation_as_newer():
    table = peer_table()
    table.request(flow_id(3, 255), 0.0)
    assert isinstance(table.request(flow_id(3, 0), 1.0), Opened)
    assert table.request(flow_id(3, 255), 1.5) is Verdict.STALE


def test_receiver_reopens_a_conversation_it_expired():
    """The sender may keep a flow longer than the receiver: its next datagram opens again."""
    table = peer_table(short=5.0)
    flow = flow_id(1, 4)
    table.request(flow, 0.0)
    assert [c.flow for c in table.expire(5.0)] == [flow]
    assert table.request(flow, 6.0) == Opened(flow)


def test_receiver_evicts_when_full_and_refuses_while_protected():
    table = peer_table(2, protect=2.0)
    a, b, c = flow_id(0, 0), flow_id(1, 0), flow_id(2, 0)
    table.request(a, 0.0)
    table.request(b, 1.0)
    assert table.request(c, 1.5) is Verdict.REFUSED
    assert table.request(c, 2.0) == Opened(c, (FlowClosed(a, CloseReason.EVICTED),))
    assert table.stats.evicted == 1
    # Replacing a generation needs no room, even when everything is protected.
    b2 = flow_id(1, 1)
    assert table.request(b2, 2.1) == Opened(b2, (FlowClosed(b, CloseReason.REPLACED),))


def test_receiver_two_tiers_follow_requests_and_replies():
    table = peer_table(short=30.0, long=120.0)
    a, b = flow_id(0, 0), flow_id(1, 0)
    table.request(a, 0.0)
    table.reply(a, 0.1)
    table.request(a, 0.2)
    table.request(b, 0.3)
    table.reply(b, 0.4)
    assert table.is_established(a) and not table.is_established(b)
    assert [c.flow for c in table.expire(30.4)] == [b]
    assert table.next_deadline() == pytest.approx(120.2)


def test_peer_restart_ends_every_conversation():
    table = peer_table()
    table.request(flow_id(5, 9), 0.0)
    table.request(flow_id(2, 3), 1.0)
    table.request(flow_id(5, 9), 1.5)
    closed = table.clear()
    assert [(c.flow, c.reason) for c in closed] == [
        (flow_id(2, 3), CloseReason.PEER_RESTARTED),
        (flow_id(5, 9), CloseReason.PEER_RESTARTED),
    ]
    assert len(table) == 0 and table.next_deadline() is None
    # The restarted sender's generation 0 on slot 5 is a new conversation, not a stale one.
    assert table.request(flow_id(5, 0), 2.0) == Opened(flow_id(5, 0))


def test_receiver_remove():
    table = peer_table()
    flow = flow_id(4, 2)
    table.request(flow, 0.0)
    assert table.remove(flow_id(4, 3)) is None
    assert table.remove(flow) == FlowClosed(flow, CloseReason.REMOVED)
    assert len(table) == 0


# ------------------------------------------------------------------------------ model checks
#
# The models restate the rules with plain lists and no cleverness: every flow carries its last
# activity, its state and an activity sequence number; orders are recomputed by sorting.

_TIER_RANK = {"first": 0, "established": 1}


class _ModelFlow:
    def __init__(self, flow, now, seq):
        self.flow, self.last, self.seq, self.state = flow, now, seq, "request"

    @property
    def tier(self):
        return "established" if self.state == "established" else "first"

    def touch(self, now, seq, direction):
        self.last, self.seq = now, seq
        if direction == "request" and self.state == "answered":
            self.state = "established"
        elif direction == "reply" and self.state == "request":
            self.state = "answered"


class _TiersModel:
    """The rules shared by both tables, on a dict of _ModelFlow."""

    def setup_model(self, max_flows, short, long, protect):
        self.max_flows, self.short, self.long, self.protect = max_flows, short, long, protect
        self.flows = {}  # key -> _ModelFlow
        self.now, self.seq = 0.0, 0
        self.evicted = self.expired = 0

    def tick(self):
        self.seq += 1
        return self.seq

    def deadline(self, f):
        return f.last + (min(self.short, self.long) if f.tier == "first" else self.long)

    def next_deadline(self):
        return min((self.deadline(f) for f in self.flows.values()), default=None)

    def due_in_order(self):
        due = [
            (self.deadline(f), _TIER_RANK[f.tier], f.seq, k)
            for k, f in self.flows.items()
            if self.deadline(f) <= self.now
        ]
        return [k for *_, k in sorted(due)]

    def victim(self):
        """(key, reason) that a full table recycles, or None when every flow is protected."""
        due = self.due_in_order()
        if due:
            return due[0], "expired"
        key = min(self.flows, key=lambda k: (self.flows[k].last, _TIER_RANK[self.flows[k].tier], self.flows[k].seq))
        if self.now - self.flows[key].last < self.protect:
            return None
        return key, "evicted"

    def check_tiers(self, table):
        assert len(table) == len(self.flows) <= self.max_flows
        assert table.next_deadline() == self.next_deadline()
        assert (table.stats.evicted, table.stats.expired) == (self.evicted, self.expired)
        for f in self.flows.values():
            assert table.is_established(f.flow) == (f.state == "established")


_settings = settings(max_examples=150, stateful_step_count=40, deadline=None)


class ClientTableMachine(RuleBasedStateMachine, _TiersModel):
    """Sender table against the model: slots least recently freed first, generation +1 per
    hand-out, recycling order, two-tier expiry, replies only to the current client."""

    @initialize(
        max_flows=st.integers(1, 4),
        spare_slots=st.integers(0, 3),
        short=st.sampled_from([2.0, 3.0, 5.0]),
        long=st.sampled_from([3.0, 6.0]),
        protect=st.sampled_from([0.0, 1.0, 2.0]),
    )
    def start(self, max_flows, spare_slots, short, long, protect):
        self.setup_model(max_flows, short, long, protect)
        slots = max_flows + spare_slots
        self.table = ClientFlowTable(
            max_flows, first_exchange_timeout=short, idle_timeout=long, protect=protect, slots=slots
        )
        self.free = list(range(slots))
        self.next_generation = [0] * slots
        self.handed_out = []  # every flow id ever given, to send late replies with

    def close(self, key):
        f = self.flows.pop(key)
        self.free.append(slot_of(f.flow))

    @rule(client=st.integers(0, 7))
    def request(self, client):
        got = self.table.request(client, self.now)
        seq = self.tick()
        if client in self.flows:
            assert got == self.flows[client].flow
            self.flows[client].touch(self.now, seq, "request")
            return
        if len(self.flows) >= self.max_flows:
            victim = self.victim()
            if victim is None:
                assert got is None
                return
            key, reason = victim
            self.close(key)
            if reason == "evicted":
                self.evicted += 1
            else:
                self.expired += 1
        slot = self.free.pop(0)
        expected = flow_id(slot, self.next_generation[slot])
        self.next_generation[slot] = (self.next_generation[slot] + 1) % GENERATIONS
        assert got == expected
        self.flows[client] = _ModelFlow(expected, self.now, seq)
        self.handed_out.append((expected, client))

    @precondition(lambda self: self.handed_out)
    @rule(data=st.data())
    def reply(self, data):
        flow, owner = data.draw(st.sampled_from(self.handed_out))
        got = self.table.reply(flow, self.now)
        current = self.flows.get(owner)
        if current is not None and current.flow == flow:
            assert got == owner
            current.touch(self.now, self.tick(), "reply")
        else:
            assert got is None  # never another client

    @rule(seconds=st.sampled_from([0.5, 1.0, 2.0, 3.0]))
    def wait(self, seconds):
        self.now += seconds

    @rule()
    def expire(self):
        expected = self.due_in_order()
        gone = self.table.expire(self.now)
        assert [c.client for c in gone] == expected
        assert all(c.reason is CloseReason.EXPIRED and c.flow == self.flows[c.client].flow for c in gone)
        for key in expected:
            self.close(key)
            self.expired += 1

    @precondition(lambda self: self.handed_out)
    @rule(data=st.data())
    def remove(self, data):
        flow, owner = data.draw(st.sampled_from(self.handed_out))
        closed = self.table.remove(flow)
        if owner in self.flows and self.flows[owner].flow == flow:
            assert closed == FlowClosed(flow, CloseReason.REMOVED, owner)
            self.close(owner)
        else:
            assert closed is None

    @invariant()
    def agrees(self):
        if not hasattr(self, "table"):
            return
        self.check_tiers(self.table)
        for client, f in self.flows.items():
            assert self.table.flow_of(client) == f.flow and self.table.client_of(f.flow) == client


class PeerTableMachine(RuleBasedStateMachine, _TiersModel):
    """Receiver table against the model: current / newer / older generations, recycling order,
    two-tier expiry."""

    @initialize(
        max_flows=st.integers(1, 3),
        short=st.sampled_from([2.0, 3.0, 5.0]),
        long=st.sampled_from([3.0, 6.0]),
        protect=st.sampled_from([0.0, 1.0, 2.0]),
    )
    def start(self, max_flows, short, long, protect):
        self.setup_model(max_flows, short, long, protect)
        self.table = PeerFlowTable(max_flows, first_exchange_timeout=short, idle_timeout=long, protect=protect)
        self.replaced = 0

    @rule(slot=st.integers(0, 4), generation=st.integers(0, 6))
    def request(self, slot, generation):
        flow = flow_id(slot, generation)
        got = self.table.request(flow, self.now)
        seq = self.tick()
        current = self.flows.get(slot)
        if current is not None and current.flow == flow:
            assert got is Verdict.CURRENT
            current.touch(self.now, seq, "request")
            return
        if current is not None:
            if generation_of(current.flow) > generation:  # no wrap within 0..6
                assert got is Verdict.STALE
                return
            if self.now - current.last < self.protect * REPLACE_AFTER_PROTECT_FRACTION:
                assert got is Verdict.STALE  # the slot's conversation is still active
                return
            closed = (FlowClosed(current.flow, CloseReason.REPLACED),)
            del self.flows[slot]
            self.replaced += 1
        elif len(self.flows) >= self.max_flows:
            victim = self.victim()
            if victim is None:
                assert got is Verdict.REFUSED
                return
            key, reason = victim
            closed = (FlowClosed(self.flows.pop(key).flow, CloseReason(reason)),)
            if reason == "evicted":
                self.evicted += 1
            else:
                self.expired += 1
        else:
            closed = ()
        assert got == Opened(flow, closed)
        self.flows[slot] = _ModelFlow(flow, self.now, seq)

    @rule(slot=st.integers(0, 4), generation=st.integers(0, 6))
    def reply(self, slot, generation):
        flow = flow_id(slot, generation)
        current = self.flows.get(slot)
        ok = current is not None and current.flow == flow
        assert self.table.reply(flow, self.now) is ok
        if ok:
            current.touch(self.now, self.tick(), "reply")

    @rule(seconds=st.sampled_from([0.5, 1.0, 2.0, 3.0]))
    def wait(self, seconds):
        self.now += seconds

    @rule()
    def expire(self):
        expected = [self.flows[k].flow for k in self.due_in_order()]
        assert [c.flow for c in self.table.expire(self.now)] == expected
        for slot in [slot_of(f) for f in expected]:
            del self.flows[slot]
            self.expired += 1

    @rule()
    def peer_restarts(self):
        order = sorted(self.flows.values(), key=lambda f: (f.last, f.seq))
        closed = self.table.clear()
        assert sorted(c.flow for c in closed) == sorted(f.flow for f in order)
        assert [self.flows[c.slot].last for c in closed] == [f.last for f in order]
        self.flows.clear()

    @invariant()
    def agrees(self):
        if not hasattr(self, "table"):
            return
        self.check_tiers(self.table)
        assert self.table.stats.replaced == self.replaced
        for slot, f in self.flows.items():
            assert self.table.flow_in(slot) == f.flow and f.flow in self.table


class RoundTripMachine(RuleBasedStateMachine):
    """Sender and receiver tables joined by a link that loses and reorders any packet.

    The receiver's shell is played by a dict of upstream "sockets", one per conversation it
    opened; the application server answers on them.  Whatever happens, the server never sees two
    clients on one socket, and a reply only ever reaches the client whose request it answers.
    """

    @initialize(
        sender_max=st.integers(1, 3),
        receiver_max=st.integers(1, 4),
        spare_slots=st.integers(0, 2),
        protect=st.sampled_from([0.0, 1.0]),
    )
    def start(self, sender_max, receiver_max, spare_slots, protect):
        timeouts = dict(first_exchange_timeout=2.0, idle_timeout=4.0, protect=protect)
        self.sender = ClientFlowTable(sender_max, slots=sender_max + spare_slots, **timeouts)
        self.receiver = PeerFlowTable(receiver_max, **timeouts)
        self.now = 0.0
        self.forward = []  # (flow, client) in flight to the receiver
        self.back = []  # (flow, client the reply answers) in flight to the sender
        self.sockets = {}  # slot -> (flow, socket number); the receiver shell's upstreams
        self.socket_client = {}  # socket number -> the one client the server saw on it
        self.opened = 0
        self.delivered = 0

    def close_sockets(self, closed):
        for c in closed:
            entry = self.sockets.pop(c.slot, None)
            assert entry is not None and entry[0] == c.flow  # the shell knows what to close

    @rule(client=st.integers(0, 5))
    def client_sends(self, client):
        flow = self.sender.request(client, self.now)
        if flow is not None:
            self.forward.append((flow, client))

    @precondition(lambda self: self.forward)
    @rule(data=st.data(), lose=st.booleans())
    def link_forward(self, data, lose):
        flow, client = self.forward.pop(data.draw(st.integers(0, len(self.forward) - 1)))
        if lose:
            return
        verdict = self.receiver.request(flow, self.now)
        if isinstance(verdict, Opened):
            self.close_sockets(verdict.closed)
            assert slot_of(flow) not in self.sockets
            self.opened += 1
            self.sockets[slot_of(flow)] = (flow, self.opened)
        elif verdict is not Verdict.CURRENT:
            return
        socket_flow, number = self.sockets[slot_of(flow)]
        assert socket_flow == flow
        # The server never sees two clients on one socket.
        assert self.socket_client.setdefault(number, client) == client

    @precondition(lambda self: self.sockets)
    @rule(data=st.data())
    def server_replies(self, data):
        flow, number = data.draw(st.sampled_from(sorted(self.sockets.values())))
        if number not in self.socket_client:
            return
        assert self.receiver.reply(flow, self.now)  # an open socket is a current conversation
        self.back.append((flow, self.socket_client[number]))

    @precondition(lambda self: self.back)
    @rule(data=st.data(), lose=st.booleans())
    def link_back(self, data, lose):
        flow, answers = self.back.pop(data.draw(st.integers(0, len(self.back) - 1)))
        if lose:
            return
        client = self.sender.reply(flow, self.now)
        assert client is None or client == answers  # never the wrong client
        self.delivered += client is not None

    @rule(seconds=st.sampled_from([0.5, 1.0, 3.0]))
    def time_passes(self, seconds):
        self.now += seconds
        self.sender.expire(self.now)
        self.close_sockets(self.receiver.expire(self.now))

    @invariant()
    def sockets_match_the_receiver_table(self):
        if hasattr(self, "receiver"):
            assert {slot: flow for slot, (flow, _) in self.sockets.items()} == {
                slot: self.receiver.flow_in(slot) for slot in self.sockets
            }
            assert len(self.sockets) == len(self.receiver)


TestClientTable = ClientTableMachine.TestCase
TestClientTable.settings = _settings
TestPeerTable = PeerTableMachine.TestCase
TestPeerTable.settings = _settings
TestRoundTrip = RoundTripMachine.TestCase
TestRoundTrip.settings = settings(max_examples=200, stateful_step_count=60, deadline=None)


def test_the_flow_id_fills_the_wire_field():
    # Wire format version 2 carries slot and generation as one 24-bit flow id.
    from fecproxy.protocol import wire
    from fecproxy.protocol.flows import GENERATION_BITS, SLOT_BITS

    assert SLOT_BITS + GENERATION_BITS == wire.FLOW_ID_BITS
    assert flow_id(FLOW_SLOTS - 1, GENERATIONS - 1) == wire.MAX_FLOW_IDS - 1
