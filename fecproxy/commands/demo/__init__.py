"""``fecproxy demo``: the whole data path on loopback, with a live view and a side-by-side summary.

Why it exists: it is the first command a new user runs, so it must show in twenty seconds what FEC
buys on a bad link and what it costs, with nothing to configure.  The scenario and every number in
it are invented for this demo: a remote weather station sends sensor telemetry and camera stills
through a hill-top radio relay that loses packets in bursts.

One trio nursery, all on 127.0.0.1::

    station ──▶ sender Daemon ──▶ lossy relay (Gilbert–Elliott) ──▶ receiver Daemon ──▶ sink
       ◀────────── acknowledgements travel back the same way, through the same pair ◀────

Each application datagram carries a stream id, a sequence number, its send time and a BLAKE2b
checksum, so the sink measures loss, integrity and one-way delay itself instead of trusting the
daemons' counters.  A tap on the relay's forward link sees every packet on the air (source or
repair, lost or not), which gives the "without FEC" column, the overhead in packets and bytes,
and which datagrams the receiver had to rebuild.

The package, one job per module: :mod:`.traffic` (the datagram format, the station and the sink),
:mod:`.tap` (the link tap), :mod:`.render` (header, live view, summary), :mod:`.options` (defaults
and their checks); this module wires them up in one nursery and holds the command line.
"""

from __future__ import annotations

import argparse
import signal
import sys
from collections.abc import Callable
from typing import TYPE_CHECKING

import trio
import trio.socket

from fecproxy.commands.demo.options import (
    DEFAULT_BURST,
    DEFAULT_FLUSH_MS,
    DEFAULT_K,
    DEFAULT_LOSS,
    DEFAULT_M,
    DEFAULT_METRICS_PORT,
    DEFAULT_SECONDS,
    DEFAULT_SEED,
    DEFAULT_WINDOW,
    HOLD_MARGIN_MS,
    LOOPBACK,
    DemoError,
    DemoOptions,
    build_configs,
    check_options,
)
from fecproxy.commands.demo.render import (
    DemoResult,
    LiveSnapshot,
    LiveView,
    format_header,
    format_summary,
    pending,
    percentile,
)
from fecproxy.commands.demo.tap import LinkTap
from fecproxy.commands.demo.traffic import DEFAULT_TELEMETRY_RATE, STREAM_CAMERA, Sink, Station
from fecproxy.config import MAX_HOLD_MS, ConfigError

if TYPE_CHECKING:  # prometheus_client loads only when --metrics-port asks for it
    from prometheus_client import CollectorRegistry

    from fecproxy.shell.history import History

__all__ = ["DemoOptions", "DemoResult", "add_arguments", "main", "run_demo"]

#: The live view is redrawn this often (without a terminal it prints a line less often, see render).
LIVE_INTERVAL_S = 1.0
#: After the station stops, the demo waits for stragglers (rebuilt datagrams, the last acks) at
#: most the flush time plus the receiver's hold time, plus this margin.
SETTLE_MARGIN_S = 0.3
SETTLE_POLL_S = 0.05


def _start_metrics(
    registry: CollectorRegistry, port: int, nursery: trio.Nursery, history: History | None = None
) -> tuple[Callable[[], None] | None, str]:
    """Serve the receiver's /metrics (and its ``history`` for the status page) from a task in
    ``nursery``; a busy port falls back to any free one, never to a crash."""
    from fecproxy.shell.metrics import serve

    try:
        server = serve(registry, LOOPBACK, port, history=history)
        nursery.start_soon(server.run)
        return server.stop, _endpoints(server.port)
    except OSError as error:
        busy = f"port {port}: {error.strerror or error}"
    if port != 0:
        try:
            server = serve(registry, LOOPBACK, 0, history=history)
            nursery.start_soon(server.run)
            return server.stop, f"{_endpoints(server.port)} ({busy}, so a free port was taken)"
        except OSError as error:
            busy += f"; any free port: {error.strerror or error}"
    return None, f"off ({busy})"


def _endpoints(port: int) -> str:
    return f"http://{LOOPBACK}:{port}/metrics, status page http://{LOOPBACK}:{port}/ (while the demo runs)"


