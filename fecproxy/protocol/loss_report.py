"""The body of a loss report: what a receiver tells its sender about the link, as bytes.

A loss report travels as a control packet (type 2): the 10-byte common header of
:mod:`fecproxy.protocol.wire`, then this body.  All integers big-endian; 56 bytes::

     0                   1                   2                   3
     0 1 2 3 4 5 6 7 8 9 0 1 2 3 4 5 6 7 8 9 0 1 2 3 4 5 6 7 8 9 0 1
    +---------------+---------------+-------------------------------+
    |  kind (= 1)   |     flags     |      interval (ms, 16 bits)   |   0
    +---------------+---------------+-------------------------------+
    |                     epoch (32 bits)                           |   4
    +---------------------------------------------------------------+
    |                     sequence (32 bits)                        |   8
    +---------------------------------------------------------------+
    |               source packets received (64 bits)               |  12
    |               repair packets received (64 bits)               |  20
    |          source datagrams lost before recovery (64 bits)      |  28
    |          source datagrams unrecovered after (64 bits)         |  36
    +-------------------------------+-------------------------------+
    |   loss estimate (0.16 fixed)  |  mean burst (8.8 fixed)       |  44
    +-------------------------------+-------------------------------+
    |                  estimate samples (32 bits)                   |  48
    +-----------------------------------------------+---------------+
    |             highest SBN seen (24 bits)        |  reserved (0) |  52
    +-----------------------------------------------+---------------+

Why cumulative counters rather than deltas: a lost report then loses nothing — the next one
carries the totals, and the sender takes the difference to the last report it *accepted*.  The
sequence number orders reports within an epoch (a reordered or duplicated report is recognised and
ignored instead of rolling the totals back); the epoch is drawn at random when the receiver starts
reporting, so its restart — counters back at zero — is recognised as a new baseline.  64-bit
counters never wrap in practice (10^6 packets/s for 580 000 years).

RFC 6363 §6: the figures a sender bases its repair rate on are the ones *before* recovery
(``source_lost``); ``unrecovered`` (after recovery) is there for operators.

The loss estimate is 16-bit fixed point, value = round(loss × 65536), saturating at 65535.
RFC 3550 §6.4.1 carries its "fraction lost" as lost/expected × 256 in 8 bits; a step of 1/256 =
0.39 % is too coarse here: 1.2 % and 1.4 % loss both read 3/256, yet for k = 16 and a 10^-6
target they need m = 4 and m = 5 (i.i.d. residual loss, tests/test_loss_report.py); a step of
1/65536 = 0.0015 % tells them apart.  The mean burst (packets per run of
consecutive losses, ≥ 1 when defined) is 8.8 fixed point, value = round(burst × 256), saturating at
0xFFFF (≥ 255.996 packets, i.e. longer than any block of n ≤ 255: RFC 5510 §8.2), which also
stands for an unbounded burst; 0 = no burst seen.  Both are the receiver's own online estimate
(``fecproxy.linkmodel.estimator``), valid only when flag ESTIMATE is set.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass

from fecproxy.protocol.wire import SBN_MODULUS, PacketError, UnsupportedPacket

#: The body's first byte: which control message this is.  Other kinds are "unsupported".
KIND_LOSS_REPORT = 1
#: A key check: no content.  A keyed daemon whose packets from the peer fail with a key the peer
#: does not share (or with encryption on one side only) sends one, sealed with its own key, at most
#: once per log interval, so the peer fails on it too and says so in its own log: a pair with
#: mismatched keys then reports it in both logs even though no loss report can flow.  A peer
#: whose key does match verifies it and ignores it.
KIND_KEY_CHECK = 2
KEY_CHECK_BODY = bytes([KIND_KEY_CHECK])

FLAG_HIGHEST_SBN = 0x01  # the receiver has seen a block: ``highest_sbn`` is meaningful
FLAG_ESTIMATE = 0x02  # the receiver has an estimate: loss, burst and samples are meaningful
_KNOWN_FLAGS = FLAG_HIGHEST_SBN | FLAG_ESTIMATE

#: kind, flags, interval_ms, epoch, sequence, 4 counters, loss, burst, samples, SBN << 8 | reserved
BODY = struct.Struct(">BBHIIQQQQHHII")
BODY_BYTES = BODY.size  # 56

#: 2^16: RFC 3550 §6.4.1 uses 2^8 (see the module docstring for why 16 bits).
LOSS_SCALE = 1 << 16
LOSS_MAX_RAW = 0xFFFF
#: 8.8 fixed point for the mean burst.
BURST_SCALE = 1 << 8
BURST_MAX_RAW = 0xFFFF
COUNTER_MAX = (1 << 64) - 1
FIELD32_MAX = (1 << 32) - 1
#: The report period fits its 16-bit field; config keeps reports.interval_ms within it.
MAX_INTERVAL_MS = 0xFFFF


class ReportError(PacketError):
    """A loss-report body that fails validation; its ``reason`` is the drop-counter label, "malformed"."""


class UnsupportedReport(UnsupportedPacket):
    """A control message kind or flag this build does not speak (a newer peer)."""


@dataclass(frozen=True, slots=True)
class LossReport:
    """One report, as the receiver measured it.  Counters are cumulative within ``epoch``."""

    epoch: int
    sequence: int
    interval_ms: int
    source_received: int
    repair_received: int
    source_lost: int  # before recovery (RFC 6363 §6: the figure for rate decisions)
    unrecovered: int  # after recovery
    loss_estimate: float | None = None  # receiver's online loss, None = no estimate yet
    mean_burst: float | None = None  # receiver's online mean burst (packets), 0 = none seen
    estimate_samples: int = 0
    highest_sbn: int | None = None

    @property
    def packets_seen(self) -> int:
        return self.source_received + self.repair_received

    @property
    def source_expected(self) -> int:
        """Source datagrams the receiver knows were sent: arrived directly or lost on the link."""
        return self.source_received + self.source_lost


def loss_to_fixed(loss: float) -> int:
    if not 0.0 <= loss <= 1.0:  # also rejects NaN
        raise ValueError(f"loss estimate must be in [0, 1], got {loss!r}")
    return min(LOSS_MAX_RAW, round(loss * LOSS_SCALE))


def burst_to_fixed(burst: float) -> int:
    """8.8 fixed point; inf (one burst still going on) and anything ≥ 256 saturate."""
    if math.isnan(burst) or burst < 0.0 or 0.0 < burst < 1.0:
        raise ValueError(f"mean burst must be 0 (none) or ≥ 1 packet, got {burst!r}")
    if math.isinf(burst):
        return BURST_MAX_RAW
    return min(BURST_MAX_RAW, round(burst * BURST_SCALE))


def encode_report(report: LossReport) -> bytes:
    """The 56-byte body; raises ValueError for values the format cannot carry."""
    for name in ("source_received", "repair_received", "source_lost", "unrecovered"):
        value = getattr(report, name)
        if not 0 <= value <= COUNTER_MAX:
            raise ValueError(f"{name} {value} does not fit 64 bits")
    if report.unrecovered > report.source_lost:
        raise ValueError(f"unrecovered {report.unrecovered} exceeds lost before recovery {report.source_lost}")
    if not (0 <= report.epoch <= FIELD32_MAX and 0 <= report.sequence <= FIELD32_MAX):
        raise ValueError("epoch and sequence must fit 32 bits")
    if not 1 <= report.interval_ms <= MAX_INTERVAL_MS:
        raise ValueError(f"interval_ms must be 1..{MAX_INTERVAL_MS}, got {report.interval_ms}")
    flags = 0
    loss_raw = burst_raw = samples = 0
    if report.loss_estimate is not None:
        flags |= FLAG_ESTIMATE
        loss_raw = loss_to_fixed(report.loss_estimate)
        burst_raw = burst_to_fixed(report.mean_burst if report.mean_burst is not None else 0.0)
        samples = min(report.estimate_samples, FIELD32_MAX)  # saturates: "at least this many"
    sbn = 0
    if report.highest_sbn is not None:
        if not 0 <= report.highest_sbn < SBN_MODULUS:
            raise ValueError(f"highest_sbn {report.highest_sbn} does not fit 24 bits")
        flags |= FLAG_HIGHEST_SBN
        sbn = report.highest_sbn
    return BODY.pack(
        KIND_LOSS_REPORT,
        flags,
        report.interval_ms,
        report.epoch,
        report.sequence,
        report.source_received,
        report.repair_received,
        report.source_lost,
        report.unrecovered,
        loss_raw,
        burst_raw,
        samples,
        sbn << 8,
    )


def parse_report(body: bytes) -> LossReport:
    """Check every field, then return the report; raise a ReportError (or UnsupportedReport)."""
    size = len(body)
    if size < 1:
        raise ReportError("control packet with an empty body")
    if body[0] != KIND_LOSS_REPORT:
        raise UnsupportedReport(f"control message kind {body[0]} is not defined")
    if size != BODY_BYTES:
        raise ReportError(f"loss report of {size} bytes; expected exactly {BODY_BYTES}")
    (
        _,
        flags,
        interval_ms,
        epoch,
        sequence,
        received,
        repaired,
        lost,
        unrecovered,
        loss_raw,
        burst_raw,
        samples,
        sbn_reserved,
    ) = BODY.unpack(body)
    if flags & ~_KNOWN_FLAGS:
        raise UnsupportedReport(f"loss report flags 0x{flags:02x} set bits this version does not define")
    if interval_ms == 0:
        raise ReportError("loss report with interval 0 ms")
    if unrecovered > lost:
        raise ReportError(f"loss report with {unrecovered} unrecovered but only {lost} lost before recovery")
    if sbn_reserved & 0xFF:
        raise ReportError(f"loss report with reserved byte 0x{sbn_reserved & 0xFF:02x}; expected 0")
    highest_sbn = sbn_reserved >> 8
    if not flags & FLAG_HIGHEST_SBN:
        if highest_sbn:
            raise ReportError(f"loss report with highest SBN {highest_sbn} but no HIGHEST_SBN flag")
        highest_sbn = None
    if flags & FLAG_ESTIMATE:
        if 0 < burst_raw < BURST_SCALE:
            raise ReportError(f"loss report with mean burst {burst_raw / BURST_SCALE:g} < 1 packet")
        if loss_raw and not burst_raw:
            raise ReportError("loss report with a loss estimate but no burst")
        loss: float | None = loss_raw / LOSS_SCALE
        burst: float | None = math.inf if burst_raw == BURST_MAX_RAW else burst_raw / BURST_SCALE
    else:
        if loss_raw or burst_raw or samples:
            raise ReportError("loss report with estimate fields set but no ESTIMATE flag")
        loss = burst = None
    return LossReport(
        epoch=epoch,
        sequence=sequence,
        interval_ms=interval_ms,
        source_received=received,
        repair_received=repaired,
        source_lost=lost,
        unrecovered=unrecovered,
        loss_estimate=loss,
        mean_burst=burst,
        estimate_samples=samples,
        highest_sbn=highest_sbn,
    )
