"""The anti-replay window (fecproxy.protocol.replay) against RFC 4303 §3.4.3 and a set model."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fecproxy.protocol.replay import DEFAULT_WINDOW, MIN_WINDOW, SEQUENCE_LIMIT, ReplayWindow, Verdict


def accept(window: ReplayWindow, sequence: int) -> Verdict:
    verdict = window.check(sequence)
    if verdict.accepted:
        window.commit(sequence)
    return verdict


def test_window_is_at_least_the_rfc_minimum_and_rounded_to_blocks():
    # RFC 4303 §3.4.3: a window of at least 32 MUST, 64 SHOULD be supported.
    assert ReplayWindow().window >= DEFAULT_WINDOW >= MIN_WINDOW == 64
    assert ReplayWindow(100).window == 128
    with pytest.raises(ValueError):
        ReplayWindow(32)


def test_first_packet_of_a_session_is_accepted_wherever_it_starts():
    window = ReplayWindow(64)
    assert accept(window, 7 << 32) is Verdict.FRESH
    assert window.highest == 7 << 32


def test_rfc_4303_rules():
    # RFC 4303 §3.4.3: a new highest number moves the window right; a number inside the window
    # is accepted once, a duplicate is rejected; a number left of the window is rejected.
    window = ReplayWindow(64)
    for sequence in (1000, 1001, 1003):
        assert accept(window, sequence) is Verdict.FRESH
    assert accept(window, 1002) is Verdict.FRESH  # late but inside the window
    assert accept(window, 1002) is Verdict.DUPLICATE
    assert accept(window, 1003) is Verdict.DUPLICATE
    assert accept(window, 1003 - 63) is Verdict.FRESH  # the oldest number still inside
    assert accept(window, 1003 - 64) is Verdict.TOO_OLD
    assert accept(window, 5000) is Verdict.FRESH  # a jump clears everything
    assert accept(window, 1003) is Verdict.TOO_OLD
    assert accept(window, 4999) is Verdict.FRESH


def test_check_is_a_pure_query_and_only_commit_moves_the_window():
    # RFC 4303 §3.4.3: the window is updated only after the integrity check succeeds.
    window = ReplayWindow(64)
    window.commit(100)
    assert window.check(10_000) is Verdict.FRESH  # e.g. a forged packet, never committed
    assert window.highest == 100
    assert window.check(99) is Verdict.FRESH
    window.commit(99)
    assert window.check(99) is Verdict.DUPLICATE


def test_commit_refuses_what_is_too_old_or_outside_64_bits():
    window = ReplayWindow(64)
    window.commit(1000)
    with pytest.raises(ValueError):
        window.commit(900)
    with pytest.raises(ValueError):
        window.commit(SEQUENCE_LIMIT)


def test_ring_wraps_many_times_without_losing_bits():
    window = ReplayWindow(128)  # 3 ring blocks of 64 bits
    for sequence in range(0, 10_000, 3):
        assert accept(window, sequence) is Verdict.FRESH
        assert accept(window, sequence) is Verdict.DUPLICATE
        if sequence >= 126:
            assert window.check(sequence - 126) is Verdict.DUPLICATE  # still remembered
            assert window.check(sequence - 125) is Verdict.FRESH  # never sent, still inside


def test_sequence_near_the_top_of_64_bits():
    window = ReplayWindow(64)
    top = SEQUENCE_LIMIT - 1
    assert accept(window, top - 5) is Verdict.FRESH
    assert accept(window, top) is Verdict.FRESH
    assert accept(window, top - 3) is Verdict.FRESH
    assert accept(window, top - 3) is Verdict.DUPLICATE
    assert accept(window, top - 64) is Verdict.TOO_OLD


class SetModel:
    """The obvious definition: everything accepted, and the highest; nothing clever."""

    def __init__(self, window: int):
        self.window = window
        self.seen: set[int] = set()
        self.highest: int | None = None

    def accept(self, sequence: int) -> Verdict:
        if self.highest is not None and sequence <= self.highest:
            if self.highest - sequence >= self.window:
                return Verdict.TOO_OLD
            if sequence in self.seen:
                return Verdict.DUPLICATE
        self.seen.add(sequence)
        self.highest = sequence if self.highest is None else max(self.highest, sequence)
        return Verdict.FRESH


@settings(max_examples=300, deadline=None)
@given(
    size=st.sampled_from([64, 128, 200, 1024]),
    start=st.integers(0, SEQUENCE_LIMIT - 100_000),
    steps=st.lists(st.integers(-1500, 300), min_size=1, max_size=300),
)
def test_ring_matches_a_set_model(size, start, steps):
    window, model = ReplayWindow(size), SetModel(ReplayWindow(size).window)
    position = start
    for step in steps:
        position = max(0, position + step)
        assert accept(window, position) == model.accept(position), position
        assert window.highest == model.highest
