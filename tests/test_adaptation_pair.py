"""Whole pair with ``fec.adapt`` through the impairment relay: the sender follows a fading link.

Demo scenario: a weather station's radio hop over a hill-top relay.  The forward link has 1 %
independent loss, then fades to 10 % loss in bursts (mean burst 2 packets), then is calm again;
finally the return path is cut.  Both daemons and the relay run in this process (one trio
nursery) so the test can switch the relay's loss model mid-run; the daemons are the real shell
(sockets on 127.0.0.1, loss reports as control packets, the timer task), only the clock is shared.

Checked:

* m rises within a few report intervals of the fade and falls back after the hysteresis
  (``adaptation.LOWER_AFTER_REPORTS`` agreeing reports);
* in each phase's steady part the residual loss is under the target within the planner's
  prediction: the count of failed blocks is at most the 1 − 10⁻⁶ quantile of
  Binomial(blocks, q), q the planner's exact block-failure probability for the weakest m in use
  on the true link (``scipy.stats.binom.ppf``; blocks of a burst-2 Gilbert chain are nearly
  independent, the chain forgets its state within a few packets, see tests/test_adaptation.py);
* with the return path cut the sender holds its m, ``fecproxy_reports_stale`` is 1 and one log
  line says so.
"""

from __future__ import annotations

import logging
import struct

import pytest
import trio
from prometheus_client import generate_latest
from scipy.stats import binom

from fecproxy.config import parse_config
from fecproxy.linkmodel import planner
from fecproxy.linkmodel.adaptation import DOWN, LOWER_AFTER_REPORTS, STALE_AFTER_INTERVALS, UP
from fecproxy.linkmodel.impairment import LinkImpairment
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.protocol.events import BlockOutcome
from fecproxy.shell.daemon import Daemon
from fecproxy.shell.relay import RelayConfig, run_relay

pytestmark = pytest.mark.slow

LOOPBACK = "127.0.0.1"
K = 16
TARGET = 1e-3
#: The default report interval: 1000 datagrams per report, so the loss a report shows is within
#: about ±1.6 % of a 10 % burst-2 link (the Gilbert chain's correlation triples the binomial
#: variance at burst 2), which keeps the controller's choice steady within a phase.
INTERVAL_MS = 1000
CALM = GilbertElliott.bernoulli(0.01)
FADE = GilbertElliott.from_loss_burst(0.10, 2.0)
CUT = GilbertElliott.bernoulli(1.0)
#: Datagrams per tick and ticks per second: 1000 datagrams/s, so a block of 16 fills in 16 ms,
#: well inside the 50 ms flush: full blocks even when the loop lags (the controller's rate cap
#: sees k' = k).
BATCH, TICK = 10, 0.010
FLUSH_MS = 50
PHASE_SECONDS = {"calm": 6.0, "fade": 8.0, "calm again": 8.0, "cut": 2.0 + STALE_AFTER_INTERVALS * INTERVAL_MS / 1000}
#: The first seconds of a phase are the controller's reaction time, not its steady state: the
#: first reports of the new link (up to two intervals), plus the hold time of failed blocks.
SETTLE_SECONDS = 2.5
#: Quantile of the binomial bound: a false failure once per 10^6 runs.
QUANTILE = 1 - 1e-6


def least_m(channel: GilbertElliott) -> int:
    """The planner's least m meeting the target on ``channel`` (k = K, full blocks)."""
    return next(f.m for f in planner.evaluate_repair_range(channel, K, K) if f.residual_loss <= TARGET)


def configs(sink, relay=None):
    common = {
        "link": {"bind": f"{LOOPBACK}:0"},
        "fec": {"block_size": K, "repair": 4, "flush_ms": FLUSH_MS, "adapt": {"target_residual": TARGET}},
        "decoder": {"hold_ms": 200},
        "reports": {"interval_ms": INTERVAL_MS},
    }
    if relay is None:
        return parse_config({"role": "receiver", "forward": f"{sink[0]}:{sink[1]}", **common}, "test receiver")
    common["link"]["peer"] = f"{relay[0]}:{relay[1]}"
    return parse_config({"role": "sender", "listen": f"{LOOPBACK}:0", **common}, "test sender")


