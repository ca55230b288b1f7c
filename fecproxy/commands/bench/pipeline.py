"""``fecproxy bench pipeline``: datagram throughput and added delay of a fecproxy pair, beside plain relays.

What it measures, on 127.0.0.1, side by side in one run:

* the highest offered rate of 1200-byte datagrams that crosses (a) two chained plain relays
  built on the same socket layer (:mod:`fecproxy.shell.udp`) but without FEC, and (b) a fecproxy
  sender/receiver pair with k=16, m=4 on a clean link, with less than 0.1 % loss; and their ratio;
* the one-way delay (p50/p99) of datagrams through the pair and through no relay at all
  ("direct"), at a moderate rate, and the difference ("added").

Every part is its own process, so each relay gets a core when one is free: a generator that
sends paced batches (one GSO ``sendmsg`` per batch) with a trial id, a sequence number and a send
timestamp in each payload; a sink that counts distinct sequence numbers (so loss and duplicates
are exact) and, for delay trials, keeps ``now − timestamp`` per datagram (CLOCK_MONOTONIC is
system-wide, so both ends read the same clock).  The rate search alternates trials between the
two pipelines, so a noisy neighbour on a shared machine hurts neither figure more than the
other.  This is a benchmark that prints figures, never a pass/fail test.

With ``--loss P [--burst B]`` a second pair runs beside the first, its link crossing a relay
that applies the seeded link model of :mod:`fecproxy.linkmodel.impairment`; its rate search
passes a trial while the residual loss stays within what :mod:`fecproxy.linkmodel.planner`
predicts for that channel, and the report gives its rate over the clean pair's, same run.

This module starts the processes and runs the search; the pure search and the report live in
:mod:`.search`, the child processes in :mod:`.processes`.
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import os
import secrets
import sys
import tempfile
import time
from array import array
from pathlib import Path

from fecproxy.commands.bench.options import positive
from fecproxy.commands.bench.processes import (
    DATAGRAM_BYTES,
    SOCKET_BUFFER_BYTES,
    daemon_main,
    generator_main,
    link_channel,
    relay_main,
    sink_main,
)
from fecproxy.commands.bench.search import (  # noqa: F401  (re-exported: the pipeline's public names)
    GENERATOR_SHORTFALL,
    LOSS_LIMIT,
    SEARCH_PRECISION,
    STEP_UP,
    DelayFigures,
    DelaySample,
    PipelineResult,
    RateSearch,
    Trial,
    format_result,
    residual_allowance,
    summarize_delays,
)
from fecproxy.linkmodel.planner import evaluate
from fecproxy.protocol.keys import KEY_BYTES, format_key_text

#: The block shape under test: k=16, m=4, the config defaults.
BLOCK_SIZE = 16
REPAIR = 4
#: After the generator's last datagram, how long the sink keeps counting: queued datagrams in
#: two 4 MiB buffers drain in well under this at any rate a relay sustains.
DRAIN_S = 0.3
#: Default trial length: long enough that two 4 MiB buffers (~60 ms at 100 000/s) cannot hide
#: a relay that is slightly too slow, short enough for ~15 trials per pipeline in the budget.
DEFAULT_TRIAL_SECONDS = 2.0
#: Default time for the whole rate search (both pipelines); with start-up and the delay trials
#: a default run stays under two minutes.
DEFAULT_SEARCH_BUDGET_S = 85.0
DEFAULT_START_RATE = 20_000.0
#: Above this the search stops stepping up (a sanity bound far beyond 2 cores of Python).
DEFAULT_MAX_RATE = 400_000.0
#: A moderate rate for delay trials, far below the pair's limit, so queues stay short and the
#: figures show the pair's own delay rather than congestion.
DEFAULT_DELAY_RATE = 5_000.0
DEFAULT_DELAY_SECONDS = 1.0
#: Delay trials are repeated (direct, plain and pair in turn, the order rotating) and each figure
#: is the median of the repetitions: on a shared machine one noisy second can move a p99 several
#: fold, and a median of five is robust to two such seconds (common practice, no source).
DEFAULT_DELAY_REPEATS = 5
#: The paths of the delay trials, in the order of the first repetition.
DELAY_PATHS = ("direct", "plain", "pair")
#: Seed of the impaired link's loss pattern: the same losses every run.
DEFAULT_SEED = 5510
#: Link loss the --loss option accepts: at half the packets lost, no useful code is left to
#: measure (the planner's figures for m ≤ k would all be failures).
MAX_LINK_LOSS = 0.5
#: Seconds a child process gets to start (spawn imports numpy and trio) or to stop.
PROCESS_START_TIMEOUT_S = 30.0
PROCESS_STOP_TIMEOUT_S = 3.0


class _Bench:
    """Owns the child processes; every one is stopped (by its own handle) on exit."""

    def __init__(
        self,
        k: int,
        m: int,
        trial_seconds: float,
        impairment: tuple | None = None,
        predicted_residual: float = 0.0,
        auth_mode: str = "off",
        code: str = "block",
    ):
        self.k, self.m, self.trial_seconds = k, m, trial_seconds
        self.code = code  # the senders' fec.code
        self.auth_mode = auth_mode  # off, mac or encrypt: the pairs' auth section
        self.key_dir = tempfile.TemporaryDirectory(prefix="fecproxy-bench-") if auth_mode != "off" else None
        if self.key_dir is not None:
            write_bench_key(Path(self.key_dir.name) / BENCH_KEY_FILE)
        self.impairment = impairment  # (loss, burst, seed) of the lossy pair's link, or None
        self.predicted_residual = predicted_residual
        self.context = multiprocessing.get_context("spawn")
        self.processes: list = []
        self.connections: list = []
        self.pids: dict[str, int] = {}  # role -> process id, for CPU accounting
        self.trial_id = 0

    def __enter__(self) -> _Bench:
        try:
            self.generator = self._start("generator", generator_main)
            self.sink = self._start("sink", sink_main)
            self.sink_address = self._reply(self.sink)
            self._reply(self.generator)
            relay2_address = self._reply(self._start("plain relay 2", relay_main, self.sink_address))
            self.plain_address = self._reply(self._start("plain relay 1", relay_main, relay2_address))
            self.pair_address = self._pair("", self.sink_address)
            if self.impairment is not None:
                self.lossy_address = self._pair("lossy ", self.sink_address, self.impairment)
                # The same relay hop with no loss: the reference the lossy pair is compared with,
                # so the relay's own CPU on this shared box does not count as the cost of loss.
                lossless = (0.0, None, self.impairment[2])
                self.relayed_address = self._pair("relayed ", self.sink_address, lossless)
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def __exit__(self, *exc) -> None:
        for conn in (getattr(self, "generator", None), getattr(self, "sink", None)):
            if conn is not None:
                try:
                    conn.send(None)
                except OSError:
                    pass
        for process in reversed(self.processes):
            if process.is_alive():
                process.terminate()  # SIGTERM: daemons flush and exit 0, relays just exit
        for process in self.processes:
            process.join(PROCESS_STOP_TIMEOUT_S)
            if process.is_alive():
                process.kill()
                process.join(PROCESS_STOP_TIMEOUT_S)
            process.close()
        for conn in self.connections:
            conn.close()
        if self.key_dir is not None:
            self.key_dir.cleanup()

    def _start(self, role: str, target, *args):
        parent, child = self.context.Pipe()
        process = self.context.Process(target=target, args=(child, *args), daemon=True, name=f"bench {role}")
        process.start()
        child.close()
        self.processes.append(process)
        self.connections.append(parent)
        assert process.pid is not None  # set by start()
        self.pids[role] = process.pid
        return parent

    def _pair(self, prefix: str, forward: tuple, impairment: tuple | None = None) -> tuple:
        """Start a receiver and a sender (with a lossy link relay between them when impaired);
        return the sender's application address."""
        fec: dict = {"block_size": self.k, "repair": self.m}
        if self.code == "sliding":  # the same overhead m/k: one repair every ceil(k/m) datagrams
            fec.update(code="sliding", size_classes=[], repair_interval=min(32, math.ceil(self.k / max(self.m, 1))))
        extra = auth_section(self.auth_mode)
        receiver_link, _ = self._daemon(
            f"{prefix}receiver",
            {
                "role": "receiver",
                "forward": _text(forward),
                "link": {"bind": "127.0.0.1:0"},
                "fec": fec,
                "sockets": _socket_section(),
                "log": {"level": "warning"},
                **extra,
            },
        )
        peer = receiver_link
        if impairment is not None:
            peer = self._reply(self._start(f"{prefix}link relay", relay_main, receiver_link, impairment))
        _, sender_listen = self._daemon(
            f"{prefix}sender",
            {
                "role": "sender",
                "listen": "127.0.0.1:0",
                "link": {"bind": "127.0.0.1:0", "peer": _text(peer)},
                "fec": fec,
                "sockets": _socket_section(),
                "log": {"level": "warning"},
                **extra,
            },
        )
        return sender_listen

    def _daemon(self, role: str, document: dict) -> tuple:
        key_dir = self.key_dir.name if self.key_dir is not None else None
        return self._reply(self._start(role, daemon_main, document, key_dir))

    def _cpu_seconds(self) -> dict[str, float]:
        """CPU seconds so far per role, for the roles whose figure can be read."""
        return {role: cpu for role, pid in self.pids.items() if (cpu := _process_cpu_seconds(pid)) is not None}

    @staticmethod
    def _reply(conn):
        if not conn.poll(PROCESS_START_TIMEOUT_S):
            raise RuntimeError("a benchmark process did not start in time")
        return conn.recv()

    def target(self, pipeline: str) -> tuple:
        return {
            "plain": self.plain_address,
            "pair": self.pair_address,
            "direct": self.sink_address,
            "lossy": getattr(self, "lossy_address", None),
            "relayed": getattr(self, "relayed_address", None),
        }[pipeline]

    def run_trial(self, pipeline: str, rate: float, seconds: float, keep_delays: bool = False):
        self.trial_id += 1
        count = max(1, int(rate * seconds))
        self.sink.send(("begin", self.trial_id, count, keep_delays))
        self._reply(self.sink)
        cpu_before = self._cpu_seconds()
        self.generator.send(("run", self.target(pipeline), rate, count, self.trial_id))
        sent, elapsed = self._wait(self.generator, seconds)
        time.sleep(DRAIN_S)
        self.sink.send(("end",))
        counts = self._reply(self.sink)
        cpu_after = self._cpu_seconds()
        stages = ("generator", *PIPELINE_STAGES.get(pipeline, ()), "sink")
        cpu_us = {
            role: (cpu_after[role] - cpu_before[role]) / max(sent, 1) * 1e6
            for role in stages
            if role in cpu_after and role in cpu_before
        }
        limit = LOSS_LIMIT
        if pipeline == "lossy":
            limit = residual_allowance(self.predicted_residual, sent, self.m)
        trial = Trial(
            pipeline,
            rate,
            sent / elapsed if elapsed > 0 else rate,
            sent,
            counts["received"],
            counts["duplicates"],
            cpu_us,
            limit,
        )
        delays = array("q")
        if counts["delays"]:
            delays.frombytes(counts["delays"])
        return trial, delays

    @staticmethod
    def _wait(conn, seconds: float):
        if not conn.poll(seconds * 3 + PROCESS_START_TIMEOUT_S):
            raise RuntimeError("the generator stopped answering")
        return conn.recv()


