"""The daemon's history (fecproxy.shell.history): a bounded ring of samples and events, fed by
log_event through a context variable, handed out by /status.json.  Pure: fake clocks, no sockets."""

from __future__ import annotations

import json
import logging
import math

import trio

from fecproxy.shell import history as history_module
from fecproxy.shell.history import MAX_EVENT_FIELDS, MAX_FIELD_CHARS, History
from fecproxy.shell.logs import event_sink, log_event
from fecproxy.shell.status import history_query, status_app

log = logging.getLogger("fecproxy.test.history")


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def _history(**kwargs) -> tuple[History, Clock]:
    clock = Clock()
    return History(clock=clock, wall=lambda: 1_700_000_000.0 + clock.now, **kwargs), clock


def test_the_sample_ring_keeps_the_span_and_drops_the_oldest():
    history, clock = _history(interval_s=1.0, span_s=10.0)
    for i in range(30):
        clock.now += 1.0
        history.sample({"fecproxy_flows": float(i), "fecproxy_unrelated_total": 1.0})
    rows = history.rows()
    assert len(rows) == 11  # span / interval, plus the first
    assert history.series == ("fecproxy_flows",)  # only the sampled families
    assert [row[1] for row in rows] == [float(i) for i in range(19, 30)]
    assert rows[-1][0] == 30.0  # uptime of the newest


def test_series_are_fixed_at_the_first_sample_and_missing_values_are_none():
    history, clock = _history()
    history.sample({'fecproxy_packets_dropped_total{reason="late"}': 1.0, "fecproxy_flows": 2.0})
    clock.now += 1
    history.sample({"fecproxy_flows": 3.0, 'fecproxy_packets_dropped_total{reason="new"}': 9.0})
    assert history.series == ("fecproxy_flows", 'fecproxy_packets_dropped_total{reason="late"}')
    assert history.rows()[-1][1:] == [3.0, None]


def test_events_keep_the_last_ones_in_order_with_sequence_numbers():
    history, clock = _history(max_events=5)
    for i in range(12):
        clock.now += 1
        history.record(logging.INFO, "reloaded", {"n": i})
    events = history.events()
    assert [e["fields"]["n"] for e in events] == [7, 8, 9, 10, 11]
    assert [e["seq"] for e in events] == [8, 9, 10, 11, 12]
    assert [e["fields"]["n"] for e in history.events(since=10)] == [10, 11]
    assert events[0]["level"] == "info" and events[0]["ts"].endswith("Z")


def test_debug_lines_and_the_periodic_stats_line_are_not_events():
    history, _ = _history()
    history.record(logging.DEBUG, "dropped", {})
    history.record(logging.INFO, "stats", {})
    assert history.events() == [] and history.recorded == 0


def test_an_event_is_bounded_whatever_its_fields():
    history, _ = _history()
    history.record(logging.WARNING, "auth_failed", {f"f{i}": "x" * 10_000 for i in range(100)} | {"nan": math.nan})
    (event,) = history.events()
    assert len(event["fields"]) == MAX_EVENT_FIELDS
    assert all(len(value) <= MAX_FIELD_CHARS for value in event["fields"].values())
    json.dumps(event, allow_nan=False)


def test_log_event_records_into_the_current_sink_only_at_info_and_above():
    history, _ = _history()
    token = event_sink.set(history.record)
    try:
        log_event(log, logging.DEBUG, "flow_opened", flow="01")
        log_event(log, logging.INFO, "peer_session", session="0a")
        log_event(log, logging.WARNING, "auth_failed", kind="bad_tag")
    finally:
        event_sink.reset(token)
    log_event(log, logging.WARNING, "auth_failed", kind="outside")  # no daemon: kept nowhere
    assert [e["event"] for e in history.events()] == ["peer_session", "auth_failed"]


async def test_each_daemon_task_tree_keeps_its_own_events():
    first, _ = _history()
    second, _ = _history()

    async def daemon(history: History, name: str) -> None:
        event_sink.set(history.record)

        async def child() -> None:
            await trio.sleep(0)
            log_event(log, logging.INFO, "reloaded", who=name)

        async with trio.open_nursery() as nursery:
            nursery.start_soon(child)

    async with trio.open_nursery() as nursery:
        nursery.start_soon(daemon, first, "first")
        nursery.start_soon(daemon, second, "second")
    assert [e["fields"]["who"] for e in first.events()] == ["first"]
    assert [e["fields"]["who"] for e in second.events()] == ["second"]


