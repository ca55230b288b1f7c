"""The status page opened only after a blackout has ended still shows it: the charts start from
the daemon's own history and the events of the outage are listed and marked (headless Chromium,
a whole ``fecproxy run`` pair behind a relay that goes dark for a while; screenshot saved)."""

from __future__ import annotations

import os
import threading
import time

import pytest
from support.browser import HeadlessChromium, artifact_dir, find_chromium
from support.daemon_pair import send_paced, wait_until

from fecproxy.shell import history

#: Traffic before, during and after the blackout (seconds) at this rate: the blackout is longer
#: than the silence threshold (history.PEER_SILENT_MIN_S) with a margin for a busy machine.
BEFORE_S, BLACKOUT_S, AFTER_S = 4.0, history.PEER_SILENT_MIN_S + 3.0, 4.0
RATE = 100.0
PAGE_TIMEOUT_S = 20.0

READ = """(() => {
  const svg = document.getElementById("chart-loss");
  return {
    refreshes: Number(document.body.dataset.refreshes),
    events: [...document.querySelectorAll("#events tr")].map((tr) => tr.dataset.event),
    points: Number(svg.dataset.points), max: Number(svg.dataset.max || 0), marks: Number(svg.dataset.marks),
    caption: document.getElementById("kpi-span").textContent,
    span: Number(document.getElementById("kpi-span").dataset.span),
    ticks: [...svg.querySelectorAll("text")].map((t) => t.textContent),
  };
})()"""


def _chromium() -> str:
    executable = find_chromium()
    if executable is None:
        reason = "chromium is not installed (Debian package `chromium`, installed by .ci/run)"
        if os.environ.get("CI", "").lower() in ("1", "true", "yes"):
            pytest.fail(reason)
        pytest.skip(reason)
    return executable


@pytest.mark.slow
def test_a_page_opened_after_a_blackout_shows_it_from_the_daemons_history(pairs, tmp_path):
    executable = _chromium()
    dark = threading.Event()
    blackout = lambda index, data: dark.is_set()  # noqa: E731 - a drop rule of the relay
    pair = pairs(forward=blackout, back=blackout, echo=True)
    client = pair.client(1)
    total = int(RATE * (BEFORE_S + BLACKOUT_S + AFTER_S))
    sender = threading.Thread(target=send_paced, args=(client.send, total, RATE), daemon=True)
    sender.start()
    time.sleep(BEFORE_S)
    dark.set()
    time.sleep(BLACKOUT_S)
    dark.clear()
    sender.join(timeout=AFTER_S + 30)
    assert wait_until(lambda: "peer_heard" in _event_names(pair.receiver), 10)
    time.sleep(2.0)  # the outage is over and settled before anyone looks

    with HeadlessChromium(executable) as browser:
        browser.navigate(f"http://127.0.0.1:{pair.receiver.metrics_port}/")
        browser.wait_for("Number((document.body && document.body.dataset.refreshes) || 0) >= 2", PAGE_TIMEOUT_S)
        shown = browser.evaluate(READ)
        for place in artifact_dir(tmp_path):
            browser.screenshot(place / "status-page-after-blackout.png")
        errors = list(browser.errors)
    assert not errors, errors
    # The events of the outage, from the daemon's history (the page was not open then).
    assert "peer_silent" in shown["events"] and "peer_heard" in shown["events"], shown["events"]
    assert shown["marks"] >= 2
    # The charts start before the page was opened: a point a second since the daemon started,
    # the blackout's loss among them.
    assert shown["points"] >= BEFORE_S + BLACKOUT_S + AFTER_S, shown
    assert shown["max"] > 0, shown
    # The axis spans what the caption says (a minute here: the daemon is young).
    span = shown["span"]
    named = "minute" if span == 60 else f"{span // 60} minutes"
    assert f"the last {named} (from the daemon's own history" in shown["caption"], shown["caption"]
    assert f"−{span // 60} min" in shown["ticks"] and "now" in shown["ticks"], shown["ticks"]


def _event_names(daemon) -> list[str]:
    import json
    import urllib.request

    url = f"http://127.0.0.1:{daemon.metrics_port}/status.json?events_since=0"
    with urllib.request.urlopen(url, timeout=5) as response:
        return [event["event"] for event in json.load(response)["history"]["events"]]
