"""``fecproxy init PROFILE DIR``: write a commented config pair and a key for a kind of link.

Each profile is a starting point for a real link: its loss, burst, traffic and budgets are
assumptions stated in the files (replace them with a site survey, or with what a running pair
measures: ``fecproxy plan --from-metrics``).  The code (k, m, interleaving, flush time) is not
typed in here but chosen by the planner from those figures when the files are written, and the
files quote the ``fecproxy plan`` command that shows the same choice.  The pair is then loaded
and checked exactly as ``fecproxy check SENDER RECEIVER`` would before the command reports
success.

``fecproxy init --shipped DIR`` writes out the example configs and deploy files that ship inside
the package (systemd unit, Prometheus rules, Grafana dashboard).

Exit status: 0 = written and checked; 1 = not written (a file exists, or cannot be created);
2 = bad command line, or (a bug) the written pair does not pass its own check.
"""

from __future__ import annotations

import argparse
import os
import secrets
import sys
from dataclasses import dataclass
from pathlib import Path

EXIT_WRITTEN = 0
EXIT_NOT_WRITTEN = 1
EXIT_CHECK_FAILED = 2
#: Residual datagram loss every profile's code must reach: 1 in 1000 (the planner's default).
TARGET_RESIDUAL = 1e-3
#: Slack on top of flush + delay spread in each side's decoder.hold_ms, for scheduling delays
#: on a busy gateway (common practice, no source).
HOLD_MARGIN_MS = 100
#: Slack on top of flush + delay spread in delivery.max_wait_ms for an in-order receiver: a gap is
#: rebuilt once its block's repair arrives, and 20 ms covers the timers of a busy gateway without
#: holding a picture much longer (common practice, no source).
ORDER_MARGIN_MS = 20


@dataclass(frozen=True)
class Profile:
    """A kind of link and its traffic; every figure is an assumption to replace with measurements."""

    name: str
    title: str
    story: str  # what the link carries, in a few comment lines
    loss: float  # average packet loss of the link
    burst: float  # mean burst length in packets
    rate: float  # datagrams/s the sender sees
    latency_ms: int  # longest wait a recovered datagram may have (the sender's flush time)
    max_overhead: float  # repair packets per source packet
    max_datagram_bytes: int
    delay_spread_ms: int  # one way: how much later than a block's first packet its last may arrive
    interleave: tuple[int, ...] = (1,)
    reply_code: tuple[int, int, int] = (4, 2, 50)  # receiver's k, m, flush_ms for the replies
    flows_max: int = 64
    protect_s: int = 2
    in_order: bool = False  # the receiver delivers each flow in order (streams without their own sequence)


