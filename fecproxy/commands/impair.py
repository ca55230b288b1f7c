"""``fecproxy impair``: the command line of the user-space lossy link.

Datagrams arriving on ``--listen`` (where the sender proxy's ``link.peer`` points) go through the
*forward* emulated link to ``--to`` (the receiver proxy); replies come back through the *return*
link.  The loss, delay and rate logic is sans-IO in :mod:`fecproxy.linkmodel.impairment`, the
sockets and pumps in :mod:`fecproxy.shell.relay`; this module reads the options, handles signals
and prints the summary.
"""

from __future__ import annotations

import argparse
import math
import signal
import sys

import trio

from fecproxy.config import addresses as config_addresses
from fecproxy.config.addresses import format_sockaddr
from fecproxy.linkmodel.impairment import Blackout, ImpairmentConfigError, LinkImpairment
from fecproxy.linkmodel.loss_models import ChannelConfigError, channel_from_figures
from fecproxy.shell.relay import (
    DEFAULT_SEED,
    SHELL_DROP_REASONS,
    RelayConfig,
    RelayError,
    UdpRelay,
    start_metrics_server,
)

#: A progress line every 10 s: often enough to see a blackout or a rate cap bite, rare enough
#: to leave the terminal readable for hours (common practice, no source).
DEFAULT_PROGRESS_INTERVAL_S = 10.0

CONVENTION = (
    "Loss model (Gilbert 1960; Elliott 1963): a two-state Markov chain advances once per packet; "
    "p = P(good→bad), r = P(bad→good); a packet is lost with probability loss_good in the good state "
    "and loss_bad in the bad state (defaults 0 and 1: the simple Gilbert channel). --loss P --burst B "
    "sets r = 1/B, p = P/(B(1−P)); --loss alone gives independent losses."
)
EPILOG = (
    "Directions: forward = datagrams from clients of --listen toward --to; return = replies from --to "
    "back to the address that last sent to --listen. The plain options impair the forward direction "
    "and, unless a --return-* option overrides them one by one, the return direction too (a radio "
    "channel is usually alike both ways). --return-loss 0 removes only the loss model on the return "
    "path: delay, jitter, duplication, rate cap and blackouts still apply there as given for the forward "
    "direction, unless their own --return-* options (e.g. --return-delay-ms 0) change them. "
    + CONVENTION
    + " Order on the link: modem buffer and rate cap (tail drop when full), blackout, loss model, "
    "duplication, delay ± jitter (uniform). Blackout syntax: DURATION/PERIOD[@OFFSET], e.g. 3s/60s "
    "(first outage at 60 s) or 500ms/10s@2s. A summary with measured loss and mean burst per "
    "direction is printed at exit (SIGINT, SIGTERM or --seconds), and a progress line every --interval "
    "seconds while it runs."
)


def parse_address(text: str, option: str = "address") -> tuple[str, int]:
    """'HOST:PORT' or '[V6]:PORT' → (host, port), parsed by the config layer's one parser."""
    try:
        address = config_addresses.parse_address(text, allow_port_zero=True)
    except config_addresses.AddressError as error:
        raise ImpairmentConfigError(f"{option} {text!r} {error}; expected HOST:PORT (or [IPv6]:PORT)") from None
    return address.host, address.port


def format_summary(relay: UdpRelay) -> str:
    """Per direction: what went through, the measured loss beside the configured one, drops."""
    lines = []
    configured = {"forward": relay.config.forward, "return": relay.config.back}
    for direction, stats in relay.stats().items():
        loss = configured[direction].loss
        shell = {reason: relay.shell_drops[(direction, reason)] for reason in SHELL_DROP_REASONS}
        if stats.sent:
            measured = (
                f"measured loss {stats.measured_loss:.4g} (configured {loss.average_loss:.4g}), "
                f"mean burst {_burst_text(stats.measured_mean_burst, stats.lost)} (configured {loss.mean_burst:.4g})"
            )
        else:
            measured = "no traffic went on the air, nothing measured"
        lines.append(
            f"{direction}: submitted {stats.submitted}, on the air {stats.sent}, delivered {stats.delivered} "
            f"(duplicates {stats.duplicates})\n"
            f"  loss model: lost {stats.lost}, {measured}\n"
            f"  drops: queue {stats.queue_drops}, blackout {stats.blackout_drops}, "
            f"in-flight limit {stats.in_flight_drops}, "
            f"no client {shell['no_client']}, send errors {shell['send_error']}"
        )
    return "\n".join(lines)


def _burst_text(value: float, lost: int) -> str:
    return f"{value:.4g}" if lost else "- (nothing lost)"


