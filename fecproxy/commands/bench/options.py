"""Option types the benchmark commands share."""

from __future__ import annotations

import argparse


def positive(kind):
    """An argparse type: ``kind(text)`` that must be > 0, with a message saying which rule failed."""

    def parse(text: str):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
        if not value > 0:
            raise argparse.ArgumentTypeError(f"must be positive, got {text!r}")
        return value

    return parse