PROFILES = {
    profile.name: profile
    for profile in (
        Profile(
            name="telemetry-radio",
            title="narrow telemetry radio",
            story="Sensor readings of up to 200 bytes, 10 a second, over a narrowband data radio that loses\n"
            "about 3 % of packets, two in a row on average (assumed); a reading may arrive two seconds late,\n"
            "which lets a block gather 20 readings: longer blocks need less repair for the same residual loss.",
            loss=0.03,
            burst=2,
            rate=10,
            latency_ms=2000,
            max_overhead=1.0,
            max_datagram_bytes=256,
            delay_spread_ms=200,
            reply_code=(4, 2, 100),
            flows_max=32,
        ),
        Profile(
            name="microwave-video",
            title="video over a microwave hop",
            story="A camera's video stream, 2000 datagrams a second of up to 1400 bytes, over a point-to-point\n"
            "microwave hop that loses about 1 % of packets in bursts of four (rain, interference; assumed).\n"
            "Video players tolerate little delay: every datagram is rebuilt within 40 ms or given up.",
            loss=0.01,
            burst=4,
            rate=2000,
            latency_ms=40,
            max_overhead=0.25,
            max_datagram_bytes=1400,
            delay_spread_ms=5,
            reply_code=(4, 2, 20),
            flows_max=64,
            in_order=True,  # raw MPEG-TS takes a late datagram as a second fault (README, "Delivery order")
        ),
        Profile(
            name="geo-satellite",
            title="geostationary satellite with long delay",
            story="A remote site's traffic, 100 datagrams a second of up to 1200 bytes, over a geostationary\n"
            "satellite hop: about 280 ms one way (from memory), 1 % loss in fades of eight packets on average\n"
            "(assumed). Long fades call for interleaving, which the delay budget of a second affords.",
            loss=0.01,
            burst=8,
            rate=100,
            latency_ms=1000,
            max_overhead=0.5,
            max_datagram_bytes=1200,
            delay_spread_ms=100,
            interleave=(1, 2, 4, 8),
            reply_code=(8, 2, 100),
            flows_max=256,
            # A satellite round trip (~0.56 s) plus both decoders' hold: a flow that recent may
            # still wait for its reply (README, flows.protect_s).
            protect_s=4,
        ),
    )
}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        f"profiles: {', '.join(f'{p.name} ({p.title})' for p in PROFILES.values())}. "
        f"exit status: {EXIT_WRITTEN} = written and checked, {EXIT_NOT_WRITTEN} = not written (a file exists or "
        f"cannot be created), {EXIT_CHECK_FAILED} = bad command line"
    )
    parser.add_argument("profile", nargs="?", choices=sorted(PROFILES), metavar="PROFILE", help="the kind of link")
    parser.add_argument("directory", metavar="DIR", help="folder to write into (created; existing files are kept)")
    parser.add_argument(
        "--shipped",
        action="store_true",
        help="instead of a profile, write the example configs and deploy files shipped in the package",
    )


def plan_arguments(profile: Profile) -> list[str]:
    """The ``fecproxy plan`` arguments that reproduce the profile's choice."""
    argv = [
        f"--loss {profile.loss:g}",
        f"--burst {profile.burst:g}",
        f"--rate {profile.rate:g}",
        f"--latency-ms {profile.latency_ms}",
        f"--max-overhead {profile.max_overhead:g}",
    ]
    if profile.interleave != (1,):
        argv.append(f"--interleave {','.join(map(str, profile.interleave))}")
    return argv


def choose_code(profile: Profile):
    """The planner's recommendation for the profile's link (a planner Candidate)."""
    from fecproxy.linkmodel.loss_models import GilbertElliott
    from fecproxy.linkmodel.planner import PlanRequest, plan

    request = PlanRequest(
        channel=GilbertElliott.from_loss_burst(profile.loss, profile.burst),
        rate=profile.rate,
        latency_budget=profile.latency_ms / 1000,
        max_overhead=profile.max_overhead,
        target=TARGET_RESIDUAL,
        depths=profile.interleave,
    )
    chosen = plan(request).recommended
    if chosen is None:
        raise ValueError(f"profile {profile.name}: the planner finds no code within its budgets")
    return chosen


