"""Checkers: one per kind of config value.

Each is a callable that returns the parsed value or raises :class:`Bad` with the text that follows
the shown value in the message ("is out of range; expected ..."); each has an ``expected`` text
for messages about a missing value.  The schema (``config/schema.py``) pairs every key with one.
"""

from __future__ import annotations

from collections.abc import Mapping
from enum import StrEnum
from itertools import pairwise
from typing import Any, Protocol

from fecproxy.config.addresses import Address, AddressError, parse_address
from fecproxy.config.messages import closest, key_text, kind_of, or_list, show_value


class Bad(Exception):
    pass


class Checker(Protocol):
    """What the schema pairs with a key: parses a raw YAML value, names what it expects."""

    @property
    def expected(self) -> str: ...

    def __call__(self, value: object) -> Any: ...


class Integer:
    def __init__(self, low: int, high: int, expected: str | None = None):
        self.low, self.high = low, high
        self.expected = expected or f"an integer {low}..{high}"

    def __call__(self, value: object) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        if not self.low <= value <= self.high:
            raise Bad(f"is out of range; expected {self.expected}")
        return value


class Boolean:
    expected = "true or false"

    def __call__(self, value: object) -> bool:
        if not isinstance(value, bool):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        return value


class Choice:
    def __init__(self, enum: type[StrEnum], what: str):
        self.enum, self.what = enum, what
        self.expected = or_list([member.value for member in enum])

    def __call__(self, value: object) -> StrEnum:
        if not isinstance(value, str):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        try:
            return self.enum(value)
        except ValueError:
            pass
        hint = closest(value, [member.value for member in self.enum])
        suggestion = f" (did you mean {hint}?)" if hint else ""
        raise Bad(f"is not a valid {self.what}; expected {self.expected}{suggestion}")


class AddressField:
    def __init__(self, bindable: bool):
        self.bindable = bindable
        if bindable:
            self.expected = "HOST:PORT with port 0..65535 (0 = any free port), e.g. 127.0.0.1:5000 or [::1]:5000"
        else:
            self.expected = "HOST:PORT of a destination with port 1..65535, e.g. 192.0.2.10:7000 or [2001:db8::10]:7000"

    def __call__(self, value: object) -> Address:
        if not isinstance(value, str):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        try:
            return parse_address(value, allow_port_zero=self.bindable, allow_unspecified=self.bindable)
        except AddressError as error:
            raise Bad(f"{error}; expected {self.expected}") from None


class FilePath:
    expected = "the path of a key file, e.g. /etc/fecproxy/link.key (made by `fecproxy keygen PATH`)"

    def __call__(self, value: object) -> str:
        if not isinstance(value, str):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        if not value.strip() or "\0" in value:
            raise Bad(f"is not a usable path; expected {self.expected}")
        return value


class Number:
    """A real number in a range; YAML ints are accepted, booleans and strings are not."""

    def __init__(self, low: float, high: float, *, low_open: bool = False, high_open: bool = False, expected: str):
        self.low, self.high, self.low_open, self.high_open = low, high, low_open, high_open
        self.expected = expected

    def __call__(self, value: object) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            hint = ""
            if isinstance(value, str) and _looks_numeric(value):
                hint = " (YAML reads a number like 1e-3 as text: write 0.001 or 1.0e-3)"
            raise Bad(f"is {kind_of(value)}; expected {self.expected}{hint}")
        number = float(value)
        above = number > self.low if self.low_open else number >= self.low
        below = number < self.high if self.high_open else number <= self.high
        if not (above and below):  # NaN fails both
            raise Bad(f"is out of range; expected {self.expected}")
        return number


class BitRate:
    """Bits per second: a number, or text with an SI suffix (9600, "9.6k", "256k", "2M")."""

    def __init__(self, low: float, high: float):
        self.low, self.high = low, high
        self.expected = f"bits per second {low:g}..{high:g}, as a number or with k/M (e.g. 9600, 9.6k, 256k, 2M)"

    def __call__(self, value: object) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float, str)):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        text = str(value).strip()
        scale = {"k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9}.get(text[-1:], 1.0)
        try:
            number = float(text[:-1] if scale != 1.0 else text) * scale
        except ValueError:
            raise Bad(f"is not a rate; expected {self.expected}") from None
        if not self.low <= number <= self.high:  # NaN fails too
            raise Bad(f"is out of range; expected {self.expected}")
        return number


class SizeBoundaries:
    """A list of increasing byte counts (fec.size_classes; an empty list = one class)."""

    def __init__(self, max_count: int, max_bytes: int):
        self.max_count, self.max_bytes = max_count, max_bytes
        self.expected = (
            f"a list of at most {max_count} increasing byte counts 1..{max_bytes}, e.g. [256] or [] for one class"
        )

    def __call__(self, value: object) -> tuple[int, ...]:
        if not isinstance(value, list):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        if len(value) > self.max_count:
            raise Bad(f"has {len(value)} boundaries; expected {self.expected}")
        for item in value:
            if isinstance(item, bool) or not isinstance(item, int) or not 1 <= item <= self.max_bytes:
                raise Bad(f"holds {show_value(item)}; expected {self.expected}")
        if any(a >= b for a, b in pairwise(value)):
            raise Bad(f"is not increasing; expected {self.expected}")
        return tuple(value)


def _looks_numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


class BadKeys(Exception):
    """Faults inside a nested mapping: (key, text) pairs, each reported under its own path."""

    def __init__(self, faults: list[tuple[str, str]]) -> None:
        self.faults = faults


class NestedMapping:
    """A nested mapping of settings (like fec.adapt); missing keys take the dataclass defaults."""

    def __init__(self, cls: type[Any], keys: dict[str, Checker], what: str, *, nullable: frozenset[str] = frozenset()):
        self.cls, self.keys, self.what = cls, keys, what
        self.nullable = nullable  # nested keys where null means "not set" (the default applies)
        self.expected = f"a mapping of {what} settings ({', '.join(keys)})"

    def __call__(self, value: object) -> Any:
        if not isinstance(value, Mapping):
            raise Bad(f"is {kind_of(value)}; expected {self.expected}")
        faults: list[tuple[str, str]] = []
        parsed: dict[str, Any] = {}
        for key, raw in value.items():
            name = key_text(key)
            check = self.keys.get(name)
            if check is None:
                near = closest(name, list(self.keys))
                hint = f"did you mean {near}?" if near else "valid keys here are " + ", ".join(self.keys)
                faults.append((name, f"unknown key; {hint}"))
            elif raw is None and name in self.nullable:
                parsed[name] = None
            elif raw is None:
                faults.append((name, f"has no value (null); expected {check.expected}"))
            else:
                try:
                    parsed[name] = check(raw)
                except Bad as bad:
                    faults.append((name, f"{show_value(raw)} {bad}"))
        if faults:
            raise BadKeys(faults)
        return self.cls(**parsed)
