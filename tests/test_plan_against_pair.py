"""Whole processes: ``fecproxy run`` sender and receiver with ``fecproxy impair`` between them.

  generator ──▶ sender (run) ──▶ impair (Gilbert–Elliott, forward only) ──▶ receiver (run) ──▶ sink

All on 127.0.0.1 with ports chosen by the kernel (port 0; the processes log what they bound).
Every loop is bounded in count and time, and every child is killed in ``finally``.

Statistics: blocks are the independent unit.  A block of (k, m) leaves U datagrams unrecovered
(U = source losses when more than m of its k + m packets are lost, else 0); over B blocks the
residual count has variance B·Var(U), with E[U] and E[U²] exact from the planner's block-loss
distribution (its recursion is checked against scipy and Monte Carlo in test_planner.py).  Blocks
are not quite independent on a bursty link, but with mean burst 2 the chain forgets its state at a
rate λ = 1 − p − r ≈ 0.46 per packet, so across a block of ≥ 10 packets the correlation is below
λ^10 ≈ 4·10⁻⁴; neglected.  Tolerance: 4 standard deviations.
"""

from __future__ import annotations

import json
import math
import socket
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from support.daemon_pair import metrics_port_of
from support.processes import LOOPBACK, Child, fecproxy, run_json, scrape
from support.receiver_view import invisible_share  # closed form, checked in test_receiver_loss_estimate.py

from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.planner import block_loss_distribution, evaluate

RATE = 800.0  # datagrams per second offered by the generator
LINK_LOSS, LINK_BURST = 0.08, 2.0  # the emulated radio: 8 % loss in bursts of 2 on average
SEED = 11
Z = 4.0

pytestmark = pytest.mark.slow


# -- one run of the pair --------------------------------------------------------------------------------


def run_link(
    tmp_path: Path,
    k: int,
    m: int,
    datagrams: int,
    *,
    flush_ms: int = 100,
    interleave: int = 1,
    loss: float = LINK_LOSS,
    burst: float = LINK_BURST,
) -> dict:
    """Carry ``datagrams`` numbered datagrams at RATE through the pair and the emulated link.

    Returns what the sink got, and the three processes' metrics after the receiver's hold time.
    """
    sink = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sink.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
    sink.bind((LOOPBACK, 0))
    sink.settimeout(0.2)
    received: set[int] = set()
    duplicates = 0
    stop_sink = threading.Event()

    def drain():
        nonlocal duplicates
        while not stop_sink.is_set():
            try:
                data = sink.recv(2048)
            except TimeoutError:
                continue
            except OSError:
                return
            number = int(data[:8])
            duplicates += number in received
            received.add(number)

    children: list[Child] = []
    generator = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    drainer = threading.Thread(target=drain, daemon=True)
    drainer.start()
    try:
        receiver_cfg = tmp_path / f"receiver-{k}-{m}-{interleave}.yaml"
        receiver_cfg.write_text(
            f"role: receiver\nforward: {LOOPBACK}:{sink.getsockname()[1]}\nlink:\n  bind: {LOOPBACK}:0\n"
            f"fec:\n  block_size: 8\n  repair: 2\n  flush_ms: 50\ndecoder:\n  hold_ms: 300\n"
            f"log:\n  level: info\n  format: json\nmetrics:\n  listen: {LOOPBACK}:0\n"
        )
        receiver = Child(fecproxy("run", str(receiver_cfg)))
        children.append(receiver)
        started = json.loads(receiver.wait_for(r'"event": "started"').string)
        receiver_link = started["link"]
        receiver_metrics = metrics_port_of(started)

        impair = Child(
            fecproxy(
                "impair",
                "--listen",
                f"{LOOPBACK}:0",
                "--to",
                receiver_link,
                "--loss",
                str(loss),
                "--burst",
                str(burst),
                "--return-loss",
                "0",
                "--seed",
                str(SEED),
                "--seconds",
                "120",
                "--metrics",
                f"{LOOPBACK}:0",
            )
        )
        children.append(impair)
        relay = impair.wait_for(r"listening on (\S+),").group(1)
        impair_metrics = int(impair.wait_for(r"metrics: http://[^:]+:(\d+)/").group(1))

        sender_cfg = tmp_path / f"sender-{k}-{m}-{interleave}.yaml"
        sender_cfg.write_text(
            f"role: sender\nlisten: {LOOPBACK}:0\nlink:\n  bind: {LOOPBACK}:0\n  peer: {relay}\n"
            f"fec:\n  block_size: {k}\n  repair: {m}\n  flush_ms: {flush_ms}\n  interleave: {interleave}\n"
            f"log:\n  level: info\n  format: json\nmetrics:\n  listen: {LOOPBACK}:0\n"
        )
        sender = Child(fecproxy("run", str(sender_cfg)))
        children.append(sender)
        started = json.loads(sender.wait_for(r'"event": "started"').string)
        host, port = started["listen"].rsplit(":", 1)
        target = (host, int(port))
        sender_metrics = metrics_port_of(started)

        # Paced traffic: every 5 ms send what the schedule says is due (bounded in count and time).
        begin = time.monotonic()
        sent = 0
        while sent < datagrams and time.monotonic() - begin < 2 * datagrams / RATE + 5:
            due = min(datagrams, int((time.monotonic() - begin) * RATE) + 1)
            while sent < due:
                generator.sendto(b"%08d" % sent + b" weather reading", target)
                sent += 1
            time.sleep(0.005)
        elapsed = time.monotonic() - begin
        time.sleep(0.3 + flush_ms / 1000 + 0.5)  # last block flushed, failed blocks expired (hold 300 ms)
        return {
            "sent": sent,
            "elapsed": elapsed,
            "received": len(received),
            "duplicates": duplicates,
            "receiver": scrape(receiver_metrics),
            "sender": scrape(sender_metrics),
            "impair": scrape(impair_metrics),
            "receiver_metrics": receiver_metrics,
        } | {"children": children}
    except BaseException:
        for child in reversed(children):
            child.stop()
        raise
    finally:
        # On success the caller stops the children (the metrics page must stay up for `plan`).
        stop_sink.set()
        drainer.join(timeout=2)
        generator.close()
        sink.close()


