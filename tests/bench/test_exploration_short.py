"""The short version of the exploration benchmark, in the test suite: two seeds of the gantry,
five episodes of 60 steps, the exploring planner against the noise baseline. The exploring
planner's state-space coverage must beat the noise baseline's (the claim the full benchmark
measures; see exploration_bench.py)."""

import os
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import exploration_bench  # noqa: E402


def test_exploring_planner_covers_more_than_the_noise_baseline():
    with tempfile.TemporaryDirectory(prefix="foray-bench-short-") as out:
        runs, rows = exploration_bench.main([
            "--build", os.environ["FORAY_BUILD_DIR"], "--out", out, "--scenarios", "gantry",
            "--strategies", "explore,noise", "--seeds", "2", "--episodes", "5", "--steps", "60",
            "--no-plots"])
    coverage = {r["strategy"]: r["final_coverage_mean"] for r in rows}
    assert coverage["explore"] > coverage["noise"], coverage
    assert len(runs) == 4 and all(len(r["coverage"]) == 5 for r in runs)
