"""``fecproxy plan``: choose k, m and interleave depth for a link, or evaluate one code on it.

The arithmetic lives in :mod:`fecproxy.linkmodel.planner`; this module reads the options, prints a
table (:mod:`.report`) or JSON, and turns bad input into one-line errors; a running receiver's
metrics page is read by :mod:`.metrics_page`.
"""

from __future__ import annotations

import argparse
import json
import math
import sys

from fecproxy.linkmodel import sliding_sim
from fecproxy.linkmodel.airtime import DEFAULT_QUEUE_MS, BudgetError, LinkBudget, parse_rate
from fecproxy.linkmodel.loss_models import (
    ChannelConfigError,
    GilbertElliott,
    channel_from_estimate,
    channel_from_figures,
)
from fecproxy.linkmodel.order_wait import in_order_wait
from fecproxy.linkmodel.planner import (
    DEFAULT_K_VALUES,
    DEFAULT_LATENCY_BUDGET_S,
    DEFAULT_MAX_OVERHEAD,
    DEFAULT_SHORT_BLOCK_RULE,
    DEFAULT_TARGET,
    SENDER_MAX_INTERLEAVE,
    PlanError,
    PlanRequest,
    block_span,
    effective_code,
    evaluate,
    parse_int_list,
    plan,
)
from fecproxy.protocol.repair_rule import SHORT_BLOCK_RULES

from .metrics_page import (
    DEFAULT_METRICS_TIMEOUT,
    LINK_BURST_GAUGE,
    LINK_LOSS_GAUGE,
    MetricsError,
    link_from_metrics,
    parse_prometheus_text,
    read_metrics,
)
from .report import _channel_dict, _order_wait_line, format_table

#: Defaults for a small interactive or telemetry flow (the planner's, shared with the daemon's
#: status page); users with other needs say so on the command line.
DEFAULT_LATENCY_MS = DEFAULT_LATENCY_BUDGET_S * 1000.0

CONVENTION = (
    "Loss model convention (Gilbert 1960; Elliott 1963): a two-state Markov chain advances once per "
    "packet; p = P(good→bad), r = P(bad→good); a packet is lost with probability loss_good in the good "
    "state and loss_bad in the bad state (defaults 0 and 1: the simple Gilbert channel). "
    "--loss P --burst B gives r = 1/B, p = P/(B(1−P)); --loss alone means independent losses."
)
EPILOG = (
    CONVENTION + " Residual loss is exact (binomial for independent loss; the forward recursion of "
    "Cidon, Khamisy & Sidi 1993 for Gilbert–Elliott), with the k source packets sent before the m "
    "repair packets and a block's packets D positions apart when interleaving at depth D. "
    "When the rate cannot fill a block within the flush time, the sender closes it with k' < k "
    "datagrams and m' repair packets by its short-block rule (proportional: m' = ceil(m·k'/k), at least 1; "
    "full: m' = m); the figures are those of (k', m'), and the overhead budget applies to m'/k'. "
    "With --mean-bytes and --max-bytes (the datagram sizes of the flow, or of one fec.size_classes class) "
    "the byte overhead m'·(repair header + symbol prefix + max)/(k'·(source header + mean)) is shown and can be "
    "budgeted (--max-byte-overhead), and m' is cut as the sender cuts it to keep repair bytes at or below "
    f"source bytes (RFC 6363 §8.2). Interleave depths go up to the sender's fec.interleave limit, "
    f"{SENDER_MAX_INTERLEAVE}. "
    "Exit status: 0 with a recommendation (or in evaluation mode), 1 when no candidate meets the "
    "target within the budgets, 2 on bad input."
)


#: Options without a default: absent from the namespace until given (argparse.SUPPRESS keeps
#: "(default: None)" out of --help); :func:`_fill_unset` puts None back before use.
_UNSET_OPTIONS = (
    "sliding_window",
    "repair_interval",
    "sim_datagrams",
    "seed",
    "loss",
    "burst",
    "ge_p",
    "ge_r",
    "ge_loss_good",
    "ge_loss_bad",
    "from_metrics",
    "rate",
    "flush_ms",
    "k",
    "m",
    "mean_bytes",
    "max_bytes",
    "max_byte_overhead",
    "link_rate",
    "datagram_bytes",
    "burst_datagrams",
    "queue_ms",
)


