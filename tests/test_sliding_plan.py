"""``fecproxy plan --sliding-window``: the seeded simulation beside the block code.

Oracle for the simulation loop: the planner's exact residual loss of the block code (binomial for
independent loss, the Cidon–Khamisy–Sidi recursion for Gilbert–Elliott) must fall inside the
simulated block code's confidence interval when both run on the same link.
"""

from __future__ import annotations

import contextlib
import io
import json

from fecproxy import cli
from fecproxy.linkmodel import sliding_sim
from fecproxy.linkmodel.loss_models import GilbertElliott
from fecproxy.linkmodel.planner import evaluate


def test_simulated_block_code_agrees_with_the_exact_planner():
    channel = GilbertElliott.bernoulli(0.1)
    simulated = sliding_sim.simulate("block", dict(block_size=8, repair=2), channel, 1000.0, datagrams=16_000)
    exact = evaluate(channel, 8, 2).residual_loss
    assert simulated.residual_loss.low <= exact <= simulated.residual_loss.high
    assert abs(simulated.overhead - 0.25) < 0.01


def test_simulation_is_seeded():
    channel = GilbertElliott.from_loss_burst(0.05, 3)
    one = sliding_sim.simulate("sliding", dict(window=16, repair_interval=4), channel, 500.0, datagrams=800, seed=3)
    two = sliding_sim.simulate("sliding", dict(window=16, repair_interval=4), channel, 500.0, datagrams=800, seed=3)
    assert one == two


def test_plan_prints_sliding_beside_block_with_intervals():
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = cli.main(
            ["plan", "--loss", "0.05", "--rate", "1000", "--sliding-window", "8,16", "--sim-datagrams", "800", "--json"]
        )
    assert code == 0
    result = json.loads(out.getvalue())
    assert result["block"]["code"] == "block k=16 m=4"
    assert [c["code"] for c in result["sliding"]] == ["sliding window=8 interval=4", "sliding window=16 interval=4"]
    for c in [result["block"], *result["sliding"]]:
        low, high = c["residual_loss"]["ci95"]
        assert low <= c["residual_loss"]["mean"] <= high
        assert "seeded simulation" in c["method"]


def test_plan_sliding_needs_a_rate():
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        assert cli.main(["plan", "--loss", "0.05", "--sliding-window", "8"]) == 2
    assert "--rate" in err.getvalue()
