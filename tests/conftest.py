"""Fixtures shared by several test modules, and the import path of their harnesses.

Test modules never import each other: process harnesses and shared reference maths live in the
``support`` package beside this file and are imported as ``support.<module>``.  pytest's default
import mode already puts this directory on ``sys.path`` (the test modules are not a package);
doing it here too keeps ``support`` importable under ``--import-mode=importlib``.
"""

from __future__ import annotations

import sys
from pathlib import Path

TESTS_DIR = str(Path(__file__).resolve().parent)
if TESTS_DIR not in sys.path:
    sys.path.insert(0, TESTS_DIR)
