"""The demo's settings: the invented link and code it runs with by default, and their checks.

Why apart from the wiring: ``main`` checks every option before any socket opens, and the same
checks and daemon configs serve an embedding test that calls ``run_demo`` directly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from fecproxy.commands.demo.traffic import DEFAULT_TELEMETRY_RATE
from fecproxy.config import MAX_ENCODING_SYMBOLS, MAX_HOLD_MS, parse_config
from fecproxy.linkmodel.loss_models import ChannelConfigError, GilbertElliott

# --------------------------------------------------------------------------------------------
# The scenario.  Every figure here is invented for the demo; none is a measurement.
# --------------------------------------------------------------------------------------------

#: The relay loses 8 % of packets (invented), in bursts of 3 packets on average (invented).
DEFAULT_LOSS = 0.08
DEFAULT_BURST = 3.0
#: Runs are reproducible unless the user asks for another seed.
DEFAULT_SEED = 1

#: Default code, chosen with fecproxy.planner (exact Gilbert–Elliott recursion) for loss 0.08,
#: mean burst 3.  Bursts with a geometric length tail need *long* blocks: at 50 % overhead the
#: residual loss per datagram is k=8,m=4: 3.5e-2; k=16,m=8: 1.6e-2; k=32,m=16: 4.0e-3;
#: k=64,m=32: 3.1e-4.  k=32, m=16 keeps the overhead at the half that a licensed data radio can
#: usually spare while cutting the loss about tenfold; telemetry alone fills ~20 datagrams per
#: 1-s block, which the proportional short-block rule protects with 10 repair packets
#: (k=20,m=10: 1.1e-2).  Weather readings tolerate a second of recovery delay, so blocks close
#: after 1000 ms rather than the daemon's 20 ms default meant for interactive traffic.
DEFAULT_K = 32
DEFAULT_M = 16
DEFAULT_FLUSH_MS = 1000
#: The receiver keeps an incomplete block this much longer than the sender's flush time, so the
#: repair packets of a block closed by its timer still find it (config: hold must exceed flush).
HOLD_MARGIN_MS = 500

DEFAULT_SECONDS = 20.0
#: A demo is not a soak test: an hour bounds memory (bitmaps and delay lists grow with the run).
MAX_SECONDS = 3600.0
#: Above this the demo stops being a modest background load on a 2-core machine.
MAX_TELEMETRY_RATE = 1000.0
#: fecproxy's own example metrics port (README, "Metrics port"): 9464 is registered for another
#: widely used exporter (from memory) and would clash with it on the same host.
DEFAULT_METRICS_PORT = 11464
LOOPBACK = "127.0.0.1"


#: The sliding-window code's window in the demo: 64 datagrams (about 3 s of telemetry at 20/s),
#: enough to span the relay's bursts; the repair interval keeps the block code's overhead.
DEFAULT_WINDOW = 64
CODES = ("block", "sliding")


@dataclass
class DemoOptions:
    seconds: float = DEFAULT_SECONDS
    seed: int = DEFAULT_SEED
    loss: float = DEFAULT_LOSS
    burst: float = DEFAULT_BURST
    k: int = DEFAULT_K
    m: int = DEFAULT_M
    flush_ms: int = DEFAULT_FLUSH_MS
    rate: float = DEFAULT_TELEMETRY_RATE
    metrics_port: int = DEFAULT_METRICS_PORT
    live: bool = True
    code: str = "block"  # fec.code of the sender
    window: int = DEFAULT_WINDOW  # fec.window, with code sliding

    @property
    def repair_interval(self) -> int:
        """The sliding code's interval with the block code's overhead m/k: ceil(k/m), ≤ window."""
        return min(self.window, math.ceil(self.k / self.m)) if self.m else self.window


class DemoError(ValueError):
    """An option the demo cannot run with; the text says which and why."""


def build_configs(options: DemoOptions, sink: tuple, relay: tuple | None = None):
    """The receiver's config (relay unknown yet) or the sender's (relay given); raises ConfigError."""
    fec: dict = {"block_size": options.k, "repair": options.m, "flush_ms": options.flush_ms}
    if options.code == "sliding":
        fec.update(code="sliding", window=options.window, repair_interval=options.repair_interval)
    decoder = {"hold_ms": min(options.flush_ms + HOLD_MARGIN_MS, MAX_HOLD_MS)}
    link = {"bind": f"{LOOPBACK}:0"}
    common = {"link": link, "fec": fec, "decoder": decoder}
    if relay is None:
        return parse_config({"role": "receiver", "forward": f"{sink[0]}:{sink[1]}", **common}, "demo receiver")
    link["peer"] = f"{relay[0]}:{relay[1]}"
    return parse_config({"role": "sender", "listen": f"{LOOPBACK}:0", **common}, "demo sender")


def check_options(options: DemoOptions) -> GilbertElliott:
    """Validate what the config parser does not see; returns the link's channel."""
    if not (math.isfinite(options.seconds) and 0 < options.seconds <= MAX_SECONDS):
        raise DemoError(f"--seconds must be > 0 and ≤ {MAX_SECONDS:g}, got {options.seconds!r}")
    if not (math.isfinite(options.rate) and 0 < options.rate <= MAX_TELEMETRY_RATE):
        raise DemoError(f"--rate must be > 0 and ≤ {MAX_TELEMETRY_RATE:g} datagrams/s, got {options.rate!r}")
    if not 0 <= options.metrics_port <= 65535:
        raise DemoError(f"--metrics-port must be 0..65535 (0 = any free port), got {options.metrics_port}")
    if not 1 <= options.k <= MAX_ENCODING_SYMBOLS - 1:
        raise DemoError(f"--k must be 1..{MAX_ENCODING_SYMBOLS - 1}, got {options.k}")
    if not 0 <= options.m <= min(options.k, MAX_ENCODING_SYMBOLS - options.k):
        raise DemoError(
            f"--m must be 0..{min(options.k, MAX_ENCODING_SYMBOLS - options.k)} with --k {options.k}: at most k "
            f"(RFC 6363 §8.2 keeps the repair rate at or below the source rate) and k + m ≤ {MAX_ENCODING_SYMBOLS} "
            f"(RFC 5510 §8.2, GF(2^8)); got {options.m}"
        )
    if options.code not in CODES:
        raise DemoError(f"--code must be {' or '.join(CODES)}, got {options.code!r}")
    if options.code == "sliding" and not options.m:
        raise DemoError("--code sliding needs --m ≥ 1: the repair interval is set from the overhead m/k")
    if options.code == "sliding" and not 1 <= options.window <= 255:
        raise DemoError(f"--window must be 1..255, got {options.window}")
    if not 0 <= options.loss < 1:
        raise DemoError(f"--loss must be in [0, 1), got {options.loss!r}")
    try:
        return GilbertElliott.from_loss_burst(options.loss, options.burst)
    except ChannelConfigError as error:
        raise DemoError(f"--loss/--burst: {error}") from None
