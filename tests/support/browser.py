"""Headless Chromium driven over the DevTools protocol, for tests of pages the daemon serves.

Why the DevTools protocol rather than ``--dump-dom``: a test must watch a live page refresh in
real time, read its DOM at a chosen moment, collect script errors and take a screenshot, all in
one browser run.  Only loopback URLs are loaded; every wait is bounded.  The browser runs with a
fresh profile in a temporary directory and is ended (this process's own child, by its pid) on
close.
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import shutil
import subprocess
import tempfile
import time
import urllib.request
from pathlib import Path

from websockets.sync.client import connect

from support.processes import end_process

#: Debian's package name for the browser (``.ci/run`` installs it).
CHROMIUM_NAMES = ("chromium", "chromium-browser")
#: A cold start of Chromium on a busy 2-core machine takes a few seconds; this bounds it.
START_TIMEOUT_S = 30.0
#: One DevTools command (a screenshot of a large page is the slowest) must answer within this.
COMMAND_TIMEOUT_S = 20.0
#: Screenshots are base64 in one websocket message: allow far more than a full-HD PNG.
MAX_MESSAGE_BYTES = 64 * 1024 * 1024
#: Switches for a quiet, self-contained headless run: no GPU, no sandbox (tests may run as root),
#: no network of its own (updates, sync, QUIC), no first-run UI.
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-default-apps",
    "--no-default-browser-check",
    "--disable-extensions",
    "--mute-audio",
)


def find_chromium() -> str | None:
    for name in CHROMIUM_NAMES:
        path = shutil.which(name)
        if path:
            return path
    return None


class DevToolsError(RuntimeError):
    pass


class HeadlessChromium:
    """``with HeadlessChromium() as browser: browser.navigate(url); browser.evaluate(js)``."""

    def __init__(self, executable: str, width: int = 1440, height: int = 1000):
        self.profile = tempfile.mkdtemp(prefix="fecproxy-chromium-")
        # Chromium's chatter goes to a file, not a pipe nobody drains (a full pipe would stall it).
        self.log = tempfile.TemporaryFile(prefix="fecproxy-chromium-log-")
        self.proc = subprocess.Popen(
            [
                executable,
                *FLAGS,
                f"--user-data-dir={self.profile}",
                "--remote-debugging-address=127.0.0.1",
                "--remote-debugging-port=0",
                f"--window-size={width},{height}",
                "about:blank",
            ],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=self.log,
        )
        self.width, self.height = width, height
        self.errors: list[str] = []  # uncaught exceptions, console errors and log errors (CSP)
        self._next_id = 0
        self._exit = contextlib.ExitStack()
        self.ws = None
        try:
            port = self._wait_for_port()
            request = urllib.request.Request(f"http://127.0.0.1:{port}/json/new?about:blank", method="PUT")
            with urllib.request.urlopen(request, timeout=COMMAND_TIMEOUT_S) as response:
                target = json.load(response)
            self.ws = self._exit.enter_context(
                connect(target["webSocketDebuggerUrl"], max_size=MAX_MESSAGE_BYTES, open_timeout=COMMAND_TIMEOUT_S)
            )
            for domain in ("Page", "Runtime", "Log"):
                self.send(f"{domain}.enable")
            self.send(
                "Emulation.setDeviceMetricsOverride",
                {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False},
            )
        except BaseException:
            self.close()
            raise

    def _wait_for_port(self) -> int:
        """Chromium writes the port it chose to DevToolsActivePort in the profile."""
        marker = Path(self.profile) / "DevToolsActivePort"
        deadline = time.monotonic() + START_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                self.log.seek(0)
                raise DevToolsError(
                    f"chromium exited with {self.proc.returncode}: {self.log.read().decode(errors='replace')[-2000:]}"
                )
            if marker.exists():
                lines = marker.read_text().splitlines()
                if lines and lines[0].isdigit():
                    return int(lines[0])
            time.sleep(0.05)
        raise DevToolsError(f"chromium wrote no DevToolsActivePort within {START_TIMEOUT_S} s")

    # ---------------------------------------------------------------- protocol
    def _note(self, message: dict) -> None:
        method, params = message.get("method"), message.get("params", {})
        if method == "Runtime.exceptionThrown":
            details = params.get("exceptionDetails", {})
            self.errors.append(
                "exception: " + json.dumps(details.get("exception", {}).get("description") or details.get("text"))
            )
        elif method == "Runtime.consoleAPICalled" and params.get("type") == "error":
            self.errors.append(
                "console.error: " + json.dumps([a.get("value", a.get("description")) for a in params.get("args", [])])
            )
        elif method == "Log.entryAdded" and params.get("entry", {}).get("level") == "error":
            self.errors.append("log: " + params["entry"].get("text", ""))

    def send(self, method: str, params: dict | None = None) -> dict:
        if self.ws is None:
            raise DevToolsError(f"{method}: not connected")
        ws = self.ws
        self._next_id += 1
        ident = self._next_id
        ws.send(json.dumps({"id": ident, "method": method, "params": params or {}}))
        deadline = time.monotonic() + COMMAND_TIMEOUT_S
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise DevToolsError(f"{method}: no answer within {COMMAND_TIMEOUT_S} s")
            message = json.loads(ws.recv(timeout=remaining))
            if message.get("id") == ident:
                if "error" in message:
                    raise DevToolsError(f"{method}: {message['error']}")
                return message.get("result", {})
            self._note(message)

    def evaluate(self, expression: str):
        """The JSON value of a JavaScript expression in the page."""
        result = self.send("Runtime.evaluate", {"expression": expression, "returnByValue": True, "awaitPromise": True})
        if "exceptionDetails" in result:
            raise DevToolsError(f"{expression!r} threw: {result['exceptionDetails']}")
        return result["result"].get("value")

    def navigate(self, url: str) -> None:
        assert url.startswith(("http://127.", "http://localhost")), f"tests load loopback pages only, not {url}"
        self.send("Page.navigate", {"url": url})

    def wait_for(self, expression: str, timeout: float, interval: float = 0.1):
        """Poll until the expression is truthy; returns its value, or raises with the reason."""
        deadline = time.monotonic() + timeout
        while True:
            value = self.evaluate(expression)
            if value:
                return value
            if time.monotonic() >= deadline:
                raise DevToolsError(f"{expression!r} still false after {timeout} s; page errors: {self.errors}")
            time.sleep(interval)

    def screenshot(self, path: Path) -> Path:
        """A PNG of the whole page (beyond the window when it is taller)."""
        height = int(self.evaluate("Math.ceil(document.documentElement.scrollHeight)") or self.height)
        self.send(
            "Emulation.setDeviceMetricsOverride",
            {"width": self.width, "height": max(height, self.height), "deviceScaleFactor": 1, "mobile": False},
        )
        data = self.send("Page.captureScreenshot", {"format": "png"})["data"]
        path.write_bytes(base64.b64decode(data))
        return path

    # ---------------------------------------------------------------- lifecycle
    def close(self) -> None:
        if self.ws is not None:
            try:
                self.send("Browser.close")
            except Exception:  # already gone: the process is ended below either way
                pass
        self._exit.close()
        end_process(self.proc)
        self.log.close()
        shutil.rmtree(self.profile, ignore_errors=True)

    def __enter__(self) -> HeadlessChromium:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def artifact_dir(tmp_path: Path) -> list[Path]:
    """Where a test saves what a person should look at: its tmp_path, and under CI also
    ``test-artifacts/`` at the repository root (git-ignored)."""
    places = [tmp_path]
    if os.environ.get("CI"):
        shared = Path(__file__).resolve().parents[2] / "test-artifacts"
        shared.mkdir(exist_ok=True)
        places.append(shared)
    return places
