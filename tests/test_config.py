"""The YAML config: every fault reported with file, key path, value and expectation; valid
configs become frozen typed objects whose effective settings round-trip."""

from __future__ import annotations

import copy
import dataclasses
import math
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy import config as cfg
from fecproxy.config import (
    Address,
    ConfigError,
    ConfigUnreadable,
    FecSection,
    Role,
    load_config,
    parse_config,
    parse_config_text,
)
from fecproxy.protocol.repair_rule import ShortBlockRepair

EXAMPLES = Path(__file__).resolve().parents[1] / "config"

SENDER: dict[Any, Any] = {
    "role": "sender",
    "listen": "127.0.0.1:5000",
    "link": {"bind": "127.0.0.1:7001", "peer": "127.0.0.1:7000"},
}
RECEIVER = {
    "role": "receiver",
    "forward": "127.0.0.1:6000",
    "link": {"bind": "127.0.0.1:7000"},
}
DELETE = object()
#: A document whose top level has a key YAML reads as an integer.
NON_STRING_KEY = {**SENDER, 7: "x"}


def edited(base: dict, **changes) -> dict:
    """A deep copy of base with dotted-path keys (given with __ for .) set, or removed by DELETE."""
    document = copy.deepcopy(base)
    for dotted, value in changes.items():
        *sections, key = dotted.split("__")
        node = document
        for section in sections:
            node = node.setdefault(section, {})
        if value is DELETE:
            node.pop(key, None)
        else:
            node[key] = value
    return document


def errors_of(document, source="test.yaml") -> list[str]:
    with pytest.raises(ConfigError) as caught:
        parse_config(document, source)
    return list(caught.value.messages)


# ---------------------------------------------------------------- valid configs and defaults


def test_minimal_sender_gets_every_default():
    config = parse_config(SENDER, "s.yaml")
    assert config.role is Role.SENDER
    assert config.listen == Address("127.0.0.1", 5000)
    assert config.forward is None
    assert config.link.peer == Address("127.0.0.1", 7000)
    assert config.fec == FecSection()
    assert (config.fec.block_size, config.fec.repair, config.fec.flush_ms) == (16, 4, 20)
    assert config.fec.max_datagram_bytes == 1400
    assert config.fec.short_block_repair is ShortBlockRepair.PROPORTIONAL
    assert config.fec.allow_repair_above_source is False
    assert (config.decoder.hold_ms, config.decoder.max_open_blocks) == (500, 256)
    assert (config.flows.max, config.flows.idle_timeout_s) == (4096, 120)
    assert (config.flows.first_exchange_timeout_s, config.flows.protect_s) == (30, 2)
    assert config.sockets.receive_buffer_bytes == config.sockets.send_buffer_bytes == 4 * 1024 * 1024
    assert (config.log.level, config.log.format) == ("info", "text")
    assert not config.metrics.enabled and config.metrics.listen is None


def test_minimal_receiver_learns_its_peer():
    config = parse_config(RECEIVER, "r.yaml")
    assert config.role is Role.RECEIVER
    assert config.link.peer is None
    assert config.forward == Address("127.0.0.1", 6000)


def test_config_is_frozen() -> None:
    config = parse_config(SENDER)
    with pytest.raises(dataclasses.FrozenInstanceError):
        config.role = Role.RECEIVER  # type: ignore[misc]  # frozen: the very assignment under test
    with pytest.raises(dataclasses.FrozenInstanceError):
        config.fec.block_size = 3  # type: ignore[misc]  # frozen: the very assignment under test


@pytest.mark.parametrize("name", ["sender.yaml", "receiver.yaml"])
def test_example_files_are_valid(name):
    config = load_config(EXAMPLES / name)
    assert config.role == name.removesuffix(".yaml")
    assert parse_config(config.effective()) == config


def test_null_sections_and_optional_keys_mean_not_set():
    # "metrics:" with its only line commented out reads as null: metrics disabled, not an error.
    config = parse_config_text(
        "role: receiver\nforward: 127.0.0.1:6000\nlink:\n  bind: 127.0.0.1:7000\n  peer:\nmetrics:\n"
    )
    assert config.link.peer is None and not config.metrics.enabled


