"""FlowTable: bounded, expiring map of application conversations to one-byte flow ids.

Pure bookkeeping with ``now`` passed in, so every test uses a fake clock.  The model-based test
drives the table and a plain-dict model of the documented behaviour with the same random
operations and compares them after every step.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.protocol.flows import MAX_FLOW_IDS, FlowTable

CLIENT_A = ("127.0.0.1", 40001)
CLIENT_B = ("127.0.0.1", 40002)
CLIENT_C = ("127.0.0.1", 40003)


def test_flow_id_is_one_byte():
    # RFC 6363 §4 / RFC 6865 §4: the flow id of the source symbol is one byte.
    assert MAX_FLOW_IDS == 256


@pytest.mark.parametrize("bad", [0, -1, MAX_FLOW_IDS + 1])
def test_rejects_impossible_sizes(bad):
    with pytest.raises(ValueError, match="max_flows"):
        FlowTable(bad, 10.0)


def test_each_client_keeps_its_flow_and_gets_the_lowest_free_id():
    table = FlowTable(4, 10.0)
    assert table.flow_for(CLIENT_A, 0.0) == 0
    assert table.flow_for(CLIENT_B, 0.1) == 1
    assert table.flow_for(CLIENT_A, 0.2) == 0
    assert len(table) == 2
    assert table.key_for(0) == CLIENT_A and table.key_for(1) == CLIENT_B
    assert table.key_for(2) is None


def test_full_table_refuses_new_clients_but_serves_known_ones():
    table = FlowTable(2, 10.0)
    assert table.flow_for(CLIENT_A, 0.0) == 0
    assert table.flow_for(CLIENT_B, 0.0) == 1
    assert table.flow_for(CLIENT_C, 0.0) is None  # the caller counts a flow_limit drop
    assert table.flow_for(CLIENT_A, 0.0) == 0
    table.remove(0)
    assert table.flow_for(CLIENT_C, 0.0) == 0  # freed id handed out again, lowest first
    assert table.key_for(0) == CLIENT_C


def test_lowest_free_id_after_several_removals():
    table = FlowTable(8, 10.0)
    for i in range(6):
        table.flow_for(("10.0.0.1", i), 0.0)
    table.remove(4)
    table.remove(1)
    table.remove(3)
    assert [table.flow_for(("10.0.0.2", i), 0.0) for i in range(4)] == [1, 3, 4, 6]


def test_remove_unknown_flow_is_harmless():
    table = FlowTable(2, 10.0)
    table.remove(1)
    table.remove(200)
    assert table.flow_for(CLIENT_A, 0.0) == 0
    assert table.flow_for(CLIENT_B, 0.0) == 1
    assert table.flow_for(CLIENT_C, 0.0) is None


def test_explicit_ids_as_the_receiver_uses_them():
    """The receiver keys flows by the sender's flow id itself."""
    table = FlowTable(3, 10.0)
    assert table.flow_for(200, 0.0, flow=200) == 200
    assert table.flow_for(7, 0.0, flow=7) == 7
    assert table.flow_for(200, 1.0, flow=200) == 200
    assert table.flow_for(255, 0.0, flow=255) == 255
    assert table.flow_for(9, 0.0, flow=9) is None  # three flows already
    table.remove(7)
    assert table.flow_for(9, 0.0, flow=9) == 9
    assert table.flow_for("other", 0.0, flow=9) is None  # id taken by another key
    assert table.flow_for(256, 0.0, flow=MAX_FLOW_IDS) is None  # not a one-byte id
    assert table.flow_for(-1, 0.0, flow=-1) is None


def test_no_mix_of_explicit_and_automatic_ids_exceeds_the_bound():
    table = FlowTable(2, 10.0)
    assert table.flow_for("x", 0.0, flow=100) == 100
    assert table.flow_for("y", 0.0, flow=101) == 101
    assert table.flow_for("z", 0.0) is None
    assert len(table) == 2


