"""The output half of ``fecproxy plan``: the table, the link budget lines, the verdicts and the
in-order wait line, from the planner's results (no options, no I/O)."""

from __future__ import annotations

from fecproxy.linkmodel.airtime import LinkBudget
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.order_wait import in_order_wait
from fecproxy.linkmodel.planner import Candidate, Plan, effective_k


def _budget_lines(budget: LinkBudget, rate: float) -> list[str]:
    line = (
        f"air rate {budget.rate_bps:g} bit/s (IP/UDP headers counted): source takes {budget.source_use(rate):.1%} "
        f"at {rate:g} datagrams/s of {budget.datagram_bytes:g} bytes; pacer queue {budget.queue_ms:g} ms"
    )
    lines = [line]
    if budget.burst_datagrams is not None:
        lines.append(
            f"burst: {budget.burst_datagrams} datagrams back to back; burst_ms = queueing delay of its last datagram "
            "in the pacer on an otherwise idle link"
        )
    return lines


# -- output --------------------------------------------------------------------------------------------


def _channel_dict(channel: GilbertElliott) -> dict:
    return {
        "p": channel.p,
        "r": channel.r,
        "loss_good": channel.loss_good,
        "loss_bad": channel.loss_bad,
        "average_loss": channel.average_loss,
        "mean_burst": channel.mean_burst,
    }


def _verdict(c: Candidate) -> str:
    if c.acceptable:
        return "ok"
    checks = (
        ("residual", c.meets_target),
        ("latency", c.within_latency),
        ("overhead", c.within_overhead),
        ("bytes", c.within_byte_overhead),
        ("air", c.within_air),
        ("queue", c.within_queue),
    )
    misses = [name for name, ok in checks if not ok]
    return "misses " + ",".join(misses)