def test_defaults_agree_with_the_cores():
    """The config's defaults are the encoder's and decoder's own, so `check` shows what runs."""
    from fecproxy.protocol.decoder import DecoderSettings
    from fecproxy.protocol.encoder import EncoderSettings

    fec, decoder = FecSection(), cfg.DecoderSection()
    encoder_defaults = EncoderSettings()
    assert (fec.block_size, fec.repair, fec.flush_seconds, fec.max_datagram_bytes) == (
        encoder_defaults.block_size,
        encoder_defaults.repair,
        encoder_defaults.flush_interval,
        encoder_defaults.max_datagram,
    )
    assert fec.short_block_repair == encoder_defaults.short_block_repair
    assert (decoder.hold_seconds, decoder.max_open_blocks) == (
        DecoderSettings().hold_time,
        DecoderSettings().max_open_blocks,
    )


# ---------------------------------------------------------------- limits from published sources


def test_default_datagram_fits_an_ethernet_frame_with_tag_room():
    # RFC 894: Ethernet MTU 1500; RFC 791: IPv4 header ≥ 20 bytes; RFC 768: UDP header 8 bytes.
    ip_udp = 20 + 8
    repair_packet = 12 + 5 + cfg.DEFAULT_MAX_DATAGRAM_BYTES + cfg.AUTH_TAG_RESERVE_BYTES
    assert repair_packet + ip_udp <= 1500
    # HMAC-SHA-256 output is 32 bytes (RFC 6234 §1: SHA-256 digest is 256 bits).
    assert cfg.AUTH_TAG_RESERVE_BYTES == 256 // 8


def test_largest_datagram_keeps_a_repair_packet_inside_one_udp_datagram():
    # RFC 791: total length is 16 bits (65535) including the 20-byte header; RFC 768: 8-byte header.
    assert cfg.MAX_UDP_PAYLOAD_BYTES == 65535 - 20 - 8
    # Wire version 3: 12-byte repair header, 7-byte symbol prefix, 32 bytes kept for a tag.
    assert cfg.MAX_DATAGRAM_BYTES_LIMIT == 65507 - 12 - 7 - 32
    parse_config(edited(SENDER, fec__max_datagram_bytes=65456))
    assert "65457 is out of range" in errors_of(edited(SENDER, fec__max_datagram_bytes=65457))[0]


def test_block_limits_follow_rfc_5510():
    # RFC 5510 §8.2: n = k + m ≤ 255 for GF(2^8).
    parse_config(edited(SENDER, fec__block_size=255, fec__repair=0))
    parse_config(edited(SENDER, fec__block_size=128, fec__repair=127))
    [message] = errors_of(edited(SENDER, fec__block_size=128, fec__repair=128))
    assert "fec.repair: 128 is too large with fec.block_size 128" in message
    assert "block_size + repair ≤ 255" in message


def test_repair_rate_rule_follows_rfc_6363():
    # RFC 6363 §8.2: the repair flow rate stays at or below the source flow rate, so m ≤ k ...
    parse_config(edited(SENDER, fec__block_size=4, fec__repair=4))
    [message] = errors_of(edited(SENDER, fec__block_size=4, fec__repair=5))
    assert "fec.repair: 5 is above fec.block_size 4" in message
    assert "allow_repair_above_source: true" in message
    # ... unless the operator says so explicitly.
    config = parse_config(edited(SENDER, fec__block_size=4, fec__repair=5, fec__allow_repair_above_source=True))
    assert config.fec.repair == 5


def test_flow_limit_is_half_the_16_bit_slot_space():
    assert cfg.MAX_FLOWS_LIMIT == 2**15
    assert parse_config(edited(SENDER, flows__max=32768)).flows.max == 32768
    [message] = errors_of(edited(SENDER, flows__max=32769))
    assert "flows.max: 32769 is out of range; expected an integer 1..32768 (half the 16-bit flow slot space)" in message


def test_flow_timeouts_and_protection_are_independent_keys():
    """0 protection is allowed (always evict, never refuse); the first-exchange timeout may equal
    idle_timeout_s."""
    config = parse_config(
        edited(SENDER, flows__idle_timeout_s=600, flows__first_exchange_timeout_s=600, flows__protect_s=0)
    )
    assert (config.flows.idle_timeout_s, config.flows.first_exchange_timeout_s, config.flows.protect_s) == (600, 600, 0)


def test_first_exchange_timeout_above_idle_timeout_is_refused():
    """README: first_exchange_timeout_s is "at most idle_timeout_s"; check must not let it through."""
    [message] = errors_of(edited(SENDER, flows__idle_timeout_s=1, flows__first_exchange_timeout_s=600))
    assert (
        "flows.first_exchange_timeout_s: 600 is above flows.idle_timeout_s 1; expected at most idle_timeout_s"
        in message
    )