def _fill_unset(args: argparse.Namespace) -> argparse.Namespace:
    for name in _UNSET_OPTIONS:
        if not hasattr(args, name):
            setattr(args, name, None)
    return args


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = EPILOG
    parser.argument_default = argparse.SUPPRESS
    link = parser.add_argument_group("link (choose one form)")
    link.add_argument("--loss", type=float, help="average packet loss ratio of the link, 0..1")
    link.add_argument("--burst", type=float, help="mean burst length in packets (≥ 1); needs --loss")
    link.add_argument("--ge-p", type=float, help="Gilbert–Elliott p = P(good→bad) per packet")
    link.add_argument("--ge-r", type=float, help="Gilbert–Elliott r = P(bad→good) per packet")
    link.add_argument("--ge-loss-good", type=float, help="loss probability in the good state (default 0)")
    link.add_argument("--ge-loss-bad", type=float, help="loss probability in the bad state (default 1)")
    link.add_argument(
        "--from-metrics",
        metavar="URL",
        help=f"read {LINK_LOSS_GAUGE} and {LINK_BURST_GAUGE} from a receiver's metrics at URL "
        "(host:port as in its metrics.listen, or http://host:port/metrics)",
    )
    link.add_argument(
        "--metrics-select",
        metavar="LABEL=VALUE",
        action="append",
        default=[],
        help="with --from-metrics: keep only samples carrying this label (repeatable)",
    )
    link.add_argument(
        "--metrics-timeout", type=float, default=DEFAULT_METRICS_TIMEOUT, help="seconds to wait for the metrics page"
    )

    need = parser.add_argument_group("traffic and budgets")
    need.add_argument("--rate", type=float, help="datagrams per second the sender sees (required to plan)")
    need.add_argument(
        "--latency-ms", type=float, default=DEFAULT_LATENCY_MS, help="longest wait a recovered datagram may have"
    )
    need.add_argument(
        "--flush-ms",
        type=float,
        help="time after which the sender closes a block that has not filled (default: the latency budget); "
        "at low rates a block holds only rate·flush/D datagrams, and that effective k is what is evaluated",
    )
    need.add_argument(
        "--short-block-repair",
        choices=SHORT_BLOCK_RULES,
        default=DEFAULT_SHORT_BLOCK_RULE,
        help="the sender's fec.short_block_repair: repair packets of a block the flush timer closes short "
        "(proportional: ceil(m·k'/k), at least 1; full: m)",
    )
    need.add_argument(
        "--max-overhead",
        type=float,
        default=DEFAULT_MAX_OVERHEAD,
        help="largest m'/k' on the link (≤ 1, RFC 6363 §8.2; above 1 with --allow-repair-above-source)",
    )
    need.add_argument(
        "--allow-repair-above-source",
        action="store_true",
        default=False,
        help="the sender's fec.allow_repair_above_source: overheads above 1 and m ≥ k (repetition-like codes "
        "for low-rate telemetry)",
    )
    need.add_argument("--target", type=float, default=DEFAULT_TARGET, help="residual datagram loss to reach")
    need.add_argument(
        "--mean-bytes", type=float, help="mean datagram size in bytes (with --max-bytes: byte overhead is modelled)"
    )
    need.add_argument(
        "--max-bytes", type=int, help="longest datagram in bytes: every repair packet is this long plus headers"
    )
    need.add_argument(
        "--max-byte-overhead",
        type=float,
        help="largest repair bytes / source bytes on the link (≤ 1, RFC 6363 §8.2); needs the sizes",
    )

    air = parser.add_argument_group("air rate (the daemon's pacer: link.rate, link.queue_ms)")
    air.add_argument(
        "--link-rate",
        metavar="BPS",
        type=str,
        help="the link's air rate in bit/s, IP/UDP headers counted (9600, 9.6k, 256k, 2M): reports the air time "
        "of source and repair and refuses codes that do not fit",
    )
    air.add_argument(
        "--datagram-bytes",
        type=float,
        help="mean application datagram size for the air time (default: --mean-bytes; needed with --link-rate)",
    )
    air.add_argument(
        "--burst-datagrams",
        type=int,
        help="datagrams an application sends back to back (a camera still): the queueing delay the burst meets "
        "in the pacer is shown, and codes whose burst overflows the queue are refused",
    )
    air.add_argument(
        "--queue-ms",
        type=float,
        help=f"the sender's link.queue_ms: air time the pacer may hold (default {DEFAULT_QUEUE_MS})",
    )

    codes = parser.add_argument_group("codes")
    codes.add_argument(
        "--k-values",
        default=",".join(str(k) for k in DEFAULT_K_VALUES),
        help="source block sizes to consider: a list such as 4,8,16 or ranges such as 8-24",
    )
    codes.add_argument(
        "--interleave",
        default="1",
        help=f"interleave depths D to consider (the sender's fec.interleave, 1..{SENDER_MAX_INTERLEAVE}), e.g. 1,2,4",
    )
    codes.add_argument("--k", type=int, help="evaluation mode: source packets per block of the one code to evaluate")
    codes.add_argument("--m", type=int, help="evaluation mode: repair packets per block of the one code to evaluate")
    sliding = parser.add_argument_group("sliding-window code (fec.code: sliding), estimated by simulation")
    sliding.add_argument(
        "--sliding-window",
        metavar="W[,W...]",
        help="compare sliding-window codes with these encoding windows (source packets) beside the block code "
        "--k/--m (default 16/4) on the same link; needs --rate",
    )
    sliding.add_argument(
        "--repair-interval",
        type=int,
        help="sliding: one repair packet every X source packets (default: the block code's overhead, k/m rounded)",
    )
    sliding.add_argument(
        "--sim-datagrams",
        type=int,
        help=f"datagrams simulated per code (default {sliding_sim.DEFAULT_DATAGRAMS}, "
        f"in {sliding_sim.REPLICATIONS} seeded replications)",
    )
    sliding.add_argument("--seed", type=int, help="first seed of the simulation's replications (default 1)")
    parser.add_argument("--json", action="store_true", default=False, help="print JSON instead of a table")


