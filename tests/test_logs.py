"""Log lines: one structured event per line, the event field written by logs.log_event only."""

from __future__ import annotations

import logging
from io import StringIO
from pathlib import Path

from fecproxy.shell import logs, udp


def test_udp_log_lines_are_structured_events():
    stream = StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(logs.KeyValueFormatter())
    udp.log.addHandler(handler)
    try:
        logs.log_event(udp.log, logging.ERROR, "gso_unavailable", error="[Errno 5] EIO", fallback="sendto")
    finally:
        udp.log.removeHandler(handler)
    line = stream.getvalue().strip()
    assert " event=gso_unavailable " in line and "event=event=" not in line
    assert line.endswith('error="[Errno 5] EIO" fallback=sendto')


def test_no_shell_module_writes_its_own_event_field():
    """Every shell log line goes through logs.log_event, which writes event= itself."""
    shell = Path(udp.__file__).parent
    for path in shell.glob("*.py"):
        assert "event=" not in path.read_text(encoding="utf-8").replace("event={", ""), path.name