def test_socket_buffer_limit_cannot_overflow_the_doubled_int():
    # socket(7): Linux doubles the SO_RCVBUF/SO_SNDBUF value, which is a C int.
    assert 2 * cfg.MAX_SOCKET_BUFFER_BYTES <= 2**31 - 1
    assert parse_config(edited(SENDER, sockets__receive_buffer_bytes=0)).sockets.receive_buffer_bytes == 0


# ---------------------------------------------------------------- the table of bad configs

BAD_CONFIGS = [
    # (id, document, fragments that must all appear in one message)
    (
        "block_size too big",
        edited(SENDER, fec__block_size=300),
        ["test.yaml: fec.block_size: 300 is out of range; expected an integer 1..255 with block_size + repair ≤ 255"],
    ),
    ("block_size zero", edited(SENDER, fec__block_size=0), ["fec.block_size: 0 is out of range"]),
    ("repair negative", edited(SENDER, fec__repair=-1), ["fec.repair: -1 is out of range", "0..254"]),
    (
        "bool is not an int",
        edited(SENDER, fec__block_size=True),
        ["fec.block_size: true is a boolean; expected an integer"],
    ),
    (
        "string is not an int",
        edited(SENDER, fec__flush_ms="20"),
        ['fec.flush_ms: "20" is a string; expected an integer number of milliseconds 1..60000'],
    ),
    ("float is not an int", edited(SENDER, fec__flush_ms=20.0), ["fec.flush_ms: 20.0 is a floating-point number"]),
    ("flush zero", edited(SENDER, fec__flush_ms=0), ["fec.flush_ms: 0 is out of range"]),
    ("flush a minute and more", edited(SENDER, fec__flush_ms=60001), ["fec.flush_ms: 60001 is out of range"]),
    ("null value for a default key", edited(SENDER, fec__repair=None), ["fec.repair: has no value (null)"]),
    (
        "k + m above 255",
        edited(SENDER, fec__block_size=200, fec__repair=100, fec__allow_repair_above_source=True),
        ["fec.repair: 100 is too large", "≤ 255", "repair ≤ 55"],
    ),
    ("m above k", edited(SENDER, fec__block_size=2, fec__repair=3), ["fec.repair: 3 is above fec.block_size 2"]),
    (
        "allow flag not a bool",
        edited(SENDER, fec__allow_repair_above_source="yes please"),
        ['fec.allow_repair_above_source: "yes please" is a string; expected true or false'],
    ),
    (
        "short-block rule typo",
        edited(SENDER, fec__short_block_repair="proportion"),
        [
            'fec.short_block_repair: "proportion" is not a valid short-block rule; expected proportional or full',
            "did you mean proportional?",
        ],
    ),
    (
        "unknown key in a section",
        edited(SENDER, fec__blocksize=16),
        ["test.yaml: fec.blocksize: unknown key; did you mean fec.block_size?"],
    ),
    (
        "unknown key, wrong case",
        edited(SENDER, fec__Flush_MS=16),
        ["fec.Flush_MS: unknown key; did you mean fec.flush_ms?"],
    ),
    (
        "section key at the top",
        edited(SENDER, block_size=16),
        ["block_size: unknown key; did you mean fec.block_size?"],
    ),
    ("unknown top key", edited(SENDER, roll="sender"), ["roll: unknown key; did you mean role?"]),
    (
        "unknown key, nothing close",
        edited(SENDER, log__zzz=1),
        ["log.zzz: unknown key; valid keys here are level, format"],
    ),
    ("non-string key", NON_STRING_KEY, ["7: unknown key"]),
    ("section not a mapping", edited(SENDER, fec=16), ["fec: 16 is an integer; expected a mapping of fec settings"]),
    ("role missing", edited(SENDER, role=DELETE), ["role: missing; expected sender or receiver"]),
    ("role wrong", edited(SENDER, role="relay"), ['role: "relay" is not a valid role; expected sender or receiver']),
    ("role wrong case", edited(SENDER, role="Sender"), ["did you mean sender?"]),
    ("sender without listen", edited(SENDER, listen=DELETE), ["listen: missing; a sender needs"]),
    ("sender without peer", edited(SENDER, link__peer=DELETE), ["link.peer: missing; a sender needs"]),
    (
        "sender with forward",
        edited(SENDER, forward="127.0.0.1:6000"),
        ['forward: "127.0.0.1:6000" is set but role is sender', "remove it"],
    ),
    ("receiver without forward", edited(RECEIVER, forward=DELETE), ["forward: missing; a receiver needs"]),
    ("receiver with listen", edited(RECEIVER, listen="127.0.0.1:5000"), ["listen: ", "is set but role is receiver"]),
    ("link missing", edited(SENDER, link=DELETE), ["link.bind: missing; expected HOST:PORT"]),
    ("bind missing", edited(SENDER, link__bind=DELETE), ["link.bind: missing"]),
    ("address without port", edited(SENDER, link__peer="192.0.2.10"), ['link.peer: "192.0.2.10" has no port']),
    (
        "address port too big",
        edited(SENDER, listen="127.0.0.1:65536"),
        ["listen:", "has port 65536, out of range 0..65535"],
    ),
    ("peer port zero", edited(SENDER, link__peer="127.0.0.1:0"), ["link.peer:", "has port 0, out of range 1..65535"]),
    ("forward port zero", edited(RECEIVER, forward="127.0.0.1:0"), ["forward:", "out of range 1..65535"]),
    ("port not a number", edited(SENDER, listen="127.0.0.1:http"), ['has port "http", which is not a number']),
    ("bad IPv4", edited(SENDER, link__peer="192.0.2.300:7000"), ["has 192.0.2.300, which is not a valid IPv4 address"]),
    (
        "IPv6 without brackets",
        edited(SENDER, link__peer="2001:db8::1:7000"),
        ["without brackets; write it as [2001:db8::1]:7000"],
    ),
    ("bad IPv6 in brackets", edited(SENDER, link__peer="[2001:db8::zz]:7000"), ["which is not an IPv6 address"]),
    (
        "bad hostname",
        edited(SENDER, link__peer="relay_1.example:7000"),
        ['has "relay_1.example", which is neither an IP address nor a valid host name'],
    ),
    (
        "huge value is clipped",
        edited(SENDER, link__peer="[" + "f" * 10_000 + "]:1"),
        ["…], which is not an IPv6 address"],
    ),
    ("address not a string", edited(SENDER, listen=5000), ["listen: 5000 is an integer; expected HOST:PORT"]),
    ("unspecified destination", edited(SENDER, link__peer="0.0.0.0:7000"), ["unspecified host 0.0.0.0"]),
    (
        "listen and bind on one port",
        edited(SENDER, listen="0.0.0.0:7001"),
        ['listen: "0.0.0.0:7001" uses the same UDP port as link.bind "127.0.0.1:7001"'],
    ),
    ("peer is ourselves", edited(SENDER, link__peer="127.0.0.1:7001"), ["link.peer:", "is this proxy's own link.bind"]),
    (
        "forward is ourselves",
        edited(RECEIVER, link__bind="0.0.0.0:6000"),
        ["forward:", "is this proxy's own link.bind"],
    ),
    ("metrics listen bad", edited(SENDER, metrics__listen="localhost"), ['metrics.listen: "localhost" has no port']),
    ("hold zero", edited(SENDER, decoder__hold_ms=0), ["decoder.hold_ms: 0 is out of range"]),
    ("open blocks zero", edited(SENDER, decoder__max_open_blocks=0), ["decoder.max_open_blocks: 0 is out of range"]),
    ("flows zero", edited(SENDER, flows__max=0), ["flows.max: 0 is out of range", "half the 16-bit flow slot space"]),
    (
        "first exchange zero",
        edited(SENDER, flows__first_exchange_timeout_s=0),
        ["flows.first_exchange_timeout_s: 0 is out of range; expected an integer number of seconds 1..86400"],
    ),
    (
        "protect negative",
        edited(SENDER, flows__protect_s=-1),
        ["flows.protect_s: -1 is out of range; expected an integer number of seconds 0..86400 (0 = never refuse)"],
    ),
    ("protect fraction", edited(SENDER, flows__protect_s=1.5), ["flows.protect_s: 1.5 is a"]),
    (
        "first exchange misspelt",
        edited(SENDER, flows__first_exchange_timeout=30),
        ["flows.first_exchange_timeout: unknown key; did you mean flows.first_exchange_timeout_s?"],
    ),
    ("idle timeout huge", edited(SENDER, flows__idle_timeout_s=86401), ["flows.idle_timeout_s: 86401 is out of range"]),
    (
        "buffer negative",
        edited(SENDER, sockets__send_buffer_bytes=-1),
        ["sockets.send_buffer_bytes: -1 is out of range"],
    ),
    ("buffer with unit", edited(SENDER, sockets__receive_buffer_bytes="4MiB"), ['"4MiB" is a string']),
    (
        "log level",
        edited(SENDER, log__level="verbose"),
        ['log.level: "verbose" is not a valid log level; expected debug, info, warning or error'],
    ),
    (
        "log format",
        edited(SENDER, log__format="xml"),
        ['log.format: "xml" is not a valid log format; expected text or json'],
    ),
    ("long value is shortened", edited(SENDER, log__level="x" * 500), ["…"]),
    ("list where a scalar goes", edited(SENDER, fec__repair=[1, 2]), ["fec.repair: […] is a list"]),
    (
        "adapt not a mapping",
        edited(SENDER, fec__adapt=True),
        ["fec.adapt: true is a boolean; expected a mapping of fec.adapt settings"],
    ),
    (
        "adapt unknown key",
        edited(SENDER, fec__adapt={"target_residal": 0.01}),
        ["fec.adapt.target_residal: unknown key; did you mean target_residual?"],
    ),
    (
        "adapt target zero",
        edited(SENDER, fec__adapt={"target_residual": 0}),
        ["fec.adapt.target_residual: 0 is out of range; expected a number 0 < x < 1"],
    ),
    (
        "adapt target one",
        edited(SENDER, fec__adapt={"target_residual": 1.0}),
        ["fec.adapt.target_residual: 1.0 is out of range"],
    ),
    (
        "adapt target as YAML 1.1 text",
        edited(SENDER, fec__adapt={"target_residual": "1e-3"}),
        ['fec.adapt.target_residual: "1e-3" is a string', "write 0.001 or 1.0e-3"],
    ),
    (
        "adapt target NaN",
        edited(SENDER, fec__adapt={"target_residual": math.nan}),
        ["fec.adapt.target_residual: ", "out of range"],
    ),
    (
        "adapt min above max",
        edited(SENDER, fec__adapt={"min_repair": 5, "max_repair": 3}),
        ["fec.adapt.min_repair: 5 is above fec.adapt.max_repair 3; expected min_repair ≤ max_repair"],
    ),
    (
        "adapt k + max_repair above 255",
        edited(SENDER, fec__block_size=200, fec__adapt={"max_repair": 60}),
        ["fec.adapt.max_repair: 60 is too large with fec.block_size 200", "RFC 5510 §8.2", "max_repair ≤ 55"],
    ),
    (
        "adapt overhead above source rate",
        edited(SENDER, fec__adapt={"max_overhead": 1.5}),
        ["fec.adapt.max_overhead: 1.5 is above 1", "RFC 6363 §8.2", "fec.allow_repair_above_source: true"],
    ),
    (
        "adapt overhead zero",
        edited(SENDER, fec__adapt={"max_overhead": 0}),
        ["fec.adapt.max_overhead: 0 is out of range"],
    ),
    (
        "adapt min_repair beyond the overhead cap",
        edited(SENDER, fec__block_size=8, fec__adapt={"min_repair": 3, "max_overhead": 0.25}),
        [
            "fec.adapt.min_repair: 3 is above the 2 repair packets that fec.adapt.max_overhead 0.25 allows with "
            "fec.block_size 8"
        ],
    ),
    ("adapt null key", edited(SENDER, fec__adapt={"min_repair": None}), ["fec.adapt.min_repair: has no value (null)"]),
    (
        "adapt without reports",
        edited(SENDER, fec__adapt={}, reports__interval_ms=0),
        ["fec.adapt: is set but reports.interval_ms is 0", "adaptation needs loss reports"],
    ),
    (
        "report interval negative",
        edited(SENDER, reports__interval_ms=-1),
        ["reports.interval_ms: -1 is out of range", "0 = no reports"],
    ),
    (
        "report interval above a minute",
        edited(RECEIVER, reports__interval_ms=60_001),
        ["reports.interval_ms: 60001 is out of range"],
    ),
]