def test_a_silent_peer_and_its_return_are_events():
    history, clock = _history()
    token = event_sink.set(history.record)
    try:
        received = 0.0
        for second in range(40):
            clock.now += 1
            if not 10 <= second < 25:  # 15 s of silence from the peer
                received += 100
            history.sample({'fecproxy_link_packets_received_total{kind="source"}': received})
    finally:
        event_sink.reset(token)
    names = [(e["event"], e["fields"]) for e in history.events()]
    assert [name for name, _ in names] == ["peer_silent", "peer_heard"]
    assert names[0][1]["quiet_s"] == history_module.PEER_SILENT_MIN_S
    assert names[1][1]["silent_s"] == 16.0  # from the last sample that rose to the first that rose again


def test_a_slow_peer_is_not_silent_between_its_packets():
    history, clock = _history()
    token = event_sink.set(history.record)
    try:
        received = 0.0
        for second in range(120):
            clock.now += 1
            if second % 8 == 0:  # one packet every 8 s: a sparse telemetry link
                received += 1
            history.sample({'fecproxy_link_packets_received_total{kind="source"}': received})
    finally:
        event_sink.reset(token)
    assert history.events() == []


def test_an_idle_application_is_not_a_silent_peer_while_its_reports_come():
    """The applications stop sending; the peer's loss reports go on once a second: it is alive."""
    history, clock = _history()
    token = event_sink.set(history.record)
    try:
        received = reports = 0.0
        for second in range(40):
            clock.now += 1
            if second < 10:
                received += 100
            reports += 1
            history.sample(
                {
                    'fecproxy_link_packets_received_total{kind="source"}': received,
                    "fecproxy_reports_received_total": reports,
                }
            )
    finally:
        event_sink.reset(token)
    assert history.events() == []


def test_status_json_hands_out_history_only_when_asked():
    from prometheus_client import CollectorRegistry, make_wsgi_app

    history, clock = _history()
    history.sample({"fecproxy_flows": 1.0})
    history.record(logging.INFO, "reloaded", {})
    history.record(logging.INFO, "adapted", {"m": 6})
    registry = CollectorRegistry(auto_describe=False)
    app = status_app(registry, make_wsgi_app(registry), history=history)

    def get(query: str) -> dict:
        body = app({"PATH_INFO": "/status.json", "REQUEST_METHOD": "GET", "QUERY_STRING": query}, lambda *a: None)
        return json.loads(b"".join(body))["history"]

    plain = get("")
    assert plain["events_recorded"] == 2 and "samples" not in plain and "events" not in plain
    full = get("history=1")
    assert full["series"] == ["fecproxy_flows"] and len(full["samples"]) == 1 and len(full["events"]) == 2
    assert [e["event"] for e in get("events_since=1")["events"]] == ["adapted"]
    assert history_query("events_since=nonsense") == (False, 0)


def test_the_history_stands_down_when_the_daemon_judges_silence_itself():
    history, clock = _history()
    token = event_sink.set(history.record)
    try:
        log_event(log, logging.WARNING, "peer_silent", silent_after_s=2.5)  # the daemon's own
        received = 0.0
        for second in range(40):
            clock.now += 1
            if not 10 <= second < 25:
                received += 100
            history.sample({'fecproxy_link_packets_received_total{kind="source"}': received})
    finally:
        event_sink.reset(token)
    assert [e["event"] for e in history.events()] == ["peer_silent"]  # none of its own beside it


def test_the_history_samples_the_daemons_own_families_not_the_process_collector():
    """The process collector lists /proc/self/fd (slow with thousands of flow sockets): scrapes
    get it, the once-a-second history does not."""
    from support.stand_in_view import a_receiver

    from fecproxy.shell.metrics import build_registry, own_families
    from fecproxy.shell.status import read_samples

    registry, histogram = build_registry(a_receiver())
    histogram.observe(0.01)
    own, _ = read_samples(own_families(registry))
    everything, _ = read_samples(registry)
    assert not any(key.startswith(("process_", "python_")) for key in own)
    assert any(key.startswith("process_") for key in everything)
    assert {key for key in everything if key.startswith("fecproxy_")} == set(own)