def residual_sd(channel: GilbertElliott, k: int, m: int, blocks: int) -> float:
    """Standard deviation of the residual loss ratio over ``blocks`` independent blocks."""
    dist = block_loss_distribution(channel, k, m)
    source = np.arange(k + 1)[:, None]
    fails = source + np.arange(m + 1)[None, :] > m
    u1 = float((dist * source)[fails].sum())
    u2 = float((dist * source**2)[fails].sum())
    return math.sqrt(blocks * (u2 - u1 * u1)) / (blocks * k)


# -- the tests -----------------------------------------------------------------------------------------

LINK = GilbertElliott.from_loss_burst(LINK_LOSS, LINK_BURST)
K, M = 8, 2
DATAGRAMS = 9600  # 12 s at RATE: 1200 blocks


@pytest.fixture(scope="module")
def baseline(tmp_path_factory):
    """One run with k = 8, m = 2 through the 8 %/burst-2 link; children stopped at teardown."""
    result = run_link(tmp_path_factory.mktemp("baseline"), K, M, DATAGRAMS)
    try:
        yield result
    finally:
        for child in reversed(result["children"]):
            child.stop()


def test_no_loss_outside_the_emulated_link(baseline):
    # Every packet the relay delivered reached the receiver's decoder, and nothing was duplicated:
    # the only losses are the emulated ones, so the comparison with the plan is fair.
    impair, receiver, sender = baseline["impair"], baseline["receiver"], baseline["sender"]
    delivered = impair["fecproxy_impair_datagrams_delivered_total{direction=forward}"]
    got = (
        receiver["fecproxy_link_packets_received_total{kind=source}"]
        + receiver["fecproxy_link_packets_received_total{kind=repair}"]
    )
    assert got == delivered
    on_air = sender["fecproxy_source_packets_sent_total"] + sender["fecproxy_repair_packets_sent_total"]
    assert impair["fecproxy_impair_datagrams_submitted_total{direction=forward}"] == on_air
    assert sender["fecproxy_source_packets_sent_total"] == baseline["sent"]
    assert baseline["duplicates"] == 0


