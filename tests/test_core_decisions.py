"""The decisions the sans-IO cores make for the shell, each driven with a fake clock and no socket:
the peer's address learned and changed (protocol.decoder), a key check sent at most once per
interval, the peer's code settled, a loss report due, and adaptation up and down with hysteresis
(linkmodel.feedback).  The whole process pair over sockets is the second line
(tests/test_adaptation_pair.py, tests/test_operator_output.py)."""

from __future__ import annotations

from fecproxy.config import parse_config
from fecproxy.linkmodel.adaptation import DOWN, LOWER_AFTER_REPORTS, UP, Decision
from fecproxy.linkmodel.feedback import Feedback, ReportDue
from fecproxy.protocol import auth, keys, wire
from fecproxy.protocol.decoder import BlockDecoder, DecoderSettings
from fecproxy.protocol.encoder import BlockEncoder, EncoderSettings
from fecproxy.protocol.events import (
    ControlReceived,
    Dropped,
    KeyCheckDue,
    PeerAddressChanged,
    PeerCodeSettled,
)
from fecproxy.protocol.loss_report import LossReport, encode_report, parse_report
from fecproxy.shell.settings import configure_feedback, encoder_settings

HOME = ("127.0.0.1", 5000)
ROAMED = ("127.0.0.1", 5001)
STRANGER_ADDRESS = ("127.0.0.2", 6000)


def peer_events(events):
    return [e for e in events if isinstance(e, PeerAddressChanged)]


def packets_of(session, count, *, k=4, m=1):
    encoder = BlockEncoder(EncoderSettings(block_size=k, repair=m), session)
    return [p for i in range(count) for p in encoder.send(b"reading %d" % i, 1, 0.0)]


# ------------------------------------------------------------------ the peer's address


def test_the_peer_is_learned_from_the_first_valid_packet_and_follows_it_when_it_moves():
    decoder = BlockDecoder(learn_peer=True)
    link = packets_of(0x1111, 8)
    assert peer_events(decoder.receive(link[0], HOME, 1.0)) == [PeerAddressChanged(HOME, None)]
    assert decoder.peer == HOME
    assert peer_events(decoder.receive(link[1], HOME, 1.0)) == []  # known already: nothing to tell
    # The hill-top relay's address changed (a new lease): the next valid packet moves the peer.
    assert peer_events(decoder.receive(link[2], ROAMED, 1.1)) == [PeerAddressChanged(ROAMED, HOME)]
    assert decoder.peer == ROAMED


def test_a_strangers_packets_never_move_the_peer():
    decoder = BlockDecoder(learn_peer=True)
    link = packets_of(0x1111, 8)
    decoder.receive(link[0], HOME, 1.0)
    # Another session (made up, or the stranger's own): not the followed one.
    forged = wire.encode_source(0x0BADF00D, 0, 0, 1, b"forged")
    assert peer_events(decoder.receive(forged, STRANGER_ADDRESS, 1.0)) == []
    # A replay of one of the followed session's packets: a duplicate, dropped, moves nothing.
    events = decoder.receive(link[0], STRANGER_ADDRESS, 1.0)
    assert [e.reason for e in events if isinstance(e, Dropped)] == ["duplicate"] and peer_events(events) == []
    # A control packet teaches no address either.
    control = BlockEncoder(EncoderSettings(), 0x1111).control(b"\x02")
    assert peer_events(decoder.receive(control, STRANGER_ADDRESS, 1.0)) == []
    assert decoder.peer == HOME


def test_a_configured_peer_is_never_replaced():
    decoder = BlockDecoder(peer=HOME)
    for packet in packets_of(0x1111, 8):
        assert peer_events(decoder.receive(packet, ROAMED, 1.0)) == []
    assert decoder.peer == HOME


# ------------------------------------------------------------------ key check


OURS = keys.MasterKey(bytes.fromhex("11" * 32))
THEIRS = keys.MasterKey(bytes.fromhex("33" * 32))


def sealed_by(key, count, session=0x1234):
    sealer = auth.Sealer(auth.Keyring(key).current, 7)
    encoder = BlockEncoder(EncoderSettings(block_size=4, repair=1), session, sealer=sealer)
    return [p for i in range(count) for p in encoder.send(b"x%d" % i, 1, 0.0)]


def key_checks(events):
    return [e for e in events if isinstance(e, KeyCheckDue)]


def test_a_key_check_is_due_once_per_interval_while_the_peers_key_differs():
    decoder = BlockDecoder(DecoderSettings(), auth.Keyring(OURS), learn_peer=True)
    wrong = sealed_by(THEIRS, 40)
    checks = [key_checks(decoder.receive(packet, HOME, 1.0 + i * 0.01)) for i, packet in enumerate(wrong)]
    assert checks[0] == [KeyCheckDue(HOME)]  # no peer known yet: to the packet's source
    assert all(c == [] for c in checks[1:])  # at most one per interval (auth.FAILURE_LOG_INTERVAL_S)
    later = 1.0 + auth.FAILURE_LOG_INTERVAL_S
    assert key_checks(decoder.receive(wrong[0], HOME, later)) == [KeyCheckDue(HOME)]
    # Each noticed failure carries its log line; the ones in between carry none.
    events = decoder.receive(wrong[1], HOME, later + 1)
    assert [e.notice for e in events if isinstance(e, Dropped)] == [None]