async def run_demo(options: DemoOptions, out=None) -> DemoResult:
    """Wire everything up in one nursery, run for ``options.seconds``, wind down, return figures."""
    from fecproxy.linkmodel.impairment import LinkImpairment
    from fecproxy.shell.daemon import Daemon
    from fecproxy.shell.relay import RelayConfig, run_relay

    out = sys.stdout if out is None else out
    channel = check_options(options)
    stop_early = trio.Event()

    sink_sock = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
    telemetry_sock = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
    camera_sock = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
    stop_metrics: Callable[[], None] | None = None
    with sink_sock, telemetry_sock, camera_sock:
        for sock in (sink_sock, telemetry_sock, camera_sock):
            await sock.bind((LOOPBACK, 0))
        sink_address = sink_sock.getsockname()
        receiver_config = build_configs(options, sink_address)
        async with trio.open_nursery() as nursery:
            nursery.start_soon(_watch_signals, stop_early)
            receiver = await nursery.start(Daemon(receiver_config, handle_signals=False).run)
            impairment = LinkImpairment(loss=channel)  # a radio path is usually alike both ways
            relay = await nursery.start(
                run_relay,
                RelayConfig(
                    listen=(LOOPBACK, 0),
                    to=receiver.link_address[:2],
                    forward=impairment,
                    back=impairment,
                    seed=options.seed,
                ),
            )
            tap = LinkTap(relay.links["forward"])
            sender = await nursery.start(
                Daemon(build_configs(options, sink_address, relay.listen_address[:2]), handle_signals=False).run
            )
            stop_metrics, metrics_text = _start_metrics(
                receiver.registry, options.metrics_port, nursery, receiver.history
            )
            try:
                station, sink = Station(options.rate, options.seed), Sink(tap.lost_ids)
                out.write(
                    format_header(
                        options,
                        channel,
                        sender=sender.listen_address,
                        relay=relay.listen_address,
                        receiver=receiver.link_address,
                        sink=sink_address,
                        metrics_text=metrics_text,
                    )
                )
                out.flush()
                started = trio.current_time()
                async with trio.open_nursery() as traffic:
                    traffic.start_soon(sink.receive, sink_sock)
                    traffic.start_soon(sink.acknowledge, sink_sock)
                    traffic.start_soon(station.receive_acks, telemetry_sock)
                    traffic.start_soon(station.receive_acks, camera_sock)
                    live = LiveView(out, options.live)
                    traffic.start_soon(_live_loop, live, station, sink, tap, receiver, started)
                    async with trio.open_nursery() as sources:
                        sources.start_soon(station.telemetry, telemetry_sock, sender.listen_address)
                        sources.start_soon(station.camera, camera_sock, sender.listen_address)
                        with trio.move_on_at(started + options.seconds):
                            await stop_early.wait()
                        sources.cancel_scope.cancel()
                    ran_for = trio.current_time() - started
                    await _settle(station, sink, options, stop_early)
                    traffic.cancel_scope.cancel()

                await sender.stop()
                await receiver.stop()
                blocks = tap.finish()
                receiver_stats = receiver.decoder.stats
                classes = {
                    name: (c.source_bytes, c.repair_bytes, c.source_packets, c.repair_packets)
                    for name, c in sender.encoder.stats.classes.items()
                }
                return _result(
                    options, channel, ran_for, station, sink, tap, blocks, receiver_stats, stop_early.is_set(), classes
                )
            finally:
                if stop_metrics is not None:
                    stop_metrics()
                nursery.cancel_scope.cancel()


async def _watch_signals(stop_early) -> None:
    """SIGINT/SIGTERM end the run early but still print the summary."""
    try:
        with trio.open_signal_receiver(signal.SIGINT, signal.SIGTERM) as signals:
            async for _ in signals:
                stop_early.set()
    except RuntimeError:  # not the main thread (an embedding test): no signal handling
        await trio.sleep_forever()


async def _live_loop(live: LiveView, station: Station, sink: Sink, tap: LinkTap, receiver, started: float) -> None:
    last_arrivals, last_time = 0, started
    while True:
        await trio.sleep_until(last_time + LIVE_INTERVAL_S)
        now = trio.current_time()
        recent, sink.recent_delays = sink.recent_delays, []
        live.show(
            LiveSnapshot(
                elapsed=now - started,
                rate=(sink.arrivals - last_arrivals) / (now - last_time),
                link_packets=tap.packets,
                link_lost=tap.lost,
                source_sent=station.sent,
                source_lost=tap.source_lost,
                recovered=len(sink.rebuilt_delays),
                unrecovered=receiver.decoder.stats.unrecovered,
                pending=pending(station.sent, sink.delivered, receiver.decoder.stats.unrecovered),
                delay_p50=percentile(recent, 50),
                rebuilt_p50=percentile(sink.rebuilt_delays, 50),
                acks=station.acks,
            )
        )
        last_arrivals, last_time = sink.arrivals, now


async def _settle(station: Station, sink: Sink, options: DemoOptions, stop_early) -> None:
    """Wait until every datagram and ack is in, or the receiver must have given up on the rest."""
    limit = (options.flush_ms + min(options.flush_ms + HOLD_MARGIN_MS, MAX_HOLD_MS)) / 1000 + SETTLE_MARGIN_S
    with trio.move_on_after(limit):
        pressed = stop_early.is_set()
        while sink.delivered < station.sent or station.acks < sink.acks_sent:
            if pressed != stop_early.is_set():  # a second Ctrl-C: do not wait any longer
                return
            await trio.sleep(SETTLE_POLL_S)