@pytest.mark.parametrize(
    "document, fragments", [case[1:] for case in BAD_CONFIGS], ids=[case[0] for case in BAD_CONFIGS]
)
def test_bad_config_is_reported(document, fragments):
    messages = errors_of(document)
    assert any(all(fragment in message for fragment in fragments) for message in messages), messages
    assert all(message.startswith("test.yaml: ") for message in messages)


def test_adapt_section_defaults_and_values():
    assert parse_config(SENDER).fec.adapt is None  # absent = m stays fixed
    config = parse_config(edited(SENDER, fec__adapt={}))
    assert config.fec.adapt == cfg.AdaptSection()
    adapt = cfg.AdaptSection()
    assert (adapt.target_residual, adapt.min_repair, adapt.max_repair, adapt.max_overhead) == (1e-3, 1, None, 1.0)
    # Without max_repair the ceiling is what max_overhead and n ≤ 255 (RFC 5510 §8.2) allow.
    assert adapt.repair_ceiling(16) == 16 and adapt.repair_ceiling(200) == 55
    assert cfg.AdaptSection(max_overhead=0.25).repair_ceiling(10) == 2
    assert cfg.AdaptSection(max_repair=3).repair_ceiling(16) == 3
    config = parse_config(
        edited(
            SENDER,
            fec__adapt={"target_residual": 1.0e-4, "min_repair": 0, "max_repair": 8, "max_overhead": 1},
            reports__interval_ms=250,
        )
    )
    assert config.fec.adapt == cfg.AdaptSection(target_residual=1e-4, min_repair=0, max_repair=8, max_overhead=1.0)
    assert config.reports.interval_ms == 250 and config.reports.enabled
    assert parse_config(config.effective()) == config
    # Above the source rate only when the operator says so (RFC 6363 §8.2).
    allowed = edited(SENDER, fec__allow_repair_above_source=True, fec__adapt={"max_overhead": 2})
    assert parse_config(allowed).fec.adapt.max_overhead == 2.0
    assert not parse_config(edited(RECEIVER, reports__interval_ms=0)).reports.enabled