def _compare_sliding(args: argparse.Namespace, channel: GilbertElliott) -> int:
    """Sliding-window codes beside the block code on one link: seeded simulation with 95 % CIs."""
    if args.rate is None:
        raise PlanError("the sliding-window comparison needs the datagram rate: --rate N")
    windows = parse_int_list(args.sliding_window)
    k = args.k if args.k is not None else 16
    m = args.m if args.m is not None else 4
    if not 1 <= k or not 0 <= m or k + m > 255:
        raise PlanError(f"block code k={k} m={m} is outside 1 ≤ k, 0 ≤ m, k + m ≤ 255")
    interval = args.repair_interval if args.repair_interval is not None else max(1, round(k / m) if m else k)
    datagrams = args.sim_datagrams if args.sim_datagrams is not None else sliding_sim.DEFAULT_DATAGRAMS
    seed = args.seed if args.seed is not None else 1
    flush = (args.flush_ms if args.flush_ms is not None else 20.0) / 1000.0
    try:
        block = sliding_sim.simulate(
            "block",
            dict(block_size=k, repair=m, flush_interval=flush),
            channel,
            args.rate,
            datagrams=datagrams,
            seed=seed,
        )
        codes = [
            sliding_sim.simulate(
                "sliding",
                dict(window=w, repair_interval=min(interval, w), flush=flush),
                channel,
                args.rate,
                datagrams=datagrams,
                seed=seed,
            )
            for w in windows
        ]
    except ValueError as exc:
        raise PlanError(str(exc)) from None
    exact = evaluate(channel, k, m).residual_loss
    method = (
        f"seeded simulation (seeds {seed}..{seed + sliding_sim.REPLICATIONS - 1}, {sliding_sim.REPLICATIONS} "
        f"replications of {datagrams // sliding_sim.REPLICATIONS} datagrams at {args.rate:g}/s, no link delay); "
        "figures are estimates with 95 % confidence intervals (Student t over replications)"
    )
    if args.json:
        out = {
            "channel": _channel_dict(channel),
            "rate": args.rate,
            "method": method,
            "block": dict(block.as_dict(), exact_residual_loss=exact),
            "sliding": [c.as_dict() for c in codes],
        }
        print(json.dumps(out, indent=2))
        return 0
    print(f"link: {channel.describe()}")
    print(method)
    header = f"{'code':<30} {'overhead':>8}  {'residual loss (95% CI)':<30} {'mean delay ms':<22} {'p99 delay ms':<22}"
    print(header)
    print("-" * len(header))

    def row(c: sliding_sim.SimulatedCode) -> str:
        r, d, p = c.residual_loss, c.mean_delay, c.p99_delay
        return (
            f"{c.code:<30} {c.overhead:>8.3f}  {f'{r.mean:.2e} [{r.low:.2e}, {r.high:.2e}]':<30} "
            f"{f'{d.mean * 1e3:.1f} [{d.low * 1e3:.1f}, {d.high * 1e3:.1f}]':<22} "
            f"{f'{p.mean * 1e3:.1f} [{p.low * 1e3:.1f}, {p.high * 1e3:.1f}]':<22}"
        )

    print(row(block))
    for code in codes:
        print(row(code))
    print(f"block k={k} m={m}: exact residual loss {exact:.3g} (planner; the simulated figure estimates it)")
    print("delay: from sending to delivery of rebuilt datagrams, i.e. what the code adds")
    return 0


