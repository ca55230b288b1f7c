"""Child processes of ``python -m fecproxy``: start, read their output, scrape, wait for exit.

Why shared: several test modules run the real commands as processes (the same entry point a user
runs).  Every wait here is bounded in time; a child that outlives its test is killed.
"""

from __future__ import annotations

import json
import queue
import re
import signal
import subprocess
import sys
import threading
import time
import urllib.request

from fecproxy.commands.plan import parse_prometheus_text

LOOPBACK = "127.0.0.1"
#: Seconds for a process to start and say where it listens (imports dominate; shared 2-core box).
START_TIMEOUT = 15.0
#: Seconds for a one-shot command (check, plan) to finish.
COMMAND_TIMEOUT = 60.0


class Child:
    """A child process whose stdout and stderr lines are collected by reader threads."""

    def __init__(self, argv: list[str]):
        self.argv = argv
        self.proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, bufsize=1)
        self.lines: queue.Queue[str] = queue.Queue()
        self.seen: list[str] = []
        for stream in (self.proc.stdout, self.proc.stderr):
            threading.Thread(target=self._pump, args=(stream,), daemon=True).start()

    def _pump(self, stream) -> None:
        for line in stream:
            self.lines.put(line.rstrip("\n"))

    def wait_for(self, pattern: str, timeout: float = START_TIMEOUT) -> re.Match:
        deadline = time.monotonic() + timeout
        regex = re.compile(pattern)
        while time.monotonic() < deadline:
            try:
                line = self.lines.get(timeout=0.1)
            except queue.Empty:
                if self.proc.poll() is not None:
                    break
                continue
            self.seen.append(line)
            match = regex.search(line)
            if match:
                return match
        raise AssertionError(f"{self.argv[3:5]} did not print {pattern!r}; output: {self.seen[-20:]}")

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=5)


def fecproxy(*args: str) -> list[str]:
    """The argv of ``python -m fecproxy ARGS`` with this interpreter (the venv under test)."""
    return [sys.executable, "-m", "fecproxy", *args]


def scrape(port: int) -> dict[str, float]:
    """name{labels} → value from a Prometheus page on 127.0.0.1."""
    with urllib.request.urlopen(f"http://{LOOPBACK}:{port}/metrics", timeout=5) as response:
        page = response.read().decode()
    out = {}
    for name, labels, value in parse_prometheus_text(page):
        key = name + ("{" + ",".join(f"{k}={v}" for k, v in sorted(labels.items())) + "}" if labels else "")
        out[key] = value
    return out


def run_json(*args: str) -> dict:
    """A command's ``--json`` output; exit 1 is an answer too (e.g. plan: no code is good enough)."""
    done = subprocess.run(fecproxy(*args), capture_output=True, text=True, timeout=COMMAND_TIMEOUT)
    assert done.returncode in (0, 1), done.stderr
    return json.loads(done.stdout)


def run_to_exit(*args: str, timeout: float = COMMAND_TIMEOUT, cwd=None) -> subprocess.CompletedProcess:
    """``python -m fecproxy ARGS`` to its end, with no stdin and its output captured as text."""
    return subprocess.run(
        fecproxy(*args), stdin=subprocess.DEVNULL, capture_output=True, text=True, timeout=timeout, cwd=cwd
    )


def read_line_starting(stream, prefix: str, deadline: float) -> str:
    """The first line of ``stream`` that starts with ``prefix``, read until ``deadline`` (monotonic)."""
    while time.monotonic() < deadline:
        line = stream.readline()
        if not line:
            break
        if line.startswith(prefix):
            return line.strip()
    raise AssertionError(f"no line starting with {prefix!r}")


def end_process(proc: subprocess.Popen) -> None:
    """Ask a helper process (a browser, a Prometheus) to end, and kill it if it does not, bounded."""
    if proc.poll() is None:
        proc.terminate()
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout=5)
