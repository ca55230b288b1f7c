"""The daemon's rate-limited warning about application datagrams above fec.max_datagram_bytes."""

from __future__ import annotations

import logging

from fecproxy.shell.operator_notes import OVERSIZE_WARN_INTERVAL_S, OversizeWarning


def test_oversize_is_warned_with_size_limit_and_key_at_most_once_per_interval(caplog):
    warning = OversizeWarning()
    with caplog.at_level(logging.WARNING, logger="fecproxy.shell.daemon"):
        warning.note(1, 1472, 1400, now=0.0)  # iperf3's default length over IPv4
        warning.note(3, 1500, 1400, now=1.0)  # within the interval: counted, not logged
        warning.note(1, 1450, 1400, now=OVERSIZE_WARN_INTERVAL_S + 0.5)
    lines = [record for record in caplog.records if record.getMessage() == "oversize_datagram"]
    assert len(lines) == 2
    first, second = (record.fields for record in lines)  # `fields`: set by log_event
    assert (first["size"], first["limit"], first["key"], first["dropped"]) == (1472, 1400, "fec.max_datagram_bytes", 1)
    assert (second["size"], second["dropped"]) == (1500, 4)  # the count and the longest since the last line