def channel_from_args(args: argparse.Namespace) -> GilbertElliott:
    four = dict(p=args.ge_p, r=args.ge_r, loss_good=args.ge_loss_good, loss_bad=args.ge_loss_bad)
    if args.from_metrics:
        if args.loss is not None or args.burst is not None or any(v is not None for v in four.values()):
            raise PlanError("--from-metrics replaces --loss/--burst/--ge-*: give one or the other")
        loss, burst, args.running = read_metrics(args.from_metrics, args.metrics_select, args.metrics_timeout)
        return channel_from_estimate(loss, burst)
    if args.loss is None and args.burst is None and all(v is None for v in four.values()):
        raise PlanError("describe the link: --loss (and --burst), or --ge-p/--ge-r, or --from-metrics URL")
    return channel_from_figures(loss=args.loss, burst=args.burst, **four)


def budget_from_args(args: argparse.Namespace) -> LinkBudget | None:
    """The air-rate budget from --link-rate and its companions; None without --link-rate."""
    companions = {"--datagram-bytes": args.datagram_bytes, "--burst-datagrams": args.burst_datagrams}
    companions["--queue-ms"] = args.queue_ms
    if args.link_rate is None:
        given = [name for name, value in companions.items() if value is not None]
        if given:
            raise PlanError(f"{', '.join(given)} describe the air rate's use: give --link-rate BPS as well")
        return None
    size = args.datagram_bytes if args.datagram_bytes is not None else args.mean_bytes
    if size is None:
        raise PlanError("--link-rate needs the datagram size: --datagram-bytes N (or --mean-bytes)")
    try:
        return LinkBudget(
            rate_bps=parse_rate(args.link_rate),
            datagram_bytes=size,
            max_bytes=args.max_bytes,
            burst_datagrams=args.burst_datagrams,
            queue_ms=DEFAULT_QUEUE_MS if args.queue_ms is None else args.queue_ms,
        )
    except BudgetError as exc:
        raise PlanError(str(exc)) from None


def _evaluate_one(args: argparse.Namespace, channel: GilbertElliott, depths: tuple[int, ...]) -> int:
    if args.k is None or args.m is None:
        raise PlanError("evaluation mode needs both --k and --m")
    if len(depths) != 1:
        raise PlanError("evaluation mode evaluates one code: give a single --interleave depth")
    depth = depths[0]
    if depth > SENDER_MAX_INTERLEAVE:
        raise PlanError(
            f"interleave depth {depth} is more than the sender supports (fec.interleave ≤ {SENDER_MAX_INTERLEAVE})"
        )
    flush = None
    if args.rate is not None:
        flush = (args.flush_ms if args.flush_ms is not None else args.latency_ms) / 1000.0
        if not (math.isfinite(args.rate) and args.rate > 0 and math.isfinite(flush) and flush > 0):
            raise PlanError(f"rate and flush time must be > 0, got rate {args.rate!r} and flush {flush * 1000!r} ms")
    k_eff, m_eff = effective_code(args.k, args.m, args.rate, flush, depth, args.short_block_repair)
    figures = evaluate(channel, k_eff, m_eff, depth)
    out = {
        "k": args.k,
        "k_effective": k_eff,
        "m": args.m,
        "m_effective": m_eff,
        "short_block_repair": args.short_block_repair,
        "depth": depth,
        "overhead": figures.overhead,
        "block_failure": figures.block_failure,
        "residual_loss": figures.residual_loss,
        "block_span_ms": None if flush is None else block_span(args.k, k_eff, args.rate, flush, depth) * 1000.0,
        "in_order_wait": None
        if flush is None
        else in_order_wait(
            channel, k_eff, args.rate, block_span(args.k, k_eff, args.rate, flush, depth), depth
        ).as_dict(),
        "channel": _channel_dict(channel),
    }
    budget = budget_from_args(args)
    if budget is not None:
        if args.rate is None:
            raise PlanError("--link-rate needs the datagram rate: --rate N (datagrams per second)")
        source_air, repair_air = budget.source_use(args.rate), budget.repair_use(args.rate, k_eff, m_eff)
        delay = budget.burst_delay(args.k, args.m)
        out.update(
            link_rate_bps=budget.rate_bps,
            source_air=source_air,
            repair_air=repair_air,
            burst_delay_ms=None if delay is None else delay * 1000.0,
            within_air=source_air + repair_air <= 1.0,
            within_queue=budget.burst_source_fits() and budget.burst_fits(args.k, args.m),
        )
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"link: {channel.describe()}")
        short = (
            f" (effective k {k_eff} m {m_eff} at {args.rate:g}/s: the {flush * 1000:g} ms flush closes blocks short, "
            f"{args.short_block_repair} rule)"
            if k_eff != args.k and flush is not None
            else ""
        )
        print(f"code: k={args.k} m={args.m} interleave D={depth}{short}, overhead {figures.overhead:.3f}")
        print(f"block failure probability: {figures.block_failure:.6g}")
        print(f"residual datagram loss:    {figures.residual_loss:.6g}")
        if out["block_span_ms"] is not None:
            print(f"block span:                {out['block_span_ms']:.1f} ms")
            span = out["block_span_ms"] / 1000.0
            print(_order_wait_line(channel, k_eff, args.rate, span, depth))
        if budget is not None:
            used = out["source_air"] + out["repair_air"]
            print(
                f"air rate used:             {used:.1%} of {budget.rate_bps:g} bit/s "
                f"(source {out['source_air']:.1%}, repair {out['repair_air']:.1%})"
                + ("" if out["within_air"] else " — does not fit: the pacer's queue grows until it drops repair")
            )
            if out["burst_delay_ms"] is not None:
                print(
                    f"burst queueing delay:      {out['burst_delay_ms']:.0f} ms for the last of "
                    f"{budget.burst_datagrams} datagrams (pacer queue {budget.queue_ms:g} ms"
                    + (")" if out["within_queue"] else ": the burst overflows it, repair is dropped)")
                )
    return 0


