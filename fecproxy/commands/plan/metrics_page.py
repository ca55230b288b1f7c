"""The metrics page half of ``fecproxy plan --from-metrics``: fetch a running receiver's page and
read its link estimate and the code arriving on the measured link.

Kept apart from the command's options and output: it is the one piece that does network I/O, and
``tests/support`` reuses its parser for the metrics of daemons under test.
"""

from __future__ import annotations

import math
import re
import urllib.error
import urllib.request

from fecproxy.config.addresses import metrics_url
from fecproxy.linkmodel.planner import PlanError

#: Gauges the receiver exports from its online estimate (transition counting over the source
#: datagrams it saw or missed); ``--from-metrics`` reads these two.
LINK_LOSS_GAUGE = "fecproxy_link_loss_ratio"
LINK_BURST_GAUGE = "fecproxy_link_mean_burst_packets"
#: The gauges that tell the code arriving on the measured link (the peer's k and m as decoded).
RECEIVED_K_GAUGE = "fecproxy_received_code_source_symbols"
RECEIVED_M_GAUGE = "fecproxy_received_code_repair_symbols"
#: A metrics page is a few kB; 1 MiB is far above any real page and bounds what we read.
MAX_METRICS_PAGE_BYTES = 1 << 20
#: Seconds to wait for the metrics page: a receiver on the same LAN answers in milliseconds.
DEFAULT_METRICS_TIMEOUT = 5.0


class MetricsError(PlanError):
    """The metrics page could not be fetched or did not hold the link gauges."""


_SAMPLE = re.compile(
    r"""^(?P<name>[A-Za-z_:][A-Za-z0-9_:]*)
        (?:\{(?P<labels>(?:[^"}]|"(?:[^"\\]|\\.)*")*)\})?
        \s+(?P<value>\S+)""",
    re.VERBOSE,
)
_LABEL = re.compile(r'\s*([A-Za-z_][A-Za-z0-9_]*)\s*=\s*"((?:[^"\\]|\\.)*)"\s*,?')


def parse_prometheus_text(page: str) -> list[tuple[str, dict[str, str], float]]:
    """(name, labels, value) for each sample line of a Prometheus text exposition page.

    Lines that do not parse are skipped: the page is someone else's, and we want two gauges from it.
    """
    samples = []
    for line in page.splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        match = _SAMPLE.match(line)
        if not match:
            continue
        labels = dict(_LABEL.findall(match.group("labels") or ""))
        try:
            value = float(match.group("value"))
        except ValueError:
            continue
        samples.append((match.group("name"), labels, value))
    return samples


def _pick(samples, name: str, select: dict[str, str]) -> float:
    found = [
        (labels, value)
        for n, labels, value in samples
        if n == name and all(labels.get(k) == v for k, v in select.items())
    ]
    if not found:
        raise MetricsError(
            f"the metrics page has no {name}"
            + (f" with {select}" if select else "")
            + "; is this the metrics page of a fecproxy daemon that receives from the link?"
        )
    if len(found) > 1:
        sets = "; ".join(",".join(f"{k}={v}" for k, v in sorted(labels.items())) or "(none)" for labels, _ in found)
        raise MetricsError(
            f"{len(found)} samples of {name} (labels: {sets}); choose one with --metrics-select LABEL=VALUE"
        )
    return found[0][1]


def running_code(samples, select: dict[str, str]) -> dict[str, int] | None:
    """The code arriving on the measured link: the peer's k and m as this daemon decodes them
    (``fecproxy_received_code_source_symbols``/``_repair_symbols``); None while unknown or absent.

    The page's ``fecproxy_info`` labels are not used: they are the code this daemon *sends* with,
    on the other direction, while the link estimate describes the direction it receives."""
    figures = {}
    for key, name in (("k", RECEIVED_K_GAUGE), ("m", RECEIVED_M_GAUGE)):
        found = [
            v
            for n, labels, v in samples
            if n == name and all(labels.get(a) == b for a, b in select.items() if a in labels)
        ]
        if len(found) != 1 or not math.isfinite(found[0]):
            return None
        figures[key] = int(found[0])
    return figures


def link_from_metrics(url: str, select: list[str], timeout: float = DEFAULT_METRICS_TIMEOUT) -> tuple[float, float]:
    """(average loss, mean burst) as a running receiver estimates them."""
    loss, burst, _ = read_metrics(url, select, timeout)
    return loss, burst


def read_metrics(
    url: str, select: list[str], timeout: float = DEFAULT_METRICS_TIMEOUT
) -> tuple[float, float, dict | None]:
    """(average loss, mean burst, running code or None) from a running receiver's page."""
    wanted: dict[str, str] = {}
    for item in select:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise MetricsError(f"--metrics-select wants LABEL=VALUE, got {item!r}")
        wanted[key.strip()] = value.strip()
    url = metrics_url(url)  # host:port as `fecproxy watch` takes it, or a URL
    if not url.startswith(("http://", "https://")):
        raise MetricsError(f"--from-metrics wants host:port or an http:// or https:// URL, got {url!r}")
    try:
        with urllib.request.urlopen(url, timeout=timeout) as response:
            body = response.read(MAX_METRICS_PAGE_BYTES + 1)
    except (urllib.error.URLError, OSError, ValueError) as exc:
        raise MetricsError(f"cannot fetch {url}: {exc}") from None
    if len(body) > MAX_METRICS_PAGE_BYTES:
        raise MetricsError(f"{url} sent more than {MAX_METRICS_PAGE_BYTES} bytes; that is not a metrics page")
    samples = parse_prometheus_text(body.decode("utf-8", errors="replace"))
    loss = _pick(samples, LINK_LOSS_GAUGE, wanted)
    burst = _pick(samples, LINK_BURST_GAUGE, wanted)
    if not math.isfinite(loss):
        raise MetricsError(
            f"no traffic measured yet at {url}: the receiver has no link estimate until blocks arrive; "
            "run traffic through the pair and try again"
        )
    if not math.isfinite(burst):
        # Loss measured but no burst yet: only possible with nothing lost, where any burst fits.
        burst = 1.0
    return loss, burst, running_code(samples, wanted)
