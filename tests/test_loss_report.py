"""Loss-report bodies (control packets): hex vectors (our own format, documented in docs/design.md
"Loss reports (control packets)"), round trips and strict validation."""

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.stats import binom

from fecproxy.protocol import wire
from fecproxy.protocol.loss_report import (
    BODY_BYTES,
    LossReport,
    ReportError,
    UnsupportedReport,
    burst_to_fixed,
    encode_report,
    loss_to_fixed,
    parse_report,
)

# Our own format; docs/design.md lists the same bytes.  Loss 0.012 → round(0.012 × 65536) = 786 =
# 0x0312; burst 1.5 → 1.5 × 256 = 384 = 0x0180.
FULL_REPORT = LossReport(
    epoch=0x01020304,
    sequence=7,
    interval_ms=1000,
    source_received=1000,
    repair_received=250,
    source_lost=12,
    unrecovered=1,
    loss_estimate=786 / 65536,
    mean_burst=1.5,
    estimate_samples=1012,
    highest_sbn=0x000102,
)
FULL_VECTOR = bytes.fromhex(
    "01 03 03e8 01020304 00000007"
    " 00000000000003e8 00000000000000fa 000000000000000c 0000000000000001"
    " 0312 0180 000003f4 000102 00"
)
# A receiver that has seen nothing yet: no estimate, no block.
EMPTY_REPORT = LossReport(
    epoch=0xFFFFFFFF, sequence=1, interval_ms=250, source_received=0, repair_received=0, source_lost=0, unrecovered=0
)
EMPTY_VECTOR = bytes.fromhex("01 00 00fa ffffffff 00000001" + "00" * 32 + "0000 0000 00000000 000000 00")


def test_vectors_encode_and_parse():
    assert len(FULL_VECTOR) == BODY_BYTES == 56
    assert encode_report(FULL_REPORT) == FULL_VECTOR
    assert parse_report(FULL_VECTOR) == FULL_REPORT
    assert encode_report(EMPTY_REPORT) == EMPTY_VECTOR
    assert parse_report(EMPTY_VECTOR) == EMPTY_REPORT


def test_vector_figures():
    report = parse_report(FULL_VECTOR)
    assert report.packets_seen == 1250 and report.source_expected == 1012
    assert report.loss_estimate == pytest.approx(0.012, abs=1 / 65536)


def test_loss_fixed_point_is_finer_than_rtcp_fraction_lost():
    # RFC 3550 §6.4.1: "fraction lost" is lost/expected as an 8-bit fixed-point number (× 256),
    # so 1.2 % and 1.4 % loss both read 3/256 ...
    assert int(0.012 * 256) == int(0.014 * 256) == 3

    # ... yet they need different codes: with k = 16 and a 10^-6 target, m = 4 and m = 5 (residual
    # p·P[Binomial(n−1, p) ≥ m]; scipy.stats.binom as outside oracle).
    def least_m(p):
        return next(m for m in range(17) if p * binom.sf(m - 1, 16 + m - 1, p) <= 1e-6)

    assert (least_m(0.012), least_m(0.014)) == (4, 5)
    assert loss_to_fixed(0.012) != loss_to_fixed(0.014)
    assert loss_to_fixed(0.0) == 0 and loss_to_fixed(1.0) == 0xFFFF  # saturates


def test_burst_saturates_and_infinite_burst_reads_back_unbounded():
    assert burst_to_fixed(0.0) == 0 and burst_to_fixed(1.0) == 256 and burst_to_fixed(300.0) == 0xFFFF
    body = encode_report(
        LossReport(1, 2, 1000, 10, 0, 5, 5, loss_estimate=0.5, mean_burst=math.inf, estimate_samples=10)
    )
    assert parse_report(body).mean_burst == math.inf
    with pytest.raises(ValueError):
        burst_to_fixed(0.5)  # a mean run of lost packets is at least one packet