def test_adapt_faults_are_each_reported_under_their_own_path():
    messages = errors_of(edited(SENDER, fec__adapt={"target_residual": 2, "min_repair": -1, "bogus": 1}))
    paths = sorted(message.split(": ")[1] for message in messages)
    assert paths == ["fec.adapt.bogus", "fec.adapt.min_repair", "fec.adapt.target_residual"], messages


def test_report_interval_fits_the_report_field():
    from fecproxy.protocol.loss_report import MAX_INTERVAL_MS

    assert cfg.MAX_REPORT_INTERVAL_MS <= MAX_INTERVAL_MS


def test_every_fault_is_reported_at_once():
    document = edited(
        SENDER,
        role="receiver",  # then listen is forbidden and forward missing
        fec__block_size=0,
        fec__repiar=1,
        log__level="loud",
        metrics__listen="nowhere",
    )
    messages = errors_of(document)
    for path in ("listen:", "forward:", "fec.block_size:", "fec.repiar:", "log.level:", "metrics.listen:"):
        assert any(message.startswith(f"test.yaml: {path}") for message in messages), (path, messages)
    assert len(messages) == 6


def test_config_error_carries_the_list():
    error = ConfigError(["a: one", "b: two"])
    assert error.messages == ("a: one", "b: two")
    assert str(error) == "a: one\nb: two"
    assert isinstance(error, ValueError)


