"""The loss-report loop (fecproxy.linkmodel.feedback), sans-IO, driven with a fake clock: what a
report carries, which reports are taken, when the adaptation starts, and how its decisions reach
the encoder.  The whole pair over sockets is tests/test_adaptation_pair.py."""

from __future__ import annotations

import pytest

from fecproxy.config import parse_config
from fecproxy.linkmodel.adaptation import STALE_AFTER_INTERVALS, UP, Decision, ReportsResumed, ReportsStale
from fecproxy.linkmodel.feedback import OTHER_SESSION, Feedback, ReportDue
from fecproxy.linkmodel.impairment import ImpairedLink, LinkImpairment
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.protocol.decoder import BlockDecoder
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import BlockReport, ControlReceived, Dropped, DropReason
from fecproxy.protocol.loss_report import LossReport, encode_report, parse_report
from fecproxy.protocol.wire import COMMON_HEADER
from fecproxy.shell.settings import adapt_policy, configure_feedback, encoder_settings


def config(adapt=True, interval_ms=1000):
    fec = {"block_size": 16, "repair": 4, "flush_ms": 50}
    if adapt:
        fec["adapt"] = {}
    return parse_config(
        {
            "role": "sender",
            "listen": "127.0.0.1:0",
            "link": {"bind": "127.0.0.1:0", "peer": "127.0.0.1:9"},
            "fec": fec,
            "reports": {"interval_ms": interval_ms},
        },
        "test",
    )


def feedback(cfg, session=0x5E55):
    encoder = BlockEncoder(encoder_settings(cfg), session)
    decoder = BlockDecoder()
    fb = Feedback(encoder, decoder)
    configure_feedback(fb, cfg, now=0.0)
    return fb


def reports_due(events):
    """The packets of the reports due among ``events``."""
    return [e.packet for e in events if isinstance(e, ReportDue)]


def only_drop(events):
    [drop] = events
    assert isinstance(drop, Dropped)
    return drop


def report(sequence, received, lost, epoch=7):
    return LossReport(
        epoch=epoch,
        sequence=sequence,
        interval_ms=1000,
        source_received=received,
        repair_received=0,
        source_lost=lost,
        unrecovered=0,
    )


PEER = 0xABCD


def control(fb, body, session=PEER):
    return ControlReceived(session, body)


def follow_peer(fb):
    """The decoder follows the peer's session from one of its source packets."""
    fb.decoder.receive(BlockEncoder(EncoderSettings(block_size=4, repair=1), PEER).send(b"x", 0, 0.0)[0], None, 0.0)


def test_a_report_tells_the_decoder_counts_under_the_reported_session():
    fb = feedback(config(adapt=False, interval_ms=250))
    assert reports_due(fb.on_timer(0.25)) == []  # no sender session seen yet: nothing to report on
    peer = BlockEncoder(EncoderSettings(block_size=4, repair=1), 0xABCD)
    packets = [p for i in range(8) for p in peer.send(b"x%d" % i, 0, 0.0)]
    del packets[1]  # a source datagram lost, recovered from repair
    for packet in packets:
        events = fb.decoder.receive(packet, None, 0.3)
        for event in events:
            if isinstance(event, BlockReport):
                fb.on_block(event)
    for event in fb.decoder.on_timer(0.3 + 2 * fb.decoder.settings.hold_time):  # the loss settles
        if isinstance(event, BlockReport):
            fb.on_block(event)
    [packet] = reports_due(fb.on_timer(0.5))
    header = COMMON_HEADER.unpack_from(packet)
    assert header[2] == fb.encoder.session  # a packet of ours, like all we send
    sent = parse_report(packet[COMMON_HEADER.size :])
    stats = fb.decoder.stats
    assert (sent.sequence, sent.interval_ms, sent.source_received, sent.repair_received) == (1, 250, 7, 2)
    assert (
        (sent.source_lost, sent.unrecovered) == (stats.lost, stats.unrecovered) == (1, 0)
    )  # RFC 6363 §6: before / after
    assert sent.highest_sbn == 1 and sent.estimate_samples == 8 and sent.loss_estimate == pytest.approx(1 / 8, abs=1e-4)
    assert reports_due(fb.on_timer(0.6)) == []  # next one at 0.75
    [again] = reports_due(fb.on_timer(0.75))
    assert parse_report(again[COMMON_HEADER.size :]).sequence == 2 and fb.stats.sent == 2