def test_residual_loss_matches_the_plan(baseline, capsys):
    predicted = run_json(
        "plan", "--k", str(K), "--m", str(M), "--loss", str(LINK_LOSS), "--burst", str(LINK_BURST), "--json"
    )
    assert predicted["residual_loss"] == evaluate(LINK, K, M).residual_loss
    sent = baseline["sent"]
    blocks = sent // K
    sd = residual_sd(LINK, K, M, blocks)
    at_sink = 1 - baseline["received"] / sent
    # The receiver's counter misses the invisible tails (see invisible_share), all of them lost
    # and unrecovered, so it is expected lower by exactly that share.
    counted = baseline["receiver"]["fecproxy_datagrams_unrecovered_total"] / sent
    hidden = invisible_share(LINK, K, M)
    with capsys.disabled():
        print(
            f"\n[link e2e] k={K} m={M} on {LINK_LOSS:.0%}/burst {LINK_BURST:g}: {sent} datagrams in "
            f"{baseline['elapsed']:.1f} s; "
            f"plan {predicted['residual_loss']:.4f} ± {sd:.4f} (1 sd); sink {at_sink:.4f}; receiver counter "
            f"{counted:.4f} "
            f"(expected {predicted['residual_loss'] - hidden:.4f}: plan − invisible {hidden:.4f}); "
            f"relay measured loss {baseline['impair']['fecproxy_impair_loss_ratio{direction=forward}']:.4f} "
            f"burst {baseline['impair']['fecproxy_impair_mean_burst_packets{direction=forward}']:.3f}"
        )
    assert abs(at_sink - predicted["residual_loss"]) < Z * sd
    assert abs(counted - (predicted["residual_loss"] - hidden)) < Z * sd


def test_plan_from_metrics_reads_the_link(baseline, capsys):
    url = f"http://{LOOPBACK}:{baseline['receiver_metrics']}/metrics"
    out = run_json("plan", "--from-metrics", url, "--rate", str(RATE), "--latency-ms", "100", "--json")
    loss, burst = out["channel"]["average_loss"], out["channel"]["mean_burst"]
    # The receiver's window holds the last LOSS_ESTIMATE_WINDOW (10 000) source positions, here
    # every source the run sent but a few.  Bounds as in test_receiver_loss_estimate.py: loss SE from the
    # chain's autocorrelation, burst SE from the Markov-chain MLE (Anderson & Goodman 1957, from
    # memory), widened by the known downward biases: chaining blocks over hidden repair positions
    # and invisible block tails (both computed in support/receiver_view.py; ≤ 15 % for k=8, m=2).
    samples = min(baseline["sent"], 10_000)
    lam = 1 - LINK.p - LINK.r
    loss_se = math.sqrt(LINK.stationary_bad * (1 - LINK.stationary_bad) * (1 + lam) / (1 - lam) / samples)
    burst_se = math.sqrt(LINK.r * (1 - LINK.r) / (samples * LINK_LOSS * (K - 1) / K)) / LINK.r**2
    with capsys.disabled():
        print(
            f"\n[link e2e] --from-metrics: loss {loss:.4f} (configured {LINK_LOSS}, SE {loss_se:.4f}), "
            f"mean burst {burst:.3f} (configured {LINK_BURST}, SE {burst_se:.3f})"
        )
    assert abs(loss - LINK_LOSS) < Z * loss_se + 0.10 * LINK_LOSS
    assert abs(burst - LINK_BURST) < Z * burst_se + 0.15 * LINK_BURST
    # ... and the planner turned them into a channel and a plan.
    assert out["candidates"] and out["rate"] == RATE