def _result(options, channel, ran_for, station, sink, tap, blocks, receiver_stats, interrupted, classes) -> DemoResult:
    seen_camera = sink.seen[STREAM_CAMERA]
    complete = without = 0
    for seqs in station.image_chunks.values():
        complete += all(seq in seen_camera for seq in seqs)
        without += not any((STREAM_CAMERA, seq) in tap.lost_ids for seq in seqs)
    return DemoResult(
        seconds=ran_for,
        seed=options.seed,
        k=options.k,
        m=options.m,
        flush_ms=options.flush_ms,
        code=options.code,
        window=options.window,
        repair_interval=options.repair_interval,
        channel=channel,
        sent=station.sent,
        app_bytes=station.bytes,
        delivered=sink.delivered,
        corrupted=sink.corrupted + station.corrupted_acks,
        duplicates=sink.duplicates,
        link_source_lost=tap.source_lost,
        source_packets=tap.source_packets,
        repair_packets=tap.repair_packets,
        source_wire_bytes=tap.source_bytes,
        repair_wire_bytes=tap.repair_bytes,
        link_packets=tap.packets,
        link_lost=tap.lost,
        rebuilt_delays=list(sink.rebuilt_delays),
        intact_delays=list(sink.intact_delays),
        images_sent=station.images_sent,
        images_complete=complete,
        images_complete_without_fec=without,
        acks_sent=sink.acks_sent,
        acks_received=station.acks,
        receiver_lost=receiver_stats.lost,
        receiver_recovered=receiver_stats.recovered,
        receiver_unrecovered=receiver_stats.unrecovered,
        blocks=blocks,
        interrupted=interrupted,
        classes=classes,
    )


# --------------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------------


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        "The weather station, the radio relay and all their figures are invented for this demo. "
        "Everything runs in one process on 127.0.0.1 and ends by itself."
    )
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS, help="how long the station sends")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed of the link's losses and of the traffic")
    parser.add_argument("--loss", type=float, default=DEFAULT_LOSS, help="average packet loss of the radio relay, 0..1")
    parser.add_argument(
        "--burst", type=float, default=DEFAULT_BURST, help="mean length of a loss burst, in packets (≥ 1)"
    )
    parser.add_argument("--k", type=int, default=DEFAULT_K, help="source datagrams per block")
    parser.add_argument("--m", type=int, default=DEFAULT_M, help="repair packets per full block (0 = no protection)")
    parser.add_argument(
        "--flush-ms",
        type=int,
        default=DEFAULT_FLUSH_MS,
        help="a block not full after this many ms is closed and protected as it is",
    )
    parser.add_argument("--rate", type=float, default=DEFAULT_TELEMETRY_RATE, help="telemetry datagrams per second")
    parser.add_argument(
        "--metrics-port",
        type=int,
        default=DEFAULT_METRICS_PORT,
        help=f"serve the receiver's Prometheus metrics on {LOOPBACK}:PORT (0 = any free port; a busy port falls back "
        f"to a free one)",
    )
    parser.add_argument(
        "--code",
        choices=("block", "sliding"),
        default="block",
        help="the sender's fec.code: Reed–Solomon blocks, or the sliding-window code with the same overhead "
        "(one repair every ceil(k/m) datagrams)",
    )
    parser.add_argument(
        "--window", type=int, default=DEFAULT_WINDOW, help="with --code sliding: datagrams in the encoding window"
    )
    parser.add_argument("--no-live", action="store_true", help="no live view, only the header and the summary")


def main(args: argparse.Namespace) -> int:
    options = DemoOptions(
        seconds=args.seconds,
        seed=args.seed,
        loss=args.loss,
        burst=args.burst,
        k=args.k,
        m=args.m,
        flush_ms=args.flush_ms,
        rate=args.rate,
        metrics_port=args.metrics_port,
        live=not args.no_live,
        code=args.code,
        window=args.window,
    )
    try:
        check_options(options)
        build_configs(options, (LOOPBACK, 1), (LOOPBACK, 1))  # settings errors before any socket opens
    except DemoError as error:
        print(f"fecproxy demo: {error}", file=sys.stderr)
        return 2
    except ConfigError as error:
        for message in error.messages:
            print(f"fecproxy demo: {_option_names(message)}", file=sys.stderr)
        return 2
    try:
        result = trio.run(run_demo, options)
    except KeyboardInterrupt:  # Ctrl-C before the demo's own handler was installed: nothing to sum up
        print("fecproxy demo: interrupted while starting", file=sys.stderr)
        return 130
    print()
    print(format_summary(result), flush=True)
    return 0


_OPTION_OF_KEY = {"fec.block_size": "--k", "fec.repair": "--m", "fec.flush_ms": "--flush-ms"}


def _option_names(message: str) -> str:
    """Config messages name YAML keys; the demo's user typed options."""
    for key, option in _OPTION_OF_KEY.items():
        message = message.replace(key, option)
    return message.replace("demo sender: ", "")