#: The processes a datagram crosses between generator and sink, per pipeline.
PIPELINE_STAGES = {
    "plain": ("plain relay 1", "plain relay 2"),
    "pair": ("sender", "receiver"),
    "lossy": ("lossy sender", "lossy link relay", "lossy receiver"),
    "relayed": ("relayed sender", "relayed link relay", "relayed receiver"),
    "direct": (),
}


def _process_cpu_seconds(pid: int) -> float | None:
    """User + system CPU seconds of a process so far (Linux /proc); None elsewhere."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as file:
            fields = file.read().rsplit(b")", 1)[1].split()
    except (OSError, IndexError):
        return None
    # proc(5): after the ")" closing the command name, utime and stime are fields 12 and 13.
    return (int(fields[11]) + int(fields[12])) / _CLOCK_TICKS


_CLOCK_TICKS = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100


#: The benchmark's key file, written fresh (mode 0600) in a temporary directory per run.
BENCH_KEY_FILE = "bench.key"
AUTH_MODES = ("off", "mac", "encrypt")


def write_bench_key(path: Path) -> None:
    """A fresh random key file, owner-only, as ``fecproxy keygen`` would make it."""
    descriptor = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(descriptor, "w") as file:
        file.write(format_key_text(secrets.token_bytes(KEY_BYTES)))


def auth_section(mode: str) -> dict:
    """The config's auth section for a benchmark mode: off, mac (tags) or encrypt."""
    if mode == "off":
        return {}
    return {"auth": {"key_file": BENCH_KEY_FILE, "encrypt": mode == "encrypt"}}