def render_pair(profile: Profile) -> dict[str, str]:
    """sender.yaml and receiver.yaml for the profile, commented."""
    code = choose_code(profile)
    reply_k, reply_m, reply_flush = profile.reply_code
    receiver_hold = profile.latency_ms + profile.delay_spread_ms + HOLD_MARGIN_MS
    max_wait = profile.latency_ms + profile.delay_spread_ms + ORDER_MARGIN_MS
    delivery = (
        "delivery:\n"
        + '  order: in_order              # each flow in the sender\'s order (README, "Delivery order")\n'
        + f"  max_wait_ms: {max_wait}              # flush {profile.latency_ms} ms + delay spread "
        f"{profile.delay_spread_ms} ms + {ORDER_MARGIN_MS} ms; then a gap is skipped\n\n"
        if profile.in_order
        else ""
    )
    sender_hold = reply_flush + profile.delay_spread_ms + HOLD_MARGIN_MS
    short = f" (blocks close short at this rate: k'={code.k_effective} m'={code.m_effective})" if code.short else ""
    head = (
        f"# fecproxy {{side}} — profile {profile.name}: {profile.title}.\n"
        f"# Written by `fecproxy init {profile.name}`; a starting point, not a measurement.\n#\n"
        + "".join(f"# {line}\n" for line in profile.story.splitlines())
        + "#\n# The figures above are assumptions: replace them with a site survey, or with what this pair\n"
        "# measures once it runs (`fecproxy plan --from-metrics URL` on the receiver's metrics).\n"
    )
    plan_line = (
        f"# The code is the planner's choice for that link (residual loss target {TARGET_RESIDUAL:g}):\n"
        f"#   fecproxy plan {' '.join(plan_arguments(profile))}\n"
        f"#   -> k={code.k} m={code.m} interleave D={code.depth}{short}: residual datagram loss "
        f"{code.residual_loss:.3g}, overhead {code.overhead:.3f}, block span {code.span * 1000:.0f} ms\n"
        f"#\n# Check the pair with:\n"
        f"#   fecproxy check --delay-spread-ms {profile.delay_spread_ms} sender.yaml receiver.yaml\n"
        "# Addresses: 192.0.2.0/24 and 198.51.100.0/24 are documentation ranges (RFC 5737): replace them.\n"
    )
    auth = (
        "auth:\n"
        "  key_file: link.key           # made by `fecproxy init`; copy the same file to the other side (mode 0600)\n"
    )
    metrics_note = '  # loopback only: the metrics and status page are for this host (README "Metrics port")\n'
    sender = (
        head.format(side="sender")
        + plan_line
        + "\nrole: sender\n\n"
        + "listen: 127.0.0.1:5000            # the applications send here\n\n"
        + "link:\n  bind: 0.0.0.0:7000           # the link side of this gateway\n"
        + "  peer: 192.0.2.10:7000        # the receiver\n\n"
        + "fec:\n"
        + f"  block_size: {code.k}\n  repair: {code.m}\n  interleave: {code.depth}\n"
        + f"  flush_ms: {profile.latency_ms}             # a block not full by then is closed and protected\n"
        + f"  max_datagram_bytes: {profile.max_datagram_bytes}\n\n"
        + "decoder:\n"
        + f"  hold_ms: {sender_hold}                # the receiver's reply flush {reply_flush} ms + delay spread "
        f"{profile.delay_spread_ms} ms + {HOLD_MARGIN_MS} ms\n\n"
        + f"flows:\n  max: {profile.flows_max}\n  protect_s: {profile.protect_s}\n\n"
        + auth
        + "\nmetrics:\n"
        + metrics_note
        + "  listen: 127.0.0.1:11464\n"
    )
    receiver = (
        head.format(side="receiver")
        + plan_line
        + "\nrole: receiver\n\n"
        + "forward: 127.0.0.1:6000           # the application server on this host\n\n"
        + "link:\n  bind: 0.0.0.0:7000           # the sender's link.peer points here\n"
        + "  peer: 198.51.100.20:7000     # the sender's link.bind (omit to learn it from keyed traffic)\n\n"
        + "fec:                           # protects the replies sent back\n"
        + f"  block_size: {reply_k}\n  repair: {reply_m}\n  flush_ms: {reply_flush}\n"
        + f"  max_datagram_bytes: {profile.max_datagram_bytes}   # the same on both sides\n\n"
        + "decoder:\n"
        + f"  hold_ms: {receiver_hold}               # the sender's flush {profile.latency_ms} ms + delay spread "
        f"{profile.delay_spread_ms} ms + {HOLD_MARGIN_MS} ms\n\n"
        + delivery
        + f"flows:\n  max: {profile.flows_max}                      # at least the sender's\n"
        f"  protect_s: {profile.protect_s}\n\n" + auth + "\nmetrics:\n" + metrics_note + "  listen: 127.0.0.1:11465\n"
    )
    return {"sender.yaml": sender, "receiver.yaml": receiver}