def test_recommendation_is_confirmed_by_the_pair(tmp_path, capsys):
    # The operator's question for this link: 800 datagrams/s, 100 ms of latency, blocks of at most
    # 16, residual loss 1 %.  Run the pair with the recommended code and measure.
    target = 0.01
    plan = run_json(
        "plan",
        "--loss",
        str(LINK_LOSS),
        "--burst",
        str(LINK_BURST),
        "--rate",
        str(RATE),
        "--latency-ms",
        "100",
        "--k-values",
        "4-16",
        "--target",
        str(target),
        "--json",
    )
    best = plan["recommended"]
    assert best is not None and best["k_effective"] == best["k"]  # blocks fill at this rate
    k, m = best["k"], best["m"]
    datagrams = 6400  # 8 s
    result = run_link(tmp_path, k, m, datagrams)
    try:
        sent = result["sent"]
        sd = residual_sd(LINK, k, m, sent // k)
        at_sink = 1 - result["received"] / sent
        with capsys.disabled():
            print(
                f"\n[link e2e] recommended k={k} m={m} (overhead {best['overhead']:.3f}): plan "
                f"{best['residual_loss']:.4f} "
                f"± {sd:.4f}, sink {at_sink:.4f}, target {target}"
            )
        assert abs(at_sink - best["residual_loss"]) < Z * sd
        # At or below the target within the same tolerance (one-sided).
        assert at_sink <= target + Z * sd
    finally:
        for child in reversed(result["children"]):
            child.stop()


# -- interleaving against the plan ------------------------------------------------------------------------

#: A link with longer bursts (mean 4 packets), where spreading a block over D = 4 lanes matters.
BURSTY_LOSS, BURSTY_BURST = 0.08, 4.0
BURSTY = GilbertElliott.from_loss_burst(BURSTY_LOSS, BURSTY_BURST)


@pytest.mark.parametrize("depth", [1, 4])
def test_interleaved_pair_matches_the_plan(tmp_path, capsys, depth):
    """D = 1 and D = 4 through the same bursty link: each run's residual loss at the sink within
    Z standard deviations of ``plan --interleave D``.

    Bound: blocks of one round (D blocks, lanes fed in turn) share the link's time and are
    correlated; by Cauchy–Schwarz the variance of a round's sum is at most D²·Var(U), so the
    standard deviation of the residual over B blocks is at most √D times the independent-block
    figure (residual_sd), which is what is used.  Rounds are D·(k + m) = 40 packets long; the chain
    forgets its state at λ = 1 − p − r ≈ 0.73 per packet, λ^40 ≈ 3·10⁻⁶ across a round: neglected.
    """
    k, m = 8, 2
    predicted = run_json(
        "plan",
        "--k",
        str(k),
        "--m",
        str(m),
        "--loss",
        str(BURSTY_LOSS),
        "--burst",
        str(BURSTY_BURST),
        "--interleave",
        str(depth),
        "--json",
    )
    assert predicted["residual_loss"] == evaluate(BURSTY, k, m, depth).residual_loss
    datagrams = 6400  # 8 s at RATE; at 800/s a block of D·k datagrams fills in D·10 ms < flush
    result = run_link(tmp_path, k, m, datagrams, interleave=depth, loss=BURSTY_LOSS, burst=BURSTY_BURST)
    try:
        sent = result["sent"]
        sd = math.sqrt(depth) * residual_sd_at(BURSTY, k, m, depth, sent // k)
        at_sink = 1 - result["received"] / sent
        with capsys.disabled():
            print(
                f"\n[link e2e] D={depth} k={k} m={m} on {BURSTY_LOSS:.0%}/burst {BURSTY_BURST:g}: plan "
                f"{predicted['residual_loss']:.4f} ± {sd:.4f} (sd bound), sink {at_sink:.4f}"
            )
        assert result["sender"]["fecproxy_short_blocks_sent_total"] <= depth  # blocks filled: the planned code
        assert abs(at_sink - predicted["residual_loss"]) < Z * sd
    finally:
        for child in reversed(result["children"]):
            child.stop()


def test_the_plan_says_interleaving_helps_on_this_link():
    # The two runs above are compared with figures that differ by many of their sd bounds.
    one, four = evaluate(BURSTY, 8, 2, 1).residual_loss, evaluate(BURSTY, 8, 2, 4).residual_loss
    assert four < 0.6 * one


def residual_sd_at(channel: GilbertElliott, k: int, m: int, depth: int, blocks: int) -> float:
    """residual_sd for blocks whose packets sit ``depth`` apart on the link."""
    dist = block_loss_distribution(channel, k, m, depth)
    source = np.arange(k + 1)[:, None]
    fails = source + np.arange(m + 1)[None, :] > m
    u1 = float((dist * source)[fails].sum())
    u2 = float((dist * source**2)[fails].sum())
    return math.sqrt(blocks * (u2 - u1 * u1)) / (blocks * k)