def failed_blocks(daemon: Daemon) -> tuple[int, int]:
    """(blocks finished, blocks that lost datagrams for good) on the daemon's decoder."""
    blocks = daemon.decoder.stats.blocks
    failed = blocks.get(BlockOutcome.EXPIRED, 0) + blocks.get(BlockOutcome.EVICTED, 0)
    return sum(blocks.values()), failed


def metric(daemon: Daemon, line_start: str) -> float:
    for line in generate_latest(daemon.registry).decode().splitlines():
        if line.startswith(line_start + " "):
            return float(line.rsplit(" ", 1)[1])
    raise AssertionError(f"no sample {line_start}")


async def test_sender_follows_a_fading_link_and_holds_without_reports(caplog):
    caplog.set_level(logging.INFO, logger="fecproxy.shell.daemon")
    calm_m, fade_m = least_m(CALM), least_m(FADE)
    assert calm_m < fade_m <= K  # the phases need different codes, within RFC 6363 §8.2's cap
    rows = []  # (seconds since start, phase, m in use by the sender)
    marks = {}  # phase -> receiver's (blocks, failed, unrecovered, source expected) at its steady start and end
    async with trio.open_nursery() as nursery:
        sink = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
        app = trio.socket.socket(trio.socket.AF_INET, trio.socket.SOCK_DGRAM)
        await sink.bind((LOOPBACK, 0))
        await app.bind((LOOPBACK, 0))

        async def drain():
            while True:
                await sink.recv(2048)

        nursery.start_soon(drain)
        receiver = await nursery.start(Daemon(configs(sink.getsockname()), handle_signals=False).run)
        relay = await nursery.start(
            run_relay,
            RelayConfig(
                listen=(LOOPBACK, 0), to=receiver.link_address[:2], forward=LinkImpairment(loss=CALM), seed="hill-top"
            ),
        )
        sender = await nursery.start(
            Daemon(configs(sink.getsockname(), relay.listen_address[:2]), handle_signals=False).run
        )
        start = trio.current_time()
        sequence = 0

        def snapshot():
            stats = receiver.decoder.stats
            return (*failed_blocks(receiver), stats.unrecovered, stats.source_received + stats.lost)

        for phase, seconds in PHASE_SECONDS.items():
            if phase == "fade":
                relay.set_impairment("forward", LinkImpairment(loss=FADE))
            elif phase == "calm again":
                relay.set_impairment("forward", LinkImpairment(loss=CALM))
            elif phase == "cut":
                relay.set_impairment("return", LinkImpairment(loss=CUT))
                held_m = sender.encoder.settings.repair
            phase_start = trio.current_time()
            settled = False
            for tick in range(round(seconds / TICK)):
                now = trio.current_time()
                if not settled and now - phase_start >= SETTLE_SECONDS:
                    settled = True
                    marks[phase] = [snapshot()]
                for _ in range(BATCH):
                    await app.sendto(struct.pack(">Q", sequence) + bytes(100), sender.listen_address)
                    sequence += 1
                rows.append((now - start, phase, sender.encoder.settings.repair))
                await trio.sleep_until(phase_start + (tick + 1) * TICK)
            # Failed blocks are counted when their hold time ends: wait for the last ones.
            await trio.sleep(0.3)
            marks[phase].append(snapshot())
        ms_in = {phase: [m for _, p, m in rows if p == phase] for phase in PHASE_SECONDS}
        stale_gauge = metric(sender, "fecproxy_reports_stale")
        adaptations_up = sum(v for (d, _), v in sender.feedback.decisions().items() if d == UP)
        adaptations_down = sum(v for (d, _), v in sender.feedback.decisions().items() if d == DOWN)
        reports_received = sender.feedback.stats.received
        receiver_sent = receiver.feedback.stats.sent
        receiver_stale = metric(receiver, "fecproxy_reports_stale")
        nursery.cancel_scope.cancel()

    for record in caplog.records:  # the run's story, shown with -s
        if record.getMessage() in ("adapted", "loss_reports_stale"):
            print(record.getMessage(), record.fields)
    # Reports flowed: about one per interval from the receiver; the receiver sends no data back,
    # so it expects no reports and is not stale.
    total = sum(PHASE_SECONDS.values())
    assert receiver_sent >= 0.8 * total * 1000 / INTERVAL_MS
    assert reports_received >= 0.8 * (total - PHASE_SECONDS["cut"]) * 1000 / INTERVAL_MS
    assert receiver_stale == 0

    # Calm: the configured m = 4 comes down to the calm code after the hysteresis.
    assert ms_in["calm"][-1] == calm_m
    # Fade: m up within a few report intervals (reaction is one report after the counters see
    # enough of the fade, plus the hold time for failed blocks).
    fade_rows = [(t, m) for t, p, m in rows if p == "fade"]
    fade_start = fade_rows[0][0]
    raised_at = next(t for t, m in fade_rows if m >= fade_m - 1)
    assert raised_at - fade_start <= 5 * INTERVAL_MS / 1000, raised_at - fade_start
    # Calm again: m falls back only after LOWER_AFTER_REPORTS agreeing reports, to the calm code.
    again = [(t, m) for t, p, m in rows if p == "calm again"]
    lowered_at = next(t for t, m in again if m < fade_m - 1)
    assert lowered_at - again[0][0] >= (LOWER_AFTER_REPORTS - 1) * INTERVAL_MS / 1000
    assert again[-1][1] == calm_m
    assert adaptations_up >= 1 and adaptations_down >= 2

    # Per phase, steady part: the planner's exact figures for the codes in use on the *true* link
    # (time-weighted over the phase: a block per 16 ms at a steady rate) meet the target, and the
    # failed blocks stay within the binomial bound of that prediction.
    for phase, channel in (("calm", CALM), ("fade", FADE), ("calm again", CALM)):
        (blocks0, failed0, unrec0, expected0), (blocks1, failed1, unrec1, expected1) = marks[phase]
        blocks, failed = blocks1 - blocks0, failed1 - failed0
        steady_ms = [m for t, p, m in rows if p == phase][int(SETTLE_SECONDS / TICK) :]
        figures = {m: planner.evaluate(channel, K, m) for m in set(steady_ms)}
        predicted_residual = sum(figures[m].residual_loss for m in steady_ms) / len(steady_ms)
        block_failure = sum(figures[m].block_failure for m in steady_ms) / len(steady_ms)
        assert predicted_residual <= TARGET, (phase, sorted(set(steady_ms)), predicted_residual)
        # Blocks with different m fail independently with different q_i: their count is
        # Poisson-binomial, whose upper tail above its mean + 1 is at most that of
        # Binomial(blocks, mean q) (Hoeffding 1956, "On the distribution of the number of successes
        # in independent trials", Theorem 4; from memory).  scipy.stats.binom.ppf(x, n, p): the
        # least c with P[Binomial(n, p) ≤ c] ≥ x.
        bound = binom.ppf(QUANTILE, blocks, block_failure)
        residual = (unrec1 - unrec0) / max(1, expected1 - expected0)
        print(
            f"{phase}: m {sorted(set(steady_ms))}, {blocks} blocks, {failed} failed (bound {bound:.0f}, predicted "
            f"{blocks * block_failure:.2f}); residual {residual:.2e}, predicted {predicted_residual:.2e}, target "
            f"{TARGET:g}"
        )
        assert failed <= bound, (phase, failed, bound)

    # Return path cut: m held, the gauge set, one log line.
    assert set(ms_in["cut"]) == {held_m}
    assert stale_gauge == 1
    stale_lines = [r for r in caplog.records if r.getMessage() == "loss_reports_stale"]
    assert len(stale_lines) == 1 and stale_lines[0].fields["holding_m"] == held_m
    decisions = [r for r in caplog.records if r.getMessage() == "adapted"]
    assert len(decisions) == adaptations_up + adaptations_down
