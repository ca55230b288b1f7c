"""``fecproxy impair``: a bidirectional UDP relay through an emulated lossy link (trio shell).

Datagrams arriving on ``--listen`` (where the sender proxy's ``link.peer`` points) go through the
*forward* :class:`~fecproxy.impairment.ImpairedLink` to ``--to`` (the receiver proxy); datagrams
coming back from ``--to`` go through the *return* link to whichever address last sent to
``--listen``.  All impairment logic is sans-IO in :mod:`fecproxy.impairment`; this module owns the
sockets, the clock, signals, the summary and the optional metrics page.

In-process use (a demo or a test inside a trio nursery)::

    relay = await nursery.start(run_relay, RelayConfig(listen=("127.0.0.1", 0), to=receiver_addr, ...))
    relay.listen_address   # where the sender should send
    relay.stats()          # per-direction LinkStats
"""

from __future__ import annotations

import argparse
import math
import signal
import socket as stdlib_socket
import sys
from collections import Counter
from dataclasses import dataclass, field

import trio

from .channel import ChannelConfigError, channel_from_figures
from .impairment import Blackout, ImpairedLink, ImpairmentConfigError, LinkImpairment, LinkStats

#: Receive buffer: the largest UDP payload (65 535 − 8 header bytes), so nothing is truncated.
MAX_DATAGRAM_BYTES = 65_535
#: Default seed: runs are reproducible unless the user asks otherwise.
DEFAULT_SEED = 1
#: Socket receive/send buffers asked of the kernel.  The relay is one Python task per direction;
#: a sender's burst must wait in the kernel rather than be dropped there, where we cannot count
#: it.  4 MiB holds about a second of a 30 Mbit/s link; Linux caps it at net.core.rmem_max/wmem_max.
SOCKET_BUFFER_BYTES = 4 * 1024 * 1024
DIRECTIONS = ("forward", "return")
#: Drops that happen in the relay shell rather than on the emulated link.
SHELL_DROP_REASONS = ("no_client", "send_error")

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
    "channel is usually alike both ways); give --return-loss 0 for a clean return path. "
    + CONVENTION
    + " Order on the link: modem buffer and rate cap (tail drop when full), blackout, loss model, "
    "duplication, delay ± jitter (uniform). Blackout syntax: DURATION/PERIOD[@OFFSET], e.g. 3s/60s "
    "(first outage at 60 s) or 500ms/10s@2s. A summary with measured loss and mean burst per "
    "direction is printed at exit (SIGINT, SIGTERM or --seconds)."
)


class RelayError(RuntimeError):
    """The relay could not start (address resolution or bind failed)."""


def parse_address(text: str) -> tuple[str, int]:
    """'HOST:PORT' or '[V6]:PORT' → (host, port)."""
    text = text.strip()
    if text.startswith("["):
        host, sep, port = text[1:].partition("]:")
    else:
        host, sep, port = text.rpartition(":")
    if not sep or not host:
        raise ImpairmentConfigError(f"address must be HOST:PORT (or [IPv6]:PORT), got {text!r}")
    try:
        number = int(port)
    except ValueError:
        raise ImpairmentConfigError(f"port must be a number, got {port!r} in {text!r}") from None
    if not 0 <= number <= 65535:
        raise ImpairmentConfigError(f"port must be in 0..65535, got {number} in {text!r}")
    return host, number


@dataclass(frozen=True)
class RelayConfig:
    """Everything :func:`run_relay` needs; the two :class:`LinkImpairment` are already validated."""

    listen: tuple[str, int]
    to: tuple[str, int]
    forward: LinkImpairment = field(default_factory=LinkImpairment)
    back: LinkImpairment = field(default_factory=LinkImpairment)
    seed: int | str = DEFAULT_SEED
    bind_out: tuple[str, int] | None = None  # local address toward ``to``; None = any