def _text(address: tuple) -> str:
    return f"{address[0]}:{address[1]}"


def _socket_section() -> dict:
    return {"receive_buffer_bytes": SOCKET_BUFFER_BYTES, "send_buffer_bytes": SOCKET_BUFFER_BYTES}


def _percentile_us(values, q: float) -> float:
    import numpy as np

    return float(np.percentile(np.frombuffer(values, dtype=np.int64), q)) / 1000 if len(values) else math.nan


def run_pipeline_bench(
    *,
    k: int = BLOCK_SIZE,
    m: int = REPAIR,
    trial_seconds: float = DEFAULT_TRIAL_SECONDS,
    budget_seconds: float = DEFAULT_SEARCH_BUDGET_S,
    start_rate: float = DEFAULT_START_RATE,
    max_rate: float = DEFAULT_MAX_RATE,
    delay_rate: float = DEFAULT_DELAY_RATE,
    delay_seconds: float = DEFAULT_DELAY_SECONDS,
    delay_repeats: int = DEFAULT_DELAY_REPEATS,
    link_loss: float | None = None,
    link_burst: float | None = None,
    seed: int = DEFAULT_SEED,
    auth_mode: str = "off",
    code: str = "block",
    progress=None,
) -> PipelineResult:
    """Start every process, search the pipelines' rates in alternation, then measure delay.

    With ``link_loss`` a third pipeline runs: a second pair whose link crosses an in-process
    impairment (loss ``link_loss``, i.i.d. or with mean burst ``link_burst``); it passes a trial
    while its residual loss stays within the planner's prediction for that channel.
    """
    say = progress or (lambda line: None)
    impairment = predicted = None
    pipelines = ["plain", "pair"]
    if link_loss is not None:
        impairment = (link_loss, link_burst, seed)
        predicted = evaluate(link_channel(link_loss, link_burst), k, m).residual_loss
        pipelines += ["lossy", "relayed"]
    say(
        f"starting the benchmark processes; then a rate search of up to {budget_seconds:g} s "
        f"(trials of {trial_seconds:g} s, {', '.join(pipelines)} in turn) and delay trials"
    )
    with _Bench(k, m, trial_seconds, impairment, predicted or 0.0, auth_mode, code) as bench:
        for pipeline in pipelines:  # warm-up: flows opened, sessions learned
            bench.run_trial(pipeline, min(start_rate, 2000.0), 0.2)
        searches = [RateSearch(pipeline, start_rate, max_rate) for pipeline in pipelines]
        began = time.monotonic()
        deadline = began + budget_seconds
        while time.monotonic() < deadline:
            stepped = False
            for search in searches:
                rate = search.next_rate()
                if rate is None or time.monotonic() >= deadline:
                    continue
                trial, _ = bench.run_trial(search.pipeline, rate, trial_seconds)
                search.record(trial)
                stepped = True
                say(
                    f"  {time.monotonic() - began:5.0f}/{budget_seconds:g} s  {trial.pipeline:>7}: asked "
                    f"{trial.asked:>9,.0f}/s sent {trial.offered:>9,.0f}/s loss {trial.loss:8.4%} "
                    f"{'pass' if trial.passed else 'FAIL'}"
                )
            if not stepped:
                break
        for search in searches:
            search.stopped = search.stopped or "time budget"
        say(
            f"rate search done; one-way delay trials at {delay_rate:,.0f}/s "
            f"({delay_repeats} × {len(DELAY_PATHS)} × {delay_seconds:g} s)"
        )
        repetitions = []
        for repeat in range(delay_repeats):
            # Rotate the order so no path always runs first (after the search) or last.
            order = DELAY_PATHS[repeat % len(DELAY_PATHS) :] + DELAY_PATHS[: repeat % len(DELAY_PATHS)]
            samples = {}
            for path in order:
                trial, values = bench.run_trial(path, delay_rate, delay_seconds, keep_delays=True)
                samples[path] = DelaySample(
                    path, trial.offered, len(values), trial.loss, _percentile_us(values, 50), _percentile_us(values, 99)
                )
            repetitions.append([samples[path] for path in DELAY_PATHS])
        delays, added_delays = summarize_delays(repetitions)
    plain, pair, *lossy = searches  # lossy: [] or [lossy, relayed]
    result = PipelineResult(
        datagram_bytes=DATAGRAM_BYTES,
        k=k,
        m=m,
        trial_seconds=trial_seconds,
        plain_rate=plain.best,
        pair_rate=pair.best,
        plain_stopped=plain.stopped,
        pair_stopped=pair.stopped,
        delays=delays,
        trials=[trial for search in searches for trial in search.trials],
        added_delays=added_delays,
    )
    if lossy:
        result.link_loss, result.link_burst, result.predicted_residual = link_loss, link_burst, predicted
        result.lossy_rate, result.lossy_stopped = lossy[0].best, lossy[0].stopped
        result.relayed_rate, result.relayed_stopped = lossy[1].best, lossy[1].stopped
    return result