@pytest.mark.parametrize(
    "report, fragment",
    [
        (LossReport(1, 1, 1000, -1, 0, 0, 0), "source_received"),
        (LossReport(1, 1, 1000, 0, 0, 1 << 64, 0), "64 bits"),
        (LossReport(1, 1, 1000, 0, 0, 1, 2), "unrecovered 2 exceeds"),
        (LossReport(1 << 32, 1, 1000, 0, 0, 0, 0), "32 bits"),
        (LossReport(1, 1, 0, 0, 0, 0, 0), "interval_ms"),
        (LossReport(1, 1, 70_000, 0, 0, 0, 0), "interval_ms"),
        (LossReport(1, 1, 1000, 0, 0, 0, 0, highest_sbn=1 << 24), "24 bits"),
        (LossReport(1, 1, 1000, 0, 0, 0, 0, loss_estimate=1.5, mean_burst=1.0), "loss estimate"),
        (LossReport(1, 1, 1000, 0, 0, 0, 0, loss_estimate=math.nan, mean_burst=1.0), "loss estimate"),
    ],
)
def test_encode_refuses_what_the_format_cannot_carry(report, fragment):
    with pytest.raises(ValueError, match=fragment):
        encode_report(report)


def _patched(offset: int, hex_bytes: str) -> bytes:
    data = bytearray(FULL_VECTOR)
    patch = bytes.fromhex(hex_bytes)
    data[offset : offset + len(patch)] = patch
    return bytes(data)


@pytest.mark.parametrize(
    "body, fragment",
    [
        (b"", "empty body"),
        (FULL_VECTOR[:-1], "55 bytes; expected exactly 56"),
        (FULL_VECTOR + b"\x00", "57 bytes"),
        (_patched(2, "0000"), "interval 0 ms"),
        (_patched(36, "000000000000000d"), "13 unrecovered but only 12 lost"),
        (_patched(55, "01"), "reserved byte 0x01"),
        (_patched(1, "02"), "highest SBN 258 but no HIGHEST_SBN flag"),
        (_patched(46, "0080"), "mean burst 0.5 < 1 packet"),
        (_patched(46, "0000"), "a loss estimate but no burst"),
        (_patched(1, "01"), "estimate fields set but no ESTIMATE flag"),
    ],
)
def test_malformed_bodies_raise_typed_errors(body, fragment):
    with pytest.raises(ReportError, match=fragment) as caught:
        parse_report(body)
    assert caught.value.reason == "malformed"
    assert isinstance(caught.value, wire.PacketError)  # the shell's drop handling counts it


@pytest.mark.parametrize("body, fragment", [(_patched(0, "02"), "kind 2"), (_patched(1, "07"), "flags 0x07")])
def test_unknown_kind_or_flag_is_unsupported(body, fragment):
    with pytest.raises(UnsupportedReport, match=fragment) as caught:
        parse_report(body)
    assert caught.value.reason == "unsupported"


_counter = st.integers(0, (1 << 64) - 1)


@st.composite
def reports(draw):
    lost = draw(_counter)
    with_estimate = draw(st.booleans())
    loss = draw(st.integers(0, 0xFFFF)) / 65536 if with_estimate else None
    burst = None
    if with_estimate:
        # 0 = no burst seen (only possible with no loss); otherwise at least one packet.
        burst = draw(st.integers(256, 0xFFFE) if loss else st.just(0) | st.integers(256, 0xFFFE)) / 256
    return LossReport(
        epoch=draw(st.integers(0, (1 << 32) - 1)),
        sequence=draw(st.integers(0, (1 << 32) - 1)),
        interval_ms=draw(st.integers(1, 0xFFFF)),
        source_received=draw(_counter),
        repair_received=draw(_counter),
        source_lost=lost,
        unrecovered=draw(st.integers(0, lost)),
        loss_estimate=loss,
        mean_burst=burst,
        estimate_samples=draw(st.integers(0, (1 << 32) - 1)) if with_estimate else 0,
        highest_sbn=draw(st.none() | st.integers(0, (1 << 24) - 1)),
    )


@given(reports())
def test_round_trip(report):
    assert parse_report(encode_report(report)) == report


@given(st.binary(min_size=0, max_size=80))
def test_arbitrary_bytes_parse_or_raise_a_packet_error(body):
    try:
        report = parse_report(body)
    except wire.PacketError:
        return
    assert parse_report(encode_report(report)) == report