@pytest.mark.parametrize(
    "document, fragment",
    [
        (None, "the document is empty"),
        ([1, 2], "the document is a list; expected a mapping"),
        ("role: sender", "the document is a string; expected a mapping"),
        (42, "the document is an integer"),
    ],
)
def test_document_must_be_a_mapping(document, fragment):
    [message] = errors_of(document)
    assert message.startswith("test.yaml: ") and fragment in message


# ---------------------------------------------------------------- YAML text and files


def write(tmp_path: Path, text: str | bytes, name: str = "c.yaml") -> Path:
    path = tmp_path / name
    path.write_bytes(text.encode() if isinstance(text, str) else text)
    return path


def test_yaml_syntax_error_has_line_and_column(tmp_path):
    path = write(tmp_path, "role: sender\nlink:\n  bind: 127.0.0.1:7000\n   peer: 127.0.0.1:7001\n")
    with pytest.raises(ConfigError) as caught:
        load_config(path)
    [message] = caught.value.messages
    assert message.startswith(f"{path}: line 4, column 8: YAML syntax error: ")


def test_unclosed_quote_is_a_syntax_error():
    with pytest.raises(ConfigError, match=r"line \d+, column \d+: YAML syntax error"):
        parse_config_text('role: "sender\n')


def test_duplicate_keys_are_reported_with_the_others():
    # PyYAML would silently keep the last value; a config must not.
    text = (
        "role: sender\nrole: receiver\nforward: 127.0.0.1:6000\nlink:\n  bind: 127.0.0.1:7000\n  bind: 127.0.0.1:7002\n"
    )
    with pytest.raises(ConfigError) as caught:
        parse_config_text(text, "d.yaml")
    messages = caught.value.messages
    assert "d.yaml: line 2, column 1: role: duplicate key; expected each key once" in messages
    assert "d.yaml: line 6, column 3: bind: duplicate key; expected each key once" in messages


def test_several_documents_are_rejected():
    with pytest.raises(ConfigError, match="YAML syntax error"):
        parse_config_text("role: sender\n---\nrole: receiver\n")