def format_table(result: Plan, running: dict | None = None) -> str:
    """The plan as a table.  Columns k' and m' (the block the sender really sends at this rate)
    appear only when some row's blocks are closed short by the flush timer."""
    req = result.request
    short = any(c.short for c in result.candidates)
    lines = [
        f"link: {req.channel.describe()}",
        f"rate {req.rate:g} datagrams/s, latency budget {req.latency_budget * 1000:g} ms, "
        f"flush {req.flush_time * 1000:g} ms, max overhead {req.max_overhead:g}, target residual loss {req.target:g}",
        "",
    ]
    if req.bytes_modelled:
        budget = "" if req.max_byte_overhead is None else f", max byte overhead {req.max_byte_overhead:g}"
        lines.insert(
            2,
            f"datagrams: mean {req.mean_bytes:g} bytes, longest {req.max_bytes} (repair symbols are that long){budget}",
        )
    if req.budget is not None:
        lines[2:2] = _budget_lines(req.budget, req.rate)
    effective_head = " " + "k'".rjust(4) + " " + "m'".rjust(4) if short else ""
    bytes_head = f" {'bytes_ovh':>9}" if req.bytes_modelled else ""
    if req.budget is not None:
        bytes_head += f" {'air':>6}" + (f" {'burst_ms':>8}" if req.budget.burst_datagrams is not None else "")
    lines.append(
        f"{'':1} {'k':>4} {'m':>4}{effective_head} {'D':>3} {'overhead':>8}{bytes_head} {'block_fail':>10} "
        f"{'residual':>10} "
        f"{'span_ms':>8}  verdict"
    )
    for c in result.candidates:
        mark = "*" if c is result.recommended else " "
        effective = f" {c.k_effective:>4} {c.m_effective:>4}" if short else ""
        byte_cell = f" {c.byte_overhead:>9.3f}" if req.bytes_modelled else ""
        if req.budget is not None and c.source_air is not None and c.repair_air is not None:
            byte_cell += f" {c.source_air + c.repair_air:>6.1%}"
            if c.burst_delay is not None:
                byte_cell += f" {c.burst_delay * 1000:>8.0f}"
        lines.append(
            f"{mark} {c.k:>4} {c.m:>4}{effective} {c.depth:>3} {c.overhead:>8.3f}{byte_cell} {c.block_failure:>10.3g} "
            f"{c.residual_loss:>10.3g} {c.span * 1000:>8.1f}  {_verdict(c)}"
        )
    lines.append("")
    best = result.recommended
    if best is not None:
        sent = f" (blocks close short at this rate: k'={best.k_effective} m'={best.m_effective})" if best.short else ""
        lines.append(
            f"recommended (*): k={best.k} m={best.m} interleave D={best.depth}{sent} — overhead {best.overhead:.3f}, "
            f"residual loss {best.residual_loss:.3g}, block span {best.span * 1000:.1f} ms"
        )
        lines.append(_order_wait_line(req.channel, best.k_effective, req.rate, best.span, best.depth))
        keys = ", ".join(f"{key}: {value}" for key, value in best.config_keys().items())
        lines.append(f"sender config: {keys}, fec.flush_ms: {req.flush_time * 1000:g}")
        # The same aim, for a sender that follows the link itself (fec.adapt, from loss reports).
        lines.append(
            "or let the sender choose m from its loss reports: "
            f"fec.block_size: {best.k}, fec.interleave: {best.depth}, fec.flush_ms: {req.flush_time * 1000:g}, "
            f"fec.adapt: {{target_residual: {req.target:g}, max_overhead: {req.max_overhead:g}}}"
        )
    else:
        lowest = min(result.candidates, key=lambda c: c.residual_loss)
        lines.append(
            f"no candidate meets residual loss {req.target:g} within the budgets; the lowest is "
            f"{lowest.residual_loss:.3g} at k={lowest.k} m={lowest.m} D={lowest.depth} — "
            + (
                "the air rate leaves no room for more repair: lower the traffic or raise link.rate"
                if req.budget is not None and not any(c.within_air and c.within_queue for c in result.candidates)
                else "allow more overhead"
                + ("" if req.allow_repair_above_source else " (above 1 with --allow-repair-above-source)")
                + ", latency or interleaving"
            )
        )
    if running:
        lines.append(
            f"arriving now (the peer's code as the metrics page's daemon decodes it): k={running['k']} m={running['m']}"
            " (interleave depth is not on the wire)"
        )
    lines.append(
        "(each row: the fewest repair packets meeting the target for that k and D, "
        "else the most the overhead budget allows)"
    )
    caps = {d: effective_k(max(req.k_values), req.rate, req.flush_time, d) for d in req.depths}
    capped = {d: cap for d, cap in caps.items() if any(k > cap for k in req.k_values)}
    if req.budget is not None and req.budget.burst_datagrams is not None:
        capped = {}  # a burst fills its blocks whatever the average rate
    if capped:
        at = ", ".join(f"{cap} at D={d}" for d, cap in capped.items())
        lines.append(
            f"(at {req.rate:g} datagrams/s a block the {req.flush_time * 1000:g} ms flush timer closes "
            f"holds at most {at}: larger k send the same blocks, so a row repeating another's (k', m') "
            "is listed once)"
        )
    if short:
        lines.append(
            "(k', m': the block the sender really sends at this rate — closed by the "
            f"{req.flush_time * 1000:g} ms flush timer, repair by the {req.short_block_repair} short-block rule; "
            "the figures are those of (k', m'))"
        )
    return "\n".join(lines)


def _order_wait_line(channel: GilbertElliott, k_effective: int, rate: float, span: float, depth: int) -> str:
    """What delivery.order: in_order would add on the receiving side (fecproxy.linkmodel.order_wait)."""
    wait = in_order_wait(channel, k_effective, rate, span, depth)
    return (
        f"in-order delivery (delivery.order: in_order) adds: {wait.waiting_share:.1%} of datagrams wait behind a gap, "
        f"mean {wait.mean_seconds * 1000:.2f} ms, at most {wait.worst_seconds * 1000:.1f} ms while the gap is rebuilt "
        f"(set delivery.max_wait_ms above that plus the delay spread of the link)"
    )