def _probability(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0 < value < MAX_LINK_LOSS:
        raise argparse.ArgumentTypeError(f"loss must be in (0, {MAX_LINK_LOSS}), got {text!r}")
    return value


def _burst(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 1 <= value <= 1000:
        raise argparse.ArgumentTypeError(f"mean burst must be in [1, 1000] packets, got {text!r}")
    return value


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.description = (
        "Highest rate of 1200-byte datagrams with < 0.1 % loss through two plain relays and through "
        "a fecproxy pair on loopback, side by side, and the one-way delay the pair adds."
    )
    parser.add_argument(
        "--trial-seconds", type=positive(float), default=DEFAULT_TRIAL_SECONDS, help="length of each rate trial"
    )
    parser.add_argument(
        "--budget-seconds",
        type=positive(float),
        default=DEFAULT_SEARCH_BUDGET_S,
        help="time for the rate search of both pipelines together",
    )
    parser.add_argument(
        "--start-rate", type=positive(float), default=DEFAULT_START_RATE, help="first rate tried (datagrams/s)"
    )
    parser.add_argument(
        "--max-rate",
        type=positive(float),
        default=DEFAULT_MAX_RATE,
        help="the search does not step above this rate (datagrams/s)",
    )
    parser.add_argument(
        "--delay-rate",
        type=positive(float),
        default=DEFAULT_DELAY_RATE,
        help="rate of the one-way delay trials (datagrams/s)",
    )
    parser.add_argument(
        "--delay-seconds", type=positive(float), default=DEFAULT_DELAY_SECONDS, help="length of each delay trial"
    )
    parser.add_argument(
        "--delay-repeats",
        type=positive(int),
        default=DEFAULT_DELAY_REPEATS,
        help="repetitions of the delay trials; figures are their median with the range beside it",
    )
    parser.add_argument("--block-size", type=positive(int), default=BLOCK_SIZE, help="k of the fecproxy pair")
    parser.add_argument("--repair", type=int, default=REPAIR, help="m of the fecproxy pair")
    parser.add_argument(
        "--loss",
        type=_probability,
        default=None,
        help="also search a pair whose link loses this share of packets (e.g. 0.05), "
        "passing while residual loss stays within the planner's prediction",
    )
    parser.add_argument(
        "--burst",
        type=_burst,
        default=None,
        help="mean loss burst length in packets for --loss (Gilbert model); default i.i.d.",
    )
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed of the impaired link's losses")
    parser.add_argument(
        "--code",
        choices=("block", "sliding"),
        default="block",
        help="the pair's fec.code: blocks of --block-size/--repair, or the sliding-window code at their overhead "
        "(one repair every ceil(k/m) datagrams, window 32)",
    )
    parser.add_argument(
        "--auth",
        choices=AUTH_MODES,
        default="off",
        help="the pairs' packet protection: none, tags (mac) or tags with encryption",
    )
    parser.add_argument(
        "--quick", action="store_true", help="a few short trials at low rates (a smoke test, not a measurement)"
    )
    parser.add_argument("--json", action="store_true", help="print the result as JSON instead of a table")
    parser.add_argument(
        "--quiet", action="store_true", help="no progress lines on stderr (by default each trial is shown as it ends)"
    )


def main(args: argparse.Namespace) -> int:
    if not (0 <= args.repair <= args.block_size and args.block_size + args.repair <= 255):
        print(
            f"fecproxy bench pipeline: need 0 ≤ repair ≤ block-size and block-size + repair ≤ 255, "
            f"got {args.block_size} and {args.repair}",
            file=sys.stderr,
        )
        return 2
    settings = dict(
        k=args.block_size,
        m=args.repair,
        trial_seconds=args.trial_seconds,
        budget_seconds=args.budget_seconds,
        start_rate=args.start_rate,
        max_rate=args.max_rate,
        delay_rate=args.delay_rate,
        delay_seconds=args.delay_seconds,
        delay_repeats=args.delay_repeats,
        link_loss=args.loss,
        link_burst=args.burst,
        seed=args.seed,
        auth_mode=args.auth,
        code=args.code,
    )
    if args.burst is not None and args.loss is None:
        print("fecproxy bench pipeline: --burst needs --loss", file=sys.stderr)
        return 2
    if args.quick:
        settings.update(
            trial_seconds=0.2,
            budget_seconds=2.2,
            start_rate=1000.0,
            max_rate=2000.0,
            delay_rate=1000.0,
            delay_seconds=0.2,
            delay_repeats=2,
        )
    progress = None if args.quiet else (lambda line: print(line, file=sys.stderr, flush=True))
    result = run_pipeline_bench(progress=progress, **settings)
    if args.json:
        print(json.dumps(result.as_dict(), indent=2))
    else:
        print(format_result(result))
    return 0