def test_yaml_booleans_as_keys_are_named_readably():
    # YAML 1.1 (PyYAML) reads an unquoted `on:` key as the boolean true.
    with pytest.raises(ConfigError, match=r"<text>: true: unknown key"):
        parse_config_text("role: sender\non: 1\n")


def test_empty_file(tmp_path):
    with pytest.raises(ConfigError, match="the document is empty"):
        load_config(write(tmp_path, ""))


def test_missing_file_is_unreadable(tmp_path):
    with pytest.raises(ConfigUnreadable, match="cannot read the file: No such file or directory"):
        load_config(tmp_path / "absent.yaml")


def test_directory_is_unreadable(tmp_path):
    with pytest.raises(ConfigUnreadable, match="cannot read the file"):
        load_config(tmp_path)


def test_huge_file_is_refused(tmp_path):
    path = write(tmp_path, b"#" * (cfg.MAX_CONFIG_FILE_BYTES + 1))
    with pytest.raises(ConfigUnreadable, match="larger than"):
        load_config(path)


def test_non_utf8_file(tmp_path):
    with pytest.raises(ConfigError, match="byte 6 is not UTF-8"):
        load_config(write(tmp_path, b"role: \xff\n"))


def test_utf8_bom_is_accepted(tmp_path):
    text = yaml.safe_dump(SENDER)
    assert load_config(write(tmp_path, "\ufeff" + text)).role is Role.SENDER


def test_deep_nesting_does_not_crash():
    with pytest.raises(ConfigError):
        parse_config_text("[" * 50_000)


# ---------------------------------------------------------------- effective settings round trip


def test_effective_has_every_key_in_yaml_nesting():
    effective = parse_config(SENDER).effective()
    assert list(effective) == [
        "role",
        "listen",
        "forward",
        "link",
        "fec",
        "decoder",
        "delivery",
        "flows",
        "sockets",
        "log",
        "metrics",
        "reports",
        "auth",
    ]
    assert effective["delivery"] == {"order": "as_available", "max_wait_ms": 200}
    assert effective["fec"] == {
        "block_size": 16,
        "repair": 4,
        "flush_ms": 20,
        "max_datagram_bytes": 1400,
        "short_block_repair": "proportional",
        "allow_repair_above_source": False,
        "adapt": None,
        "interleave": 1,
        "size_classes": [256],
        "code": "block",
        "window": 32,
        "window_ms": 1000,
        "repair_interval": 4,
    }
    assert effective["reports"] == {"interval_ms": 1000}
    assert effective["forward"] is None and effective["metrics"] == {"listen": None}
    # Plain data only, so yaml.safe_dump accepts it.
    assert type(effective["role"]) is str and type(effective["fec"]["short_block_repair"]) is str


_bindable_hosts = st.sampled_from(["127.0.0.1", "0.0.0.0", "::1", "::", "localhost", "relay.example.net"])


@st.composite
def valid_documents(draw):
    k = draw(st.integers(1, 255))
    allow = draw(st.booleans())
    m = draw(st.integers(0, (255 - k) if allow else min(k, 255 - k)))
    role = draw(st.sampled_from(["sender", "receiver"]))
    ports = draw(st.lists(st.integers(1, 65535), min_size=3, max_size=3, unique=True))

    def address(host, port):
        return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"

    document = {
        "role": role,
        "link": {"bind": address(draw(_bindable_hosts), ports[0])},
        "fec": {
            "block_size": k,
            "repair": m,
            "allow_repair_above_source": allow,
            "flush_ms": draw(st.integers(1, cfg.MAX_FLUSH_MS)),
            "max_datagram_bytes": draw(st.integers(1, cfg.MAX_DATAGRAM_BYTES_LIMIT)),
            "short_block_repair": draw(st.sampled_from(["proportional", "full"])),
        },
        "flows": {
            "max": draw(st.integers(1, cfg.MAX_FLOWS_LIMIT)),
            "idle_timeout_s": (idle := draw(st.integers(1, cfg.MAX_FLOW_IDLE_TIMEOUT_S))),
            "first_exchange_timeout_s": draw(st.integers(1, idle)),
            "protect_s": draw(st.integers(0, cfg.MAX_FLOW_PROTECT_S)),
        },
        "log": {"level": draw(st.sampled_from(["debug", "info", "warning", "error"]))},
    }
    if role == "sender":
        document["listen"] = address("127.0.0.1", ports[1])
        document["link"]["peer"] = address("192.0.2.10", ports[2])
    else:
        document["forward"] = address("127.0.0.1", ports[1])
        if draw(st.booleans()):
            document["link"]["peer"] = address("2001:db8::10", ports[2])
    if draw(st.booleans()):
        document["metrics"] = {"listen": address(draw(_bindable_hosts), draw(st.integers(0, 65535)))}
    document["reports"] = {"interval_ms": draw(st.integers(1, cfg.MAX_REPORT_INTERVAL_MS))}
    if draw(st.booleans()):
        overhead = draw(st.sampled_from([0.25, 0.5, 1.0] + ([2.0] if allow else [])))
        ceiling = min(int(k * overhead), 255 - k)
        high = draw(st.integers(0, ceiling))
        document["fec"]["adapt"] = {
            "target_residual": draw(st.sampled_from([0.01, 1.0e-3, 1.0e-6])),
            "min_repair": draw(st.integers(0, high)),
            "max_repair": draw(st.sampled_from([high, None])),
            "max_overhead": overhead,
        }
    return document