def main(args: argparse.Namespace) -> int:
    args = _fill_unset(args)
    try:
        channel = channel_from_args(args)
        if args.sliding_window is not None:
            return _compare_sliding(args, channel)
        depths = parse_int_list(args.interleave)
        if args.k is not None or args.m is not None:
            return _evaluate_one(args, channel, depths)
        if args.rate is None:
            raise PlanError("planning needs the datagram rate: --rate N (datagrams per second)")
        request = PlanRequest(
            channel=channel,
            rate=args.rate,
            latency_budget=args.latency_ms / 1000.0,
            max_overhead=args.max_overhead,
            target=args.target,
            k_values=parse_int_list(args.k_values),
            depths=depths,
            flush=None if args.flush_ms is None else args.flush_ms / 1000.0,
            short_block_repair=args.short_block_repair,
            mean_bytes=args.mean_bytes,
            max_bytes=args.max_bytes,
            max_byte_overhead=args.max_byte_overhead,
            allow_repair_above_source=args.allow_repair_above_source,
            budget=budget_from_args(args),
        )
        result = plan(request)
    except (PlanError, ChannelConfigError) as exc:
        print(f"fecproxy plan: {exc}", file=sys.stderr)
        return 2
    if args.json:
        print(
            json.dumps(
                {
                    "channel": _channel_dict(channel),
                    "rate": request.rate,
                    "latency_budget_ms": request.latency_budget * 1000.0,
                    "flush_ms": request.flush_time * 1000.0,
                    "short_block_repair": request.short_block_repair,
                    "max_overhead": request.max_overhead,
                    "target": request.target,
                    "candidates": [c.as_dict() for c in result.candidates],
                    "recommended": None if result.recommended is None else result.recommended.as_dict(),
                    "mean_bytes": request.mean_bytes,
                    "max_bytes": request.max_bytes,
                    "max_byte_overhead": request.max_byte_overhead,
                    "link_rate_bps": None if request.budget is None else request.budget.rate_bps,
                    "burst_datagrams": None if request.budget is None else request.budget.burst_datagrams,
                    "running": getattr(args, "running", None),
                },
                indent=2,
            )
        )
    else:
        print(format_table(result, running=getattr(args, "running", None)))
    return 0 if result.recommended is not None else 1


__all__ = [
    "add_arguments",
    "main",
    "link_from_metrics",
    "parse_prometheus_text",
    "MetricsError",
    "LINK_LOSS_GAUGE",
    "LINK_BURST_GAUGE",
]