def test_reports_on_another_session_are_ignored_and_bad_bodies_dropped():
    fb = feedback(config())
    assert fb.on_control(control(fb, encode_report(report(1, 100, 0)), session=0x1234), 0.1) == []
    assert fb.stats.received == 1  # no peer session followed yet (a one-way sender): taken
    follow_peer(fb)
    assert fb.on_control(control(fb, encode_report(report(2, 100, 0)), session=0x1234), 0.1) == []
    assert fb.ignored() == {OTHER_SESSION: 1} and fb.stats.received == 1
    drop = only_drop(fb.on_control(control(fb, b"\x01" + bytes(10)), 0.1))
    assert drop.reason == DropReason.MALFORMED
    drop = only_drop(fb.on_control(control(fb, b"\x09" + bytes(55)), 0.1))
    assert drop.reason == DropReason.UNSUPPORTED
    assert fb.on_control(control(fb, encode_report(report(3, 100, 0))), 0.1) == []
    assert fb.stats.received == 2


def test_a_side_that_sends_nothing_adapts_nothing_and_is_never_stale():
    fb = feedback(config())
    assert fb.adapting and fb.adapter is None
    assert fb.encoder.settings.repair == 4  # fec.repair, within [min_repair, max_repair]
    for second in range(1, 20):
        fb.on_timer(float(second))
    assert fb.adapter is None and not fb.stale


def test_stale_once_after_five_intervals_without_reports_then_resumed():
    fb = feedback(config())
    fb.encoder.send(b"hello", 0, 0.5)
    events = fb.on_timer(1.0)  # the first tick after sending starts the controller
    assert fb.adapter is not None and fb.adapter.next_deadline() == 1.0 + STALE_AFTER_INTERVALS
    for second in range(2, 12):
        events += fb.on_timer(float(second))
    assert fb.stale and fb.encoder.settings.repair == 4
    assert [type(e) for e in events if not isinstance(e, ReportDue)] == [ReportsStale]
    events = fb.on_control(control(fb, encode_report(report(1, 100, 0))), 12.0)
    assert not fb.stale and isinstance(events[-1], ReportsResumed)


def test_a_decision_reaches_the_encoder_from_its_next_block():
    fb = feedback(config())
    for i in range(20):  # one full block and an open one
        fb.encoder.send(bytes(100), 0, 0.001 * i)
    events = fb.on_control(control(fb, encode_report(report(1, 0, 0))), 1.0)  # the baseline
    events += fb.on_control(control(fb, encode_report(report(2, 900, 100))), 2.0)  # 10 % lost before recovery
    [decision] = [e for e in events if isinstance(e, Decision)]
    assert decision.direction == UP and decision.choice.repair > 4
    assert fb.decisions() == {(UP, decision.reason): 1}
    assert fb.encoder.settings.repair == 4  # the open block keeps its shape ...
    fb.encoder.close()
    assert fb.encoder.settings.repair == decision.choice.repair  # ... the next one has the new m


def test_no_policy_without_reports_or_adapt():
    assert adapt_policy(config(adapt=False)) is None
    policy = adapt_policy(config())
    assert (policy.block_size, policy.max_repair, policy.report_interval, policy.flush_interval) == (16, 16, 1.0, 0.05)


def test_a_link_can_change_its_impairment_while_running():
    link = ImpairedLink(LinkImpairment(), seed=1)
    for i in range(10):
        link.submit(b"a", i)
    link.reconfigure(LinkImpairment(loss=GilbertElliott.bernoulli(1.0)))  # the path is cut
    for i in range(10):
        link.submit(b"b", 10 + i)
    assert link.due(100.0) == [b"a"] * 10
    stats = link.stats()
    assert (stats.submitted, stats.lost) == (20, 10)