class UdpRelay:
    """The running relay: two sockets, two impaired links, a pump per direction."""

    def __init__(self, config: RelayConfig) -> None:
        self.config = config
        self.links: dict[str, ImpairedLink] = {}
        self.shell_drops: Counter[tuple[str, str]] = Counter()
        self.listen_address: tuple | None = None
        self.out_address: tuple | None = None
        self.client: tuple | None = None  # who sent to --listen last; replies go there
        self._wake = {direction: trio.Event() for direction in DIRECTIONS}

    async def run(self, *, task_status=trio.TASK_STATUS_IGNORED) -> None:
        """Bind, report ``self`` through ``task_status``, relay until cancelled."""
        config = self.config
        try:
            listen_info = await trio.socket.getaddrinfo(*config.listen, type=stdlib_socket.SOCK_DGRAM)
            to_info = await trio.socket.getaddrinfo(*config.to, type=stdlib_socket.SOCK_DGRAM)
            listen_sock = trio.socket.socket(listen_info[0][0], stdlib_socket.SOCK_DGRAM)
            out_sock = trio.socket.socket(to_info[0][0], stdlib_socket.SOCK_DGRAM)
        except OSError as exc:
            raise RelayError(f"cannot resolve or open sockets for {config.listen} / {config.to}: {exc}") from None
        with listen_sock, out_sock:
            for sock in (listen_sock, out_sock):
                for option in (stdlib_socket.SO_RCVBUF, stdlib_socket.SO_SNDBUF):
                    try:
                        sock.setsockopt(stdlib_socket.SOL_SOCKET, option, SOCKET_BUFFER_BYTES)
                    except OSError:  # a smaller buffer still works; only bursts suffer
                        pass
            try:
                await listen_sock.bind(listen_info[0][4])
                if config.bind_out is not None:
                    await out_sock.bind(config.bind_out)
                await out_sock.connect(to_info[0][4])
            except OSError as exc:
                raise RelayError(f"cannot bind {config.listen} or reach {config.to}: {exc}") from None
            self.listen_address = listen_sock.getsockname()
            self.out_address = out_sock.getsockname()
            start = trio.current_time()
            self.links = {
                "forward": ImpairedLink(config.forward, seed=f"{config.seed}:forward", start=start),
                "return": ImpairedLink(config.back, seed=f"{config.seed}:return", start=start),
            }
            task_status.started(self)
            async with trio.open_nursery() as nursery:
                nursery.start_soon(self._receive_from_clients, listen_sock)
                nursery.start_soon(self._receive_from_far_end, out_sock)
                nursery.start_soon(self._pump, "forward", out_sock, listen_sock)
                nursery.start_soon(self._pump, "return", out_sock, listen_sock)

    async def _receive_from_clients(self, sock) -> None:
        link = self.links["forward"]
        while True:
            try:
                data, address = await sock.recvfrom(MAX_DATAGRAM_BYTES)
            except OSError:  # an ICMP error for an earlier send surfaces here; nothing was received
                continue
            self.client = address
            link.submit(data, trio.current_time())
            self._wake["forward"].set()

    async def _receive_from_far_end(self, sock) -> None:
        link = self.links["return"]
        while True:
            try:
                data = await sock.recv(MAX_DATAGRAM_BYTES)
            except OSError:  # e.g. ECONNREFUSED while the far end is not up yet
                continue
            link.submit(data, trio.current_time())
            self._wake["return"].set()

    async def _pump(self, direction: str, out_sock, listen_sock) -> None:
        """Send what the link says is due, then sleep until its next deadline or new input."""
        link = self.links[direction]
        while True:
            for datagram in link.due(trio.current_time()):
                try:
                    if direction == "forward":
                        await out_sock.send(datagram)
                    elif self.client is None:
                        self.shell_drops[(direction, "no_client")] += 1
                    else:
                        await listen_sock.sendto(datagram, self.client)
                except OSError:
                    self.shell_drops[(direction, "send_error")] += 1
            wake = self._wake[direction]
            deadline = link.next_deadline()
            with trio.move_on_at(math.inf if deadline is None else deadline):
                await wake.wait()
            if wake.is_set():
                self._wake[direction] = trio.Event()

    # -- reporting ---------------------------------------------------------------------------------

    def stats(self) -> dict[str, LinkStats]:
        """Per-direction link counters (safe to call from another thread: it only reads)."""
        return {direction: link.stats() for direction, link in self.links.items()}

    def summary(self) -> str:
        lines = []
        configured = {"forward": self.config.forward, "return": self.config.back}
        for direction, stats in self.stats().items():
            loss = configured[direction].loss
            shell = {reason: self.shell_drops[(direction, reason)] for reason in SHELL_DROP_REASONS}
            lines.append(
                f"{direction}: submitted {stats.submitted}, on the air {stats.sent}, delivered {stats.delivered} "
                f"(duplicates {stats.duplicates})\n"
                f"  loss model: lost {stats.lost}, measured loss {stats.measured_loss:.4g} (configured {loss.average_loss:.4g}), "
                f"mean burst {stats.measured_mean_burst:.4g} (configured {loss.mean_burst:.4g})\n"
                f"  drops: queue {stats.queue_drops}, blackout {stats.blackout_drops}, in-flight limit {stats.in_flight_drops}, "
                f"no client {shell['no_client']}, send errors {shell['send_error']}"
            )
        return "\n".join(lines)


