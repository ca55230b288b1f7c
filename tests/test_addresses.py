"""HOST:PORT as a config or a command line writes it (fecproxy.config.addresses): parsed, shown,
and refused with the reason; IPv6 in the standard library's canonical form."""

from __future__ import annotations

import ipaddress

import pytest

from fecproxy.config import Address, AddressError, parse_address


@pytest.mark.parametrize(
    "text, host, port",
    [
        ("127.0.0.1:5000", "127.0.0.1", 5000),
        ("0.0.0.0:0", "0.0.0.0", 0),
        ("[::1]:7000", "::1", 7000),
        ("[2001:DB8:0:0::10]:7000", "2001:db8::10", 7000),  # stored in RFC 5952 canonical form
        ("localhost:9464", "localhost", 9464),
        ("relay-1.example.net:7000", "relay-1.example.net", 7000),
        ("relay.example.net.:7000", "relay.example.net.", 7000),
        (" 127.0.0.1:65535 ", "127.0.0.1", 65535),
    ],
)
def test_addresses_parse(text, host, port):
    address = parse_address(text, allow_port_zero=True)
    assert (address.host, address.port) == (host, port)
    assert parse_address(str(address), allow_port_zero=True) == address


def test_address_str_brackets_ipv6_only():
    assert str(Address("::1", 5000)) == "[::1]:5000"
    assert str(Address("127.0.0.1", 5000)) == "127.0.0.1:5000"
    assert str(Address("relay.example.net", 7000)) == "relay.example.net:7000"


def test_ipv6_canonical_form_matches_the_stdlib():
    # RFC 5952 §4 canonical text, as implemented by Python's ipaddress module (oracle).
    address = parse_address("[2001:0db8:0000:0000:0000:0000:0000:0001]:1")
    assert address.host == ipaddress.IPv6Address("2001:db8::1").compressed == "2001:db8::1"


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("", "is empty"),
        ("127.0.0.1", "has no port"),
        ("127.0.0.1:", "has no port"),
        (":5000", "has no host"),
        ("[::1]5000", "has no :PORT after ]"),
        ("[::1:5000", "no closing ]"),
        ("::1:5000", "without brackets"),
        ("256.0.0.1:5000", "not a valid IPv4 address"),
        ("1.2.3:5000", "not a valid IPv4 address"),
        ("01.2.3.4:5000", "not a valid IPv4 address"),  # leading zeros are ambiguous (octal)
        ("-bad-.example:5000", "nor a valid host name"),
        ("a" * 64 + ".example:5000", "nor a valid host name"),  # RFC 1123: labels ≤ 63
        ("127.0.0.1:-1", "not a number"),
        ("127.0.0.1:123456", "out of range"),
        ("127.0.0.1:" + "9" * 5000, "out of range"),  # no int() of a huge digit string
        ("127.0.0.1:65536", "out of range"),
        ("127.0.0.1:0", "out of range 1..65535"),
    ],
)
def test_bad_addresses(text, fragment):
    with pytest.raises(AddressError) as caught:
        parse_address(text)
    assert fragment in str(caught.value)


def test_unspecified_host_only_for_binding():
    assert parse_address("[::]:7000").is_unspecified
    with pytest.raises(AddressError, match="cannot be a destination"):
        parse_address("[::]:7000", allow_unspecified=False)
