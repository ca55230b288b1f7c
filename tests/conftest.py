"""Fixtures shared by several test modules, and the import path of their harnesses.

Test modules never import each other: process harnesses and shared reference maths live in the
``support`` package beside this file and are imported as ``support.<module>``.  pytest's default
import mode already puts this directory on ``sys.path`` (the test modules are not a package);
doing it here too keeps ``support`` importable under ``--import-mode=importlib``.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

TESTS_DIR = str(Path(__file__).resolve().parent)
if TESTS_DIR not in sys.path:
    sys.path.insert(0, TESTS_DIR)

from support.daemon_pair import Pair  # noqa: E402  (needs the path set above)


@pytest.fixture
def pairs(tmp_path):
    """Factory of started ``fecproxy run`` pairs (support/daemon_pair.py); every pair is stopped
    at the end of the test, pass or fail, and both daemons must exit 0 on SIGTERM."""
    started: list[Pair] = []

    def start(**kwargs) -> Pair:
        pair = Pair(tmp_path, **kwargs)
        started.append(pair)
        return pair

    yield start
    codes = [code for pair in started for code in pair.close()]
    assert codes == [0] * len(codes), f"daemon exit codes after SIGTERM: {codes}"
