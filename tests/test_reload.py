"""What a SIGHUP reload takes from a new config and what needs a restart (fecproxy.shell.settings)."""

from __future__ import annotations

import pytest

from fecproxy.config import parse_config_text
from fecproxy.shell.settings import RESTART_KEYS, ReloadRejected, keep_fixed, needs_restart, read_new_config

SENDER = """
role: sender
listen: 127.0.0.1:5000
link: {{bind: 127.0.0.1:0, peer: 127.0.0.1:6000}}
fec: {{block_size: {k}, repair: 4}}
"""


def test_reload_takes_tunables_and_keeps_what_needs_a_restart():
    running = parse_config_text(SENDER.format(k=16))
    new = parse_config_text(SENDER.format(k=8).replace("5000", "5001"))
    assert needs_restart(running, new) == ["listen"]
    kept = keep_fixed(running, new)
    assert kept.fec.block_size == 8
    assert all(getattr(kept, key) == getattr(running, key) for key in RESTART_KEYS)


def test_reload_reports_log_and_flow_table_size_as_needing_a_restart():
    """Logging is set up once and the flow table built at its size once: a reload says so, and
    the running config keeps showing what is in force."""
    running = parse_config_text(SENDER.format(k=16))
    new = parse_config_text(SENDER.format(k=16) + "log: {level: debug}\nflows: {max: 100, idle_timeout_s: 60}\n")
    assert needs_restart(running, new) == ["log", "flows.max"]
    kept = keep_fixed(running, new)
    assert kept.log == running.log and kept.flows.max == running.flows.max
    assert kept.flows.idle_timeout_s == 60  # applied


def test_reload_without_a_config_file_is_rejected_with_a_reason(tmp_path):
    with pytest.raises(ReloadRejected, match="without a config file"):
        read_new_config(None)
    with pytest.raises(ReloadRejected, match="cannot read"):
        read_new_config(tmp_path / "missing.yaml")


def test_reload_applies_flow_timeouts_and_protect_but_flows_max_needs_a_restart():
    from fecproxy.shell.settings import apply_flow_timeouts, flow_table

    flows = "flows: {{max: {max}, idle_timeout_s: {idle}, first_exchange_timeout_s: 10, protect_s: {protect}}}\n"
    running = parse_config_text(SENDER.format(k=16) + flows.format(max=100, idle=60, protect=2))
    new = parse_config_text(SENDER.format(k=16) + flows.format(max=200, idle=90, protect=0))
    assert needs_restart(running, new) == ["flows.max"]
    kept = keep_fixed(running, new)
    assert (kept.flows.max, kept.flows.idle_timeout_s, kept.flows.protect_s) == (100, 90, 0)
    table = flow_table(running)
    apply_flow_timeouts(table, kept)
    assert (table.max_flows, table.idle_timeout, table.first_exchange_timeout, table.protect) == (100, 90.0, 10.0, 0.0)