async def run_relay(config: RelayConfig, *, task_status=trio.TASK_STATUS_IGNORED) -> None:
    """Run a relay until cancelled; ``task_status.started`` receives the :class:`UdpRelay`
    (its ``listen_address`` is the bound address, its ``stats()`` the counters)."""
    await UdpRelay(config).run(task_status=task_status)


# -- metrics -------------------------------------------------------------------------------------------


class _RelayCollector:
    """Prometheus collector reading the relay's counters at scrape time (no per-packet cost)."""

    def __init__(self, relay: UdpRelay) -> None:
        self.relay = relay

    def collect(self):
        from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

        prefix = "fecproxy_impair_"
        counters = {
            "submitted": CounterMetricFamily(prefix + "datagrams_submitted", "datagrams offered to the emulated link", labels=["direction"]),
            "sent": CounterMetricFamily(prefix + "datagrams_sent", "datagrams put on the air (faced the loss model)", labels=["direction"]),
            "delivered": CounterMetricFamily(prefix + "datagrams_delivered", "datagrams delivered, duplicates included", labels=["direction"]),
            "duplicates": CounterMetricFamily(prefix + "datagrams_duplicated", "extra copies delivered", labels=["direction"]),
        }
        dropped = CounterMetricFamily(prefix + "datagrams_dropped", "datagrams dropped, by reason", labels=["direction", "reason"])
        loss = GaugeMetricFamily(prefix + "loss_ratio", "measured loss ratio of the loss model", labels=["direction"])
        burst = GaugeMetricFamily(prefix + "mean_burst_packets", "measured mean run of consecutive losses", labels=["direction"])
        queued = GaugeMetricFamily(prefix + "queue_datagrams", "datagrams in the modem buffer", labels=["direction"])
        in_flight = GaugeMetricFamily(prefix + "in_flight_datagrams", "datagrams delayed and not yet due", labels=["direction"])
        for direction, stats in self.relay.stats().items():
            for name, family in counters.items():
                family.add_metric([direction], getattr(stats, name))
            for reason, count in stats.drops.items():
                dropped.add_metric([direction, reason], count)
            for reason in SHELL_DROP_REASONS:
                dropped.add_metric([direction, reason], self.relay.shell_drops[(direction, reason)])
            loss.add_metric([direction], stats.measured_loss)
            burst.add_metric([direction], stats.measured_mean_burst)
            queued.add_metric([direction], stats.queued)
            in_flight.add_metric([direction], stats.in_flight)
        yield from counters.values()
        yield from (dropped, loss, burst, queued, in_flight)


