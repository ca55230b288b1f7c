"""Smoke test of ``fecproxy bench pipeline``: every process starts, counts add up, all stop.

No speed is asserted (a shared 2-core machine is too noisy for that); the benchmark prints its
figures for people to read.  Only 127.0.0.1 is used; the run is bounded by --quick.
"""

from __future__ import annotations

import json
import multiprocessing

import pytest

from fecproxy.cli import main
from fecproxy.commands.bench import pipeline as bench_pipeline


@pytest.mark.slow
def test_quick_run_reports_both_pipelines_and_delays(capsys):
    children_before = set(multiprocessing.active_children())

    assert main(["bench", "pipeline", "--quick", "--json"]) == 0

    result = json.loads(capsys.readouterr().out)
    assert result["datagram_bytes"] == bench_pipeline.DATAGRAM_BYTES
    assert (result["k"], result["m"]) == (bench_pipeline.BLOCK_SIZE, bench_pipeline.REPAIR)
    pipelines = {trial["pipeline"] for trial in result["trials"]}
    assert pipelines == {"plain", "pair"}
    for trial in result["trials"]:
        assert trial["sent"] > 0
        assert 0 <= trial["received"] <= trial["sent"]  # counted by distinct sequence number
        assert trial["passed"] == (trial["loss"] < bench_pipeline.LOSS_LIMIT)
    assert [d["path"] for d in result["delays"]] == ["direct", "plain", "pair"]
    assert all(d["samples"] > 0 and d["p50_us"] <= d["p99_us"] for d in result["delays"])
    # Every child process was stopped.
    assert set(multiprocessing.active_children()) <= children_before


def test_search_steps_up_then_bisects_and_stops():
    search = bench_pipeline.RateSearch("pair", start=1000.0, ceiling=1e6)

    def trial(rate: float, lost: int) -> bench_pipeline.Trial:
        return bench_pipeline.Trial("pair", rate, rate, 10_000, 10_000 - lost, 0)

    assert search.next_rate() == 1000.0
    search.record(trial(1000.0, 0))
    assert search.next_rate() == pytest.approx(1000.0 * bench_pipeline.STEP_UP)
    search.record(trial(1500.0, 50))  # 0.5 % lost: fails
    assert 1000.0 < search.next_rate() < 1500.0
    for _ in range(20):
        rate = search.next_rate()
        if rate is None:
            break
        search.record(trial(rate, 0 if rate < 1200.0 else 11))  # 0.11 % lost above 1200/s
    assert search.stopped == "converged"
    assert 1200.0 / (1 + bench_pipeline.SEARCH_PRECISION) <= search.best < 1200.0


def test_impaired_trials_pass_within_the_predicted_residual_loss():
    # The allowance is the prediction plus a sampling margin that shrinks with the trial length.
    predicted = 6.6e-4
    short = bench_pipeline.residual_allowance(predicted, 1_000, 4)
    long = bench_pipeline.residual_allowance(predicted, 1_000_000, 4)
    assert predicted < long < short
    assert bench_pipeline.residual_allowance(0.0, 1_000, 4) == 0.0
    limit = bench_pipeline.residual_allowance(predicted, 40_000, 4)
    within = bench_pipeline.Trial("lossy", 2e4, 2e4, 40_000, 40_000 - int(limit * 40_000) + 1, 0, {}, limit)
    beyond = bench_pipeline.Trial("lossy", 2e4, 2e4, 40_000, 40_000 - int(limit * 40_000) - 1, 0, {}, limit)
    assert within.passed and not beyond.passed


def test_report_names_the_impaired_link_and_the_ratio_to_the_clean_link():
    trials = [bench_pipeline.Trial("pair", 1e4, 1e4, 100, 100, 0), bench_pipeline.Trial("lossy", 8e3, 8e3, 100, 100, 0)]
    result = bench_pipeline.PipelineResult(
        datagram_bytes=1200,
        k=16,
        m=4,
        trial_seconds=1.0,
        plain_rate=2e4,
        pair_rate=1e4,
        plain_stopped="converged",
        pair_stopped="converged",
        delays=[],
        trials=trials,
        link_loss=0.05,
        link_burst=None,
        predicted_residual=6.6e-4,
        lossy_rate=8e3,
        lossy_stopped="converged",
    )
    text = bench_pipeline.format_result(result)
    assert "5.0% link loss" in text and "i.i.d." in text and "0.80" in text
    assert result.as_dict()["lossy_ratio"] == pytest.approx(0.8)


@pytest.mark.slow
def test_quick_run_over_an_impaired_link(capsys):
    children_before = set(multiprocessing.active_children())
    assert main(["bench", "pipeline", "--quick", "--json", "--loss", "0.05", "--burst", "2"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert (result["link_loss"], result["link_burst"]) == (0.05, 2.0)
    assert 0 < result["predicted_residual"] < 0.05
    lossy = [trial for trial in result["trials"] if trial["pipeline"] == "lossy"]
    assert lossy and all(trial["loss_limit"] > result["predicted_residual"] for trial in lossy)
    assert set(multiprocessing.active_children()) <= children_before


def test_delay_figures_are_medians_and_differences_are_taken_within_each_repetition():
    def rep(direct: float, plain: float, pair: float, noise: float = 0.0) -> list:
        # A noisy moment moves every path measured in that repetition together.
        return [
            bench_pipeline.DelaySample(path, 5000.0, 1000, 0.0, value + noise, 10 * (value + noise))
            for path, value in (("direct", direct), ("plain", plain), ("pair", pair))
        ]

    repetitions = [rep(50, 150, 200), rep(50, 150, 200, noise=5000), rep(50, 150, 200), rep(60, 160, 220)]
    figures, added = bench_pipeline.summarize_delays(repetitions)

    pair = next(f for f in figures if f.path == "pair")
    assert pair.repeats == 4 and pair.samples == 4000
    assert pair.p50_us == pytest.approx(210.0)  # median of 200, 200, 220, 5200
    assert pair.p50_range_us == (200.0, 5200.0)
    by_label = {a.label: a for a in added}
    over_direct = by_label["added by the pair (pair − direct)"]
    # Within each repetition the noise cancels: 150, 150, 150, 160.
    assert over_direct.p50_us == pytest.approx(150.0)
    assert over_direct.p50_range_us == (150.0, 160.0)
    assert by_label["of which FEC (pair − plain relays)"].p99_us == pytest.approx(500.0)
    text = bench_pipeline.format_result(
        bench_pipeline.PipelineResult(1200, 16, 4, 1.0, 2e4, 1e4, "converged", "converged", figures, [], added)
    )
    assert "median of 4 repetitions" in text and "150.0 [150–160]" in text
