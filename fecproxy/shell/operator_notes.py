"""What a daemon tells its operator without being asked about datagrams it must drop, rate-limited.

Kept apart from the daemon so the daemon stays the mover of bytes; everything here reads counters
the cores and the link output keep, and logs.
"""

from __future__ import annotations

import logging
import math

from fecproxy.shell.logs import log_event

log = logging.getLogger("fecproxy.shell.daemon")

#: At most one ``oversize_datagram`` warning per 10 s: an application that sends too-long
#: datagrams all the time (iperf3's default length) is told a few times a minute, with the count
#: since the last line (common practice, no source).
OVERSIZE_WARN_INTERVAL_S = 10.0


class OversizeWarning:
    """Rate-limited warning for application datagrams above ``fec.max_datagram_bytes``."""

    def __init__(self) -> None:
        self._last: float | None = None
        self._count = 0
        self._largest = 0

    def note(self, count: int, largest: int, limit: int, now: float) -> None:
        """``count`` datagrams over ``limit`` bytes were dropped, the longest ``largest`` bytes."""
        self._count += count
        self._largest = max(self._largest, largest)
        if self._last is not None and now - self._last < OVERSIZE_WARN_INTERVAL_S:
            return
        log_event(
            log,
            logging.WARNING,
            "oversize_datagram",
            size=self._largest,
            limit=limit,
            dropped=self._count,
            key="fec.max_datagram_bytes",
            detail=f"application datagrams above {limit} bytes are dropped (counted as oversize); raise "
            "fec.max_datagram_bytes on both sides (fecproxy check says what fits link.mtu), or send shorter ones",
        )
        self._last, self._count, self._largest = now, 0, 0


def ratio_field(value: float) -> object:
    """A ratio for a log line: rounded, or "-" while unknown (NaN)."""
    return "-" if math.isnan(value) else round(value, 6)


__all__ = ["OVERSIZE_WARN_INTERVAL_S", "OversizeWarning", "ratio_field"]