def start_metrics_server(relay: UdpRelay, address: tuple[str, int]):
    """Serve ``/metrics`` from a prometheus_client thread; returns (server, bound address)."""
    from prometheus_client import CollectorRegistry, start_http_server

    registry = CollectorRegistry()
    registry.register(_RelayCollector(relay))
    server, _thread = start_http_server(address[1], addr=address[0], registry=registry)
    return server, server.server_address[:2]


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
    parser.add_argument("--listen", required=True, default=argparse.SUPPRESS, metavar="HOST:PORT", help="address to receive on; point the sender proxy's link.peer here")
    parser.add_argument("--to", required=True, default=argparse.SUPPRESS, metavar="HOST:PORT", help="address to relay to (the receiver proxy)")
    parser.add_argument("--bind-out", metavar="HOST:PORT", default=argparse.SUPPRESS, help="local address of the socket toward --to (default: any)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed for every random choice; same seed and traffic, same losses")
    parser.add_argument("--seconds", type=float, default=argparse.SUPPRESS, help="stop after this many seconds (default: run until SIGINT/SIGTERM)")
    parser.add_argument("--metrics", metavar="HOST:PORT", default=argparse.SUPPRESS, help="serve Prometheus metrics (fecproxy_impair_*) at http://HOST:PORT/metrics")
    for prefix, title in (("", "forward direction (and return, unless overridden)"), ("return-", "return direction overrides")):
        group = parser.add_argument_group(title)
        for suffix, kind, metavar, text in _LINK_OPTIONS:
            if prefix:
                text = f"return direction: --{suffix} (default: as --{suffix})"
            group.add_argument(f"--{prefix}{suffix}", type=kind, metavar=metavar, default=argparse.SUPPRESS, help=text)
        group.add_argument(
            f"--{prefix}reorder",
            action=argparse.BooleanOptionalAction,
            default=argparse.SUPPRESS,
            help="return direction: --reorder (default: as --reorder)" if prefix
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
            where = "return direction (--return-* loss options replace the forward ones as a set)" if prefix else "forward direction"
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
        delay=fallback.delay if _option(args, prefix, "delay-ms") is None else _option(args, prefix, "delay-ms") / 1000.0,
        jitter=fallback.jitter if _option(args, prefix, "jitter-ms") is None else _option(args, prefix, "jitter-ms") / 1000.0,
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
        listen=parse_address(args.listen),
        to=parse_address(args.to),
        forward=forward,
        back=back,
        seed=args.seed,
        bind_out=None if bind_out is None else parse_address(bind_out),
    )


def _fmt(address) -> str:
    host, port = address[0], address[1]
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"


async def _serve(config: RelayConfig, seconds: float | None, metrics: tuple[str, int] | None) -> int:
    relay = UdpRelay(config)
    server = None
    failures: list[BaseException] = []
    with trio.open_signal_receiver(signal.SIGINT, signal.SIGTERM) as signals:
        try:
            async with trio.open_nursery() as nursery:
                await nursery.start(relay.run)
                print(f"fecproxy impair: listening on {_fmt(relay.listen_address)}, relaying to {_fmt(config.to)}", flush=True)
                print(f"forward: {config.forward.describe()}", flush=True)
                print(f"return: {config.back.describe()}", flush=True)
                if metrics is not None:
                    server, bound = start_metrics_server(relay, metrics)
                    print(f"metrics: http://{_fmt(bound)}/metrics", flush=True)
                if seconds is not None:
                    nursery.cancel_scope.deadline = trio.current_time() + seconds

                async def stop_on_signal():
                    async for _ in signals:
                        nursery.cancel_scope.cancel()
                        return

                nursery.start_soon(stop_on_signal)
        except* (RelayError, OSError) as group:
            failures.extend(group.exceptions)
        finally:
            if server is not None:
                server.shutdown()
                server.server_close()
    if failures:
        for exc in failures:
            print(f"fecproxy impair: {exc}", file=sys.stderr)
        return 2
    print(relay.summary(), flush=True)
    return 0


def main(args: argparse.Namespace) -> int:
    try:
        config = config_from_args(args)
        metrics_text = getattr(args, "metrics", None)
        metrics = None if metrics_text is None else parse_address(metrics_text)
        seconds = getattr(args, "seconds", None)
        if seconds is not None and not (math.isfinite(seconds) and seconds > 0):
            raise ImpairmentConfigError(f"--seconds must be > 0, got {seconds!r}")
    except (ImpairmentConfigError, ChannelConfigError) as exc:
        print(f"fecproxy impair: {exc}", file=sys.stderr)
        return 2
    return trio.run(_serve, config, seconds, metrics)


__all__ = ["RelayConfig", "RelayError", "UdpRelay", "run_relay", "parse_address", "config_from_args", "add_arguments", "main"]
