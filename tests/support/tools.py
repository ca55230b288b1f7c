"""System tools some tests need (Prometheus' server and promtool, installed by .ci/run)."""

from __future__ import annotations

import os
import shutil

import pytest


def require(tool: str) -> str:
    """The tool's path; without it the test skips with the reason printed, and under CI=true fails."""
    path = shutil.which(tool)
    if path is None:
        reason = f"{tool} not found: install Debian's prometheus package (apt-get install -y prometheus)"
        if os.environ.get("CI") == "true":
            pytest.fail(reason + " — CI must run this test")
        print(f"SKIP: {reason}")
        pytest.skip(reason)
    return path
