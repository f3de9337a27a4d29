"""The short version of the exploration benchmark, in the test suite: two seeds of the gantry,
six episodes of 60 steps (an evaluation round of one episode after every two exploration
episodes), the exploring planner against the noise baseline. The exploring planner's state-space
coverage must beat the noise baseline's, and it must discover the goal in at least as many seeds
(the claims the full benchmark measures; see exploration_bench.py)."""

import os
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import exploration_bench  # noqa: E402


def test_exploring_planner_covers_more_than_the_noise_baseline():
    with tempfile.TemporaryDirectory(prefix="foray-bench-short-") as out:
        runs, rows = exploration_bench.main([
            "--build", os.environ["FORAY_BUILD_DIR"], "--out", out, "--scenarios", "gantry",
            "--strategies", "explore,noise", "--seeds", "2", "--episodes", "6", "--steps", "60",
            "--evaluate_every", "2", "--evaluations", "1", "--no-plots"])
    coverage = {r["strategy"]: r["final_coverage_mean"] for r in rows}
    discovered = {r["strategy"]: r["discovered"] for r in rows}
    assert coverage["explore"] > coverage["noise"], coverage
    assert discovered["explore"] >= discovered["noise"], discovered
    explore = [r for r in runs if r["strategy"] == "explore"]
    noise = [r for r in runs if r["strategy"] == "noise"]
    # With a model from the second episode on, the explorer evaluates after episodes 2 and 4;
    # the noise baseline never does.
    assert all([k for k, _ in r["evaluation_rounds"]] == [2, 4] for r in explore), explore
    assert all(len(r["coverage"]) == 4 for r in explore) and all(len(r["coverage"]) == 6 for r in noise)
    assert all(not r["evaluation_rounds"] for r in noise)
    # One evaluation episode a round: two outcomes per exploring run, none for the baseline.
    for r in explore:
        assert len(r["evaluation_outcomes"]) == 2 == len(r["evaluation_returns"]), r
        assert set(r["evaluation_outcomes"]) <= {"goal reached", "lost", "time up"}, r
        assert [rate for _, rate in r["evaluation_rounds"]] == [
            1.0 if x > 0 else 0.0 for x in r["evaluation_returns"]], r
    assert all(not r["evaluation_outcomes"] for r in noise)


def test_a_seed_gives_the_same_run_twice():
    """Learning claims compare seeds: one seed run twice (fresh server and data each time) must
    store the same transitions bit for bit, with plans never cut short by their deadline."""
    # The table robot: its first model used to be trained by the server while the first episode
    # went on (once 100 transitions had arrived), and this seed then gave two different runs.
    args = exploration_bench.parse_args([
        "--build", os.environ["FORAY_BUILD_DIR"], "--episodes", "3", "--deadline_ms", "5000",
        "--evaluate_every", "3", "--evaluations", "1", "--terminal_value", "-10", "--nll_beta", "0.5"])
    first = exploration_bench.run_one(args, "table", "explore", 1)
    second = exploration_bench.run_one(args, "table", "explore", 1)
    assert first["plans_cut_short"] == 0 and second["plans_cut_short"] == 0
    assert first["model_plans"] > 0
    assert first["returns"] == second["returns"]
    assert first["states_sha256"] == second["states_sha256"]