def format_progress(elapsed: float, relay: UdpRelay, previous: dict) -> str:
    """One line per interval while the relay runs: what each direction carried and lost since the
    last line (``previous`` holds the last counters and is updated).  The modem buffer's and the
    blackouts' drops stand beside the loss model's: on a narrow link they can be most of the loss."""
    parts = [f"t={elapsed:.0f}s"]
    for direction, stats in relay.stats().items():
        sent0, lost0, delivered0, queue0, blackout0 = previous.get(direction, (0, 0, 0, 0, 0))
        sent, lost = stats.sent - sent0, stats.lost - lost0
        queue, blackout = stats.queue_drops - queue0, stats.blackout_drops - blackout0
        share = f"{lost / sent:.2%}" if sent else "-"
        parts.append(
            f"{direction}: on the air {sent}, lost {lost} ({share}), buffer full {queue}, blackout {blackout}, "
            f"delivered {stats.delivered - delivered0}"
        )
        previous[direction] = (stats.sent, stats.lost, stats.delivered, stats.queue_drops, stats.blackout_drops)
    return "  ".join(parts)


# -- command line ----------------------------------------------------------------------------------------

#: (option suffix, type, metavar, help) for one direction; added plainly and with ``--return-``.
_LINK_OPTIONS: tuple[tuple[str, type, str, str], ...] = (
    ("loss", float, "P", "average loss ratio 0..1 (alone: independent losses)"),
    ("burst", float, "B", "mean burst of consecutive losses in packets (≥ 1), with the loss ratio"),
    ("ge-p", float, "p", "Gilbert–Elliott p = P(good→bad) per packet"),
    ("ge-r", float, "r", "Gilbert–Elliott r = P(bad→good) per packet"),
    ("ge-loss-good", float, "PROB", "loss probability in the good state (default 0)"),
    ("ge-loss-bad", float, "PROB", "loss probability in the bad state (default 1)"),
    ("delay-ms", float, "MS", "one-way delay in ms (default 0)"),
    ("jitter-ms", float, "MS", "delay varies uniformly by ± this many ms (default 0)"),
    ("duplicate", float, "PROB", "probability that a delivered datagram is delivered twice (default 0)"),
    ("rate-kbps", float, "KBPS", "rate cap in kbit/s counting IP/UDP headers (default none; 0 = none)"),
    ("rate-pps", float, "PPS", "rate cap in datagrams/s (default none; 0 = none)"),
    ("queue-packets", int, "N", "modem buffer size in datagrams when rate-capped; tail-drops when full (default 64)"),
    ("blackout", str, "SPEC", "scheduled outage DURATION/PERIOD[@OFFSET], e.g. 3s/60s; 'none' for none"),
)
_LOSS_SUFFIXES = ("loss", "burst", "ge-p", "ge-r", "ge-loss-good", "ge-loss-bad")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = EPILOG
    parser.add_argument(
        "--listen",
        required=True,
        default=argparse.SUPPRESS,
        metavar="HOST:PORT",
        help="address to receive on; point the sender proxy's link.peer here",
    )
    parser.add_argument(
        "--to",
        required=True,
        default=argparse.SUPPRESS,
        metavar="HOST:PORT",
        help="address to relay to (the receiver proxy)",
    )
    parser.add_argument(
        "--bind-out",
        metavar="HOST:PORT",
        default=argparse.SUPPRESS,
        help="local address of the socket toward --to (default: any)",
    )
    parser.add_argument(
        "--seed",
        type=int,
        default=DEFAULT_SEED,
        help="seed for every random choice; same seed and traffic, same losses",
    )
    parser.add_argument(
        "--seconds",
        type=float,
        default=argparse.SUPPRESS,
        help="stop after this many seconds (default: run until SIGINT/SIGTERM)",
    )
    parser.add_argument(
        "--interval",
        type=float,
        default=DEFAULT_PROGRESS_INTERVAL_S,
        metavar="SECONDS",
        help="print a progress line this often while running; 0 = only the summary at exit",
    )
    parser.add_argument(
        "--metrics",
        metavar="HOST:PORT",
        default=argparse.SUPPRESS,
        help="serve Prometheus metrics (fecproxy_impair_*) at http://HOST:PORT/metrics",
    )
    for prefix, title in (
        ("", "forward direction (and return, unless overridden)"),
        ("return-", "return direction overrides"),
    ):
        group = parser.add_argument_group(title)
        for suffix, kind, metavar, text in _LINK_OPTIONS:
            if prefix:
                text = f"return direction: --{suffix} (default: as --{suffix})"
            group.add_argument(f"--{prefix}{suffix}", type=kind, metavar=metavar, default=argparse.SUPPRESS, help=text)
        group.add_argument(
            f"--{prefix}reorder",
            action=argparse.BooleanOptionalAction,
            default=argparse.SUPPRESS,
            help="return direction: --reorder (default: as --reorder)"
            if prefix
            else "let jitter reorder datagrams (default: off, a later datagram waits for an earlier one)",
        )


def _option(args: argparse.Namespace, prefix: str, suffix: str):
    return getattr(args, (prefix + suffix).replace("-", "_"), None)


