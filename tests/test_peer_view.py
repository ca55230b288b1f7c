"""The far end seen from this side: silence and the peer's reported loss, sans-IO (fake clock)."""

from __future__ import annotations

import math

from fecproxy.protocol.loss_report import LossReport
from fecproxy.protocol.peer_view import (
    MIN_SOURCE_SAMPLES,
    SILENT_AFTER_INTERVALS,
    PeerHeard,
    PeerSilent,
    PeerView,
    silent_after_for,
)


def report(seq: int, received: int, lost: int, unrecovered: int, epoch: int = 7) -> LossReport:
    return LossReport(
        epoch=epoch,
        sequence=seq,
        interval_ms=1000,
        source_received=received,
        repair_received=0,
        source_lost=lost,
        unrecovered=unrecovered,
    )


def test_a_peer_never_heard_is_waiting_not_silent():
    view = PeerView(silent_after_for(1.0))
    assert view.next_deadline() is None and view.on_timer(100.0) == []
    assert math.isnan(view.seconds_since_heard(100.0))


def test_silence_within_three_report_intervals_and_cleared_by_the_next_packet():
    interval = 1.0
    view = PeerView(silent_after_for(interval))
    view.heard(0.0)
    assert view.next_deadline() is None  # no report yet: the peer may not be reporting at all
    for t in range(10):  # a report a second
        view.on_report(report(t + 1, 100 * t, 0, 0))
        assert view.heard(float(t)) == []
    stopped = 9.0
    deadline = view.next_deadline()
    assert deadline is not None and stopped < deadline <= stopped + 3 * interval
    assert view.on_timer(deadline - 0.01) == []
    (event,) = view.on_timer(deadline)
    assert isinstance(event, PeerSilent) and event.last_heard_at == stopped
    assert view.silent and view.next_deadline() is None and view.on_timer(deadline + 5) == []
    assert view.seconds_since_heard(20.0) == 11.0
    (back,) = view.heard(20.0)
    assert isinstance(back, PeerHeard) and back.silent_for == 11.0 and not view.silent


def test_one_lost_report_does_not_make_the_peer_silent():
    view = PeerView(silent_after_for(1.0))
    view.on_report(report(1, 0, 0, 0))
    view.heard(0.0)
    assert SILENT_AFTER_INTERVALS > 2  # two intervals: one report missing, the next one on time
    assert view.on_timer(2.0) == []


def test_the_peers_loss_before_and_after_recovery_from_report_differences():
    view = PeerView(2.5)
    view.on_report(report(1, 1000, 10, 0))  # the baseline: totals since the peer started
    assert math.isnan(view.peer_loss()[0])
    view.on_report(report(2, 1000 + 190, 10 + 10, 1))  # 200 expected, 10 lost, 1 unrecovered
    before, after = view.peer_loss()
    assert before == 10 / 200 and after == 1 / 200
    view.on_report(report(2, 5000, 50, 5))  # a duplicate sequence: ignored
    assert view.peer_loss() == (before, after)
    view.on_report(report(1, 10, 0, 0, epoch=8))  # the peer restarted: a new baseline
    assert math.isnan(view.peer_loss()[0])


def test_loss_needs_enough_samples():
    view = PeerView(2.5)
    view.on_report(report(1, 0, 0, 0))
    view.on_report(report(2, MIN_SOURCE_SAMPLES // 2, 0, 0))
    assert math.isnan(view.peer_loss()[0])
    view.on_report(report(3, MIN_SOURCE_SAMPLES, 0, 0))
    assert view.peer_loss() == (0.0, 0.0)
