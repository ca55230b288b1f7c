"""The short-block repair rule (fecproxy.protocol.repair_rule): how many repair packets a block
closed short gets, against an oracle and the encoder that applies it."""

from __future__ import annotations

import dataclasses
import math
from fractions import Fraction

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.config import FecSection
from fecproxy.protocol.repair_rule import ShortBlockRepair


def proportional_oracle(m: int, k: int, k_actual: int) -> int:
    """ceil(m·k'/k) in exact rational arithmetic (fractions.Fraction as oracle), at least 1."""
    if m == 0:
        return 0
    return max(1, math.ceil(Fraction(m * k_actual, k)))


@pytest.mark.parametrize(
    "k, m, k_actual, proportional, full",
    [
        # worked by hand: ceil(4·k'/16)
        (16, 4, 16, 4, 4),
        (16, 4, 15, 4, 4),  # 3.75 -> 4
        (16, 4, 12, 3, 4),  # exactly 3
        (16, 4, 9, 3, 4),  # 2.25 -> 3
        (16, 4, 8, 2, 4),
        (16, 4, 4, 1, 4),
        (16, 4, 1, 1, 4),  # 0.25 -> at least one
        (10, 3, 5, 2, 3),  # 1.5 -> 2
        (10, 3, 3, 1, 3),  # 0.9 -> 1
        (8, 8, 1, 1, 8),
        (255, 0, 1, 0, 0),  # m = 0: framed but unprotected
        (16, 0, 7, 0, 0),
        (1, 1, 1, 1, 1),
        (200, 55, 1, 1, 55),
        (200, 55, 199, 55, 55),  # 54.725 -> 55
    ],
)
def test_short_block_rule_table(k, m, k_actual, proportional, full):
    allow = m > k
    fec = FecSection(block_size=k, repair=m, allow_repair_above_source=allow)
    assert fec.repair_for(k_actual) == proportional == proportional_oracle(m, k, k_actual)
    full_fec = dataclasses.replace(fec, short_block_repair=ShortBlockRepair.FULL)
    assert full_fec.repair_for(k_actual) == full


@settings(max_examples=500, deadline=None)
@given(st.data())
def test_proportional_rule_keeps_the_ratio_with_the_fewest_packets(data):
    k = data.draw(st.integers(1, 255))
    m = data.draw(st.integers(0, min(k, 255 - k)))
    k_actual = data.draw(st.integers(1, k))
    m_actual = FecSection(block_size=k, repair=m).repair_for(k_actual)
    assert m_actual == proportional_oracle(m, k, k_actual)
    if m:
        assert 1 <= m_actual <= m
        assert Fraction(m_actual, k_actual) >= Fraction(m, k)  # overhead ratio kept ...
        assert Fraction(m_actual - 1, k_actual) < Fraction(m, k)  # ... with no packet to spare
        assert m_actual <= k_actual  # m ≤ k carries over: RFC 6363 §8.2 still holds per block


def test_rule_agrees_with_the_encoder():
    """One rule, two places: the config shows it, the encoder applies it."""
    from fecproxy.protocol.encoder import EncoderSettings

    for rule in ShortBlockRepair:
        for k in range(1, 33):
            for m in range(0, k + 1):
                fec = FecSection(block_size=k, repair=m, short_block_repair=rule)
                encoder = EncoderSettings(block_size=k, repair=m, short_block_repair=rule.value)
                for k_actual in range(1, k + 1):
                    assert fec.repair_for(k_actual) == encoder.repair_for(k_actual), (rule, k, m, k_actual)


@pytest.mark.parametrize("k_actual", [0, 17, -1, True, 2.0, "3"])
def test_repair_for_rejects_impossible_block_sizes(k_actual):
    with pytest.raises(ValueError, match="k_actual must be an integer 1..16"):
        FecSection().repair_for(k_actual)