def _link_from_args(args: argparse.Namespace, prefix: str, base: LinkImpairment | None) -> LinkImpairment:
    """Build one direction; options not given fall back to ``base`` (the forward link) or defaults."""

    def pick(suffix, default):
        value = _option(args, prefix, suffix)
        return value if value is not None else default

    fallback = base if base is not None else LinkImpairment()
    loss_given = {s.replace("-", "_").removeprefix("ge_"): _option(args, prefix, s) for s in _LOSS_SUFFIXES}
    if any(v is not None for v in loss_given.values()):
        try:
            loss = channel_from_figures(**loss_given)
        except ChannelConfigError as exc:
            where = (
                "return direction (--return-* loss options replace the forward ones as a set)"
                if prefix
                else "forward direction"
            )
            raise ChannelConfigError(f"{where}: {exc}") from None
    else:
        loss = fallback.loss
    for suffix in ("delay-ms", "jitter-ms"):
        value = _option(args, prefix, suffix)
        if value is not None and not (math.isfinite(value) and value >= 0):
            raise ImpairmentConfigError(f"--{prefix}{suffix} must be ≥ 0, got {value!r}")
    rate_kbps = _option(args, prefix, "rate-kbps")
    rate_pps = _option(args, prefix, "rate-pps")
    blackout_text = _option(args, prefix, "blackout")
    return LinkImpairment(
        loss=loss,
        delay=fallback.delay
        if _option(args, prefix, "delay-ms") is None
        else _option(args, prefix, "delay-ms") / 1000.0,
        jitter=fallback.jitter
        if _option(args, prefix, "jitter-ms") is None
        else _option(args, prefix, "jitter-ms") / 1000.0,
        reorder=bool(pick("reorder", fallback.reorder)),
        duplicate=pick("duplicate", fallback.duplicate),
        rate_bps=fallback.rate_bps if rate_kbps is None else (rate_kbps * 1000.0 or None),
        rate_pps=fallback.rate_pps if rate_pps is None else (rate_pps or None),
        queue_packets=pick("queue-packets", fallback.queue_packets),
        blackout=fallback.blackout if blackout_text is None else Blackout.parse(blackout_text),
    )


def config_from_args(args: argparse.Namespace) -> RelayConfig:
    forward = _link_from_args(args, "", None)
    back = _link_from_args(args, "return-", forward)
    bind_out = getattr(args, "bind_out", None)
    return RelayConfig(
        listen=parse_address(args.listen, "--listen"),
        to=parse_address(args.to, "--to"),
        forward=forward,
        back=back,
        seed=args.seed,
        bind_out=None if bind_out is None else parse_address(bind_out, "--bind-out"),
    )


async def _serve(
    config: RelayConfig, seconds: float | None, metrics: tuple[str, int] | None, interval: float = 0.0
) -> int:
    relay = UdpRelay(config)
    server = None
    failures: list[BaseException] = []
    with trio.open_signal_receiver(signal.SIGINT, signal.SIGTERM) as signals:
        try:
            async with trio.open_nursery() as nursery:
                await nursery.start(relay.run)
                print(
                    f"fecproxy impair: listening on {format_sockaddr(relay.listen_address)}, relaying to "
                    f"{format_sockaddr(config.to)}",
                    flush=True,
                )
                print(f"forward: {config.forward.describe()}", flush=True)
                print(f"return: {config.back.describe()}", flush=True)
                if metrics is not None:
                    server = start_metrics_server(relay, metrics)
                    nursery.start_soon(server.run)
                    print(f"metrics: http://{format_sockaddr(server.address)}/metrics", flush=True)
                if seconds is not None:
                    nursery.cancel_scope.deadline = trio.current_time() + seconds

                async def stop_on_signal():
                    async for _ in signals:
                        nursery.cancel_scope.cancel()
                        return

                nursery.start_soon(stop_on_signal)
                if interval > 0:
                    nursery.start_soon(_progress_loop, relay, interval)
        except* (RelayError, OSError) as group:
            failures.extend(group.exceptions)
        finally:
            if server is not None:
                server.stop()
    if failures:
        for exc in failures:
            print(f"fecproxy impair: {exc}", file=sys.stderr)
        return 2
    print(format_summary(relay), flush=True)
    return 0


async def _progress_loop(relay: UdpRelay, interval: float) -> None:
    started = trio.current_time()
    previous: dict = {}
    while True:
        await trio.sleep(interval)
        print(format_progress(trio.current_time() - started, relay, previous), flush=True)


def main(args: argparse.Namespace) -> int:
    try:
        config = config_from_args(args)
        metrics_text = getattr(args, "metrics", None)
        metrics = None if metrics_text is None else parse_address(metrics_text, "--metrics")
        seconds = getattr(args, "seconds", None)
        if seconds is not None and not (math.isfinite(seconds) and seconds > 0):
            raise ImpairmentConfigError(f"--seconds must be > 0, got {seconds!r}")
        interval = getattr(args, "interval", DEFAULT_PROGRESS_INTERVAL_S)
        if not (math.isfinite(interval) and interval >= 0):
            raise ImpairmentConfigError(f"--interval must be ≥ 0 seconds (0 = no progress lines), got {interval!r}")
    except (ImpairmentConfigError, ChannelConfigError) as exc:
        print(f"fecproxy impair: {exc}", file=sys.stderr)
        return 2
    return trio.run(_serve, config, seconds, metrics, interval)


__all__ = ["parse_address", "config_from_args", "format_summary", "add_arguments", "main"]
