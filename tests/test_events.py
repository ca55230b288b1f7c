"""The protocol core's vocabulary: drop reasons and block outcomes are enums whose strings are
the exported metric labels, and every event shares one base class."""

from fecproxy.protocol import wire
from fecproxy.protocol.events import (
    BlockOutcome,
    BlockReport,
    Delivery,
    Dropped,
    DropReason,
    Event,
    SessionStarted,
    direct_delivery,
)


def test_label_strings_stay_exactly_as_exported():
    # The Prometheus label values of fecproxy_packets_dropped{reason} and
    # fecproxy_blocks_received{outcome}: alert rules and dashboards depend on them.
    assert [reason.value for reason in DropReason] == [
        "malformed",
        "unsupported",
        "oversize",
        "stale",
        "late",
        "duplicate",
        "inconsistent",
        "flow_limit",
        "unknown_flow",
        "no_peer",
        "unreachable",
        "no_socket",
        "internal_error",
        "auth",
        "replay",
        "session_limit",
        "memory_limit",
        "decode_limit",
        "order_late",
        "unproven",
    ]
    assert [outcome.value for outcome in BlockOutcome] == ["complete", "recovered", "expired", "evicted", "superseded"]
    assert DropReason.LATE == "late" and f"{DropReason.LATE}" == "late"


def test_packet_errors_name_their_reason_from_the_enum():
    for error in (
        wire.PacketError,
        wire.TruncatedPacket,
        wire.InvalidField,
        wire.UnsupportedPacket,
        wire.OversizePacket,
    ):
        assert isinstance(error.reason, DropReason)


def test_events_share_a_base_and_have_no_instance_dict():
    events = [
        Delivery(1, b"x"),
        BlockReport(0, 4, BlockOutcome.COMPLETE, 0, 0, 0, 0b1111, 4),
        Dropped(DropReason.LATE, "source packet for finished block 0"),
        SessionStarted(7, None),
    ]
    for event in events:
        assert isinstance(event, Event) and not hasattr(event, "__dict__")


def test_the_fast_delivery_equals_the_ordinary_one():
    assert direct_delivery(3, b"wind 4.2") == Delivery(3, b"wind 4.2")