@settings(max_examples=150, deadline=None)
@given(valid_documents())
def test_effective_round_trips_through_yaml_text(document):
    config = parse_config(document, "generated")
    text = yaml.safe_dump(config.effective(), sort_keys=False)
    again = parse_config_text(text, "effective")
    assert again == config
    assert again.effective() == config.effective()


# Anything YAML can produce: bad input must give ConfigError, never another exception.
_scalars = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**70), 2**70), st.floats(allow_nan=True), st.text(max_size=30)
)
_keys = st.one_of(
    st.sampled_from(cfg.schema.ALL_KEY_PATHS + ["bind", "peer", "block_size", "listen"]),
    st.text(max_size=12),
    st.integers(),
)
_yamlish = st.recursive(
    _scalars, lambda inner: st.lists(inner, max_size=4) | st.dictionaries(_keys, inner, max_size=5), max_leaves=25
)


@settings(max_examples=300, deadline=None)
@given(st.dictionaries(st.sampled_from(list(cfg.schema.TOP_LEVEL_KEYS) + ["bogus"]), _yamlish, max_size=8))
def test_arbitrary_documents_never_crash(document):
    try:
        parse_config(document, "fuzz")
    except ConfigError as error:
        assert error.messages and all(message.startswith("fuzz: ") for message in error.messages)


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=200))
def test_arbitrary_text_never_crashes(text):
    try:
        parse_config_text(text, "fuzz")
    except ConfigError as error:
        assert error.messages


def test_interleave_and_size_classes():
    config = parse_config(edited(SENDER, fec__interleave=4, fec__size_classes=[64, 512]))
    assert (config.fec.interleave, config.fec.size_classes) == (4, (64, 512))
    assert parse_config(edited(SENDER, fec__size_classes=[])).fec.size_classes == ()
    assert parse_config(config.effective()) == config
    for bad, path in (
        (dict(fec__interleave=0), "fec.interleave"),
        (dict(fec__interleave=cfg.MAX_INTERLEAVE + 1), "fec.interleave"),
        (dict(fec__size_classes=[512, 64]), "fec.size_classes"),
        (dict(fec__size_classes=[0]), "fec.size_classes"),
        (dict(fec__size_classes=256), "fec.size_classes"),
        (dict(fec__size_classes=[1, 2, 3, 4, 5]), "fec.size_classes"),
        (dict(fec__size_classes=[True]), "fec.size_classes"),
    ):
        messages = errors_of(edited(SENDER, **bad))
        assert len(messages) == 1 and path in messages[0], messages


def test_first_exchange_default_follows_a_shorter_idle_timeout():
    config = parse_config(edited(SENDER, flows__idle_timeout_s=10))
    assert (config.flows.idle_timeout_s, config.flows.first_exchange_timeout_s) == (10, 10)


def test_delivery_order_and_its_bound():
    config = parse_config(edited(RECEIVER, delivery__order="in_order", delivery__max_wait_ms=150))
    assert config.delivery.in_order and config.delivery.max_wait_seconds == 0.15
    assert "is not a valid delivery order" in errors_of(edited(RECEIVER, delivery__order="sorted"))[0]
    # Waiting longer than the decoder keeps a block open cannot bring a gap back.
    (error,) = errors_of(edited(RECEIVER, delivery__order="in_order", delivery__max_wait_ms=600, decoder__hold_ms=500))
    assert "delivery.max_wait_ms: 600 is above decoder.hold_ms 500" in error
    # As available, the bound is not used: a short hold is no fault.
    assert parse_config(edited(RECEIVER, decoder__hold_ms=50)).delivery.max_wait_ms == 200