def test_deadline_and_expiry_follow_the_least_recently_used_flow():
    table = FlowTable(4, 10.0)
    assert table.next_deadline() is None
    table.flow_for(CLIENT_A, 1.0)
    table.flow_for(CLIENT_B, 2.0)
    table.flow_for(CLIENT_C, 3.0)
    assert table.next_deadline() == 11.0
    table.touch(0, 4.0)  # A is busy again: B is now the oldest
    assert table.next_deadline() == 12.0
    assert table.expire(11.9) == []
    assert table.expire(12.0) == [(1, CLIENT_B)]  # idle exactly the timeout: gone
    assert table.next_deadline() == 13.0
    assert table.expire(100.0) == [(2, CLIENT_C), (0, CLIENT_A)]
    assert len(table) == 0 and table.next_deadline() is None
    assert table.flow_for(CLIENT_B, 100.0) == 0


def test_touch_of_unknown_flow_is_ignored():
    table = FlowTable(2, 5.0)
    table.flow_for(CLIENT_A, 0.0)
    table.touch(1, 3.0)
    assert table.next_deadline() == 5.0


def test_new_idle_timeout_applies_to_existing_flows():
    """A SIGHUP reload changes the timeout without touching the flows."""
    table = FlowTable(2, 100.0)
    table.flow_for(CLIENT_A, 0.0)
    table.idle_timeout = 5.0
    assert table.next_deadline() == 5.0
    assert table.expire(5.0) == [(0, CLIENT_A)]


# ------------------------------------------------------------------------------ model check

_ops = st.lists(
    st.one_of(
        st.tuples(st.just("open"), st.integers(0, 9), st.none()),
        st.tuples(st.just("open_id"), st.integers(0, 9), st.integers(-1, 257)),
        st.tuples(st.just("touch"), st.integers(0, 9), st.none()),
        st.tuples(st.just("remove"), st.integers(0, 9), st.none()),
        st.tuples(st.just("expire"), st.integers(0, 9), st.none()),
        st.tuples(st.just("wait"), st.integers(1, 5), st.none()),
    ),
    max_size=60,
)


@settings(max_examples=300, deadline=None)
@given(max_flows=st.integers(1, 6), explicit=st.booleans(), ops=_ops)
def test_matches_a_plain_model(max_flows, explicit, ops):
    """Documented behaviour, modelled with a dict: a key keeps its id while it is in the table;
    ids are unique and one byte; never more than max_flows entries; automatic ids are the lowest
    free ones; a flow idle for idle_timeout or longer expires, least recently used first."""
    idle = 3.0
    table = FlowTable(max_flows, idle)
    model: dict[object, tuple[int, float]] = {}  # key -> (flow, last used), least recent first
    now = 0.0
    for op, value, flow in ops:
        key = value
        if op == "open" and not explicit:
            got = table.flow_for(key, now)
            if key in model:
                assert got == model[key][0]
            elif len(model) >= max_flows:
                assert got is None
            else:
                used = {f for f, _ in model.values()}
                assert got == min(set(range(max_flows)) - used)
            if got is not None:
                model.pop(key, None)  # re-inserted: now the most recently used
                model[key] = (got, now)
        elif op == "open_id" and explicit:
            key = flow  # the receiver's use: the key is the id
            got = table.flow_for(key, now, flow=flow)
            if key in model:
                assert got == flow
            elif not 0 <= flow < MAX_FLOW_IDS or len(model) >= max_flows:
                assert got is None
            else:
                assert got == flow
            if got is not None:
                model.pop(key, None)
                model[key] = (got, now)
        elif op == "touch":
            table.touch(value, now)
            for k, (f, _) in list(model.items()):
                if f == value:
                    del model[k]
                    model[k] = (f, now)
        elif op == "remove":
            table.remove(value)
            model = {k: v for k, v in model.items() if v[0] != value}
        elif op == "expire":
            gone = table.expire(now)
            expected = [(f, k) for k, (f, t) in model.items() if t + idle <= now]  # least recent first
            assert gone == expected
            for _, k in gone:
                del model[k]
        elif op == "wait":
            now += value
        # Invariants after every step.
        assert len(table) == len(model) <= max_flows
        ids = [f for f, _ in model.values()]
        assert len(set(ids)) == len(ids)
        for k, (f, _) in model.items():
            assert table.key_for(f) == k
        deadline = table.next_deadline()
        if model:
            assert deadline == min(t for _, t in model.values()) + idle
        else:
            assert deadline is None