def test_a_key_check_goes_to_the_known_peer_and_never_for_a_bad_tag():
    decoder = BlockDecoder(DecoderSettings(), auth.Keyring(OURS), peer=HOME)
    [check] = key_checks(decoder.receive(sealed_by(THEIRS, 1)[0], STRANGER_ADDRESS, 1.0))
    assert check.address == HOME  # a forged source is not where the answer goes
    tampered = bytearray(sealed_by(OURS, 1)[0])
    tampered[-1] ^= 1  # our key id, a tag that does not match: a forgery, not a key mismatch
    events = decoder.receive(bytes(tampered), STRANGER_ADDRESS, 1.0)
    assert [e.reason for e in events if isinstance(e, Dropped)] == ["auth"] and key_checks(events) == []


# ------------------------------------------------------------------ the peer's code


def test_the_peers_code_is_told_once_settled_and_again_when_it_changes():
    decoder = BlockDecoder()
    told = []
    for packet in packets_of(0x1111, 12, k=4, m=2):
        told += [e for e in decoder.receive(packet, HOME, 1.0) if isinstance(e, PeerCodeSettled)]
    assert [(e.k, e.m, e.first) for e in told] == [(4, 2, True)]  # settled when block 1's repair began
    assert told[0].configured == (4, 2)  # full blocks (END flag seen): the code as configured
    # The peer adapts: m = 3 from its block 3 on (same session, numbering goes on).
    encoder = BlockEncoder(EncoderSettings(block_size=4, repair=3), 0x1111, first_sbn=3)
    for packet in [p for i in range(8) for p in encoder.send(b"y%d" % i, 1, 0.0)]:
        told += [e for e in decoder.receive(packet, HOME, 1.1) if isinstance(e, PeerCodeSettled)]
    assert [(e.k, e.m, e.first) for e in told[1:]] == [(4, 3, False)]


# ------------------------------------------------------------------ reports and adaptation


def sender_config(adapt=True, interval_ms=1000):
    fec = {"block_size": 16, "repair": 4, "flush_ms": 50}
    if adapt:
        fec["adapt"] = {"target_residual": 1e-3}
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


def feedback(cfg, now=0.0):
    fb = Feedback(BlockEncoder(encoder_settings(cfg), 0x5E55), BlockDecoder())
    configure_feedback(fb, cfg, now)
    return fb


def test_a_loss_report_is_due_each_interval_once_a_peer_session_is_known():
    fb = feedback(sender_config(adapt=False, interval_ms=250))
    assert fb.next_deadline() == 0.25
    assert fb.on_timer(0.25) == []  # nothing decoded yet: nothing to report on
    for packet in packets_of(0xABCD, 4):
        fb.decoder.receive(packet, HOME, 0.3)
    assert fb.on_timer(0.4) == [] and fb.next_deadline() == 0.5  # not due before its time
    [due] = fb.on_timer(0.5)
    assert isinstance(due, ReportDue) and due.report.sequence == 1 and due.report.source_received == 4
    assert parse_report(due.packet[wire.COMMON_HEADER.size :]) == due.report
    assert fb.next_deadline() == 0.75
    # A loop held up for seconds sends one report, not a burst of catching up.
    assert len(fb.on_timer(3.0)) == 1 and fb.next_deadline() == 3.25


class PeerReports:
    """A receiver's cumulative counters, 1000 datagrams per interval, as loss reports."""

    def __init__(self) -> None:
        self.sequence = self.received = self.lost = 0

    def control(self, loss: float) -> ControlReceived:
        expected = 1000
        lost = round(loss * expected)
        self.sequence += 1
        self.received += expected - lost
        self.lost += lost
        report = LossReport(
            epoch=7,
            sequence=self.sequence,
            interval_ms=1000,
            source_received=self.received,
            repair_received=0,
            source_lost=self.lost,
            unrecovered=0,
        )
        return ControlReceived(0xABCD, encode_report(report))


def test_adaptation_raises_at_once_and_lowers_only_after_agreeing_reports():
    fb = feedback(sender_config())
    for i in range(32):  # two full blocks sent: the controller starts with the first report
        fb.encoder.send(bytes(100), 0, 0.001 * i)
    peer = PeerReports()
    now = 1.0
    assert fb.on_control(peer.control(0.01), now) == []  # the baseline
    now += 1
    [up] = fb.on_control(peer.control(0.10), now)  # 10 % lost before recovery
    assert isinstance(up, Decision) and up.direction == UP and fb.adapter.repair == up.choice.repair > 4
    raised = up.choice.repair
    for _ in range(LOWER_AFTER_REPORTS - 1):  # calm again, but not for long enough yet
        now += 1
        assert fb.on_control(peer.control(0.0), now) == [] and fb.adapter.repair == raised
    now += 1
    [down] = fb.on_control(peer.control(0.0), now)
    assert isinstance(down, Decision) and down.direction == DOWN and down.choice.repair < raised
    fb.encoder.close()
    assert fb.encoder.settings.repair == down.choice.repair  # the encoder takes it from its next block