def _create(path: Path, data: bytes, mode: int) -> None:
    """Create ``path`` (never overwrite), with ``mode`` whatever the umask."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NOFOLLOW", 0)
    descriptor = os.open(path, flags, mode)
    try:
        os.fchmod(descriptor, mode)
        os.write(descriptor, data)
    finally:
        os.close(descriptor)


def write_profile(profile: Profile, directory: Path) -> list[Path]:
    from fecproxy.protocol.keys import KEY_BYTES, format_key_text

    files = {name: text.encode() for name, text in render_pair(profile).items()}
    files["link.key"] = format_key_text(secrets.token_bytes(KEY_BYTES)).encode("ascii")
    return _write_all(
        directory, [(name, data, 0o600 if name.endswith(".key") else 0o644) for name, data in files.items()]
    )


def write_shipped(directory: Path) -> list[Path]:
    from fecproxy.examples import shipped_files

    return _write_all(directory, [(path, resource.read_bytes(), 0o644) for path, resource in shipped_files()])


def _write_all(directory: Path, files: list[tuple[str, bytes, int]]) -> list[Path]:
    """Write every file or none: existing ones are refused before anything is written."""
    targets = [directory / name for name, _, _ in files]
    existing = [str(path) for path in targets if os.path.lexists(path)]
    if existing:
        raise FileExistsError(", ".join(existing))
    for (_, data, mode), path in zip(files, targets, strict=True):
        path.parent.mkdir(parents=True, exist_ok=True)
        _create(path, data, mode)
    return targets


def check_written(directory: Path, delay_spread_ms: int) -> list[str]:
    """Load and pair-check what was written; the faults and warnings as lines."""
    from fecproxy.config import ConfigError, load_config
    from fecproxy.config.advice import warnings_for
    from fecproxy.config.pair import Side, check_pair

    sides = []
    lines: list[str] = []
    for name in ("sender.yaml", "receiver.yaml"):
        path = directory / name
        try:
            config = load_config(path)
        except ConfigError as error:
            return list(error.messages)
        sides.append(Side(config, str(path)))
        lines += warnings_for(config, str(path))
    findings = check_pair(sides[0], sides[1], delay_spread_ms)
    errors = [finding.line() for finding in findings if finding.error]
    return errors or lines + [finding.line() for finding in findings]


def main(args: argparse.Namespace) -> int:
    directory = Path(args.directory)
    if args.shipped == (args.profile is not None):
        print("fecproxy init: give either a PROFILE or --shipped", file=sys.stderr)
        return EXIT_CHECK_FAILED
    try:
        if args.shipped:
            written = write_shipped(directory)
        else:
            written = write_profile(PROFILES[args.profile], directory)
    except FileExistsError as error:
        print(f"{error.args[0]}: already exists; nothing written (choose an empty folder)", file=sys.stderr)
        return EXIT_NOT_WRITTEN
    except OSError as error:
        print(f"{directory}: cannot write: {error.strerror or error}", file=sys.stderr)
        return EXIT_NOT_WRITTEN
    for path in written:
        print(path)
    if args.shipped:
        return EXIT_WRITTEN
    profile = PROFILES[args.profile]
    problems = check_written(directory, profile.delay_spread_ms)
    errors = [line for line in problems if ": warning: " not in line]
    for line in problems:
        print(line, file=sys.stderr)
    if errors:
        return EXIT_CHECK_FAILED
    print(
        f"checked: fecproxy check --delay-spread-ms {profile.delay_spread_ms} {directory / 'sender.yaml'} "
        f"{directory / 'receiver.yaml'} passes. Edit the addresses, copy receiver.yaml and link.key to the "
        f"receiver's host (the key over a channel you trust)."
    )
    return EXIT_WRITTEN
