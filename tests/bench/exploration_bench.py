"""Does exploration pay? The simulated robots learn from scratch through a real forayd on
loopback, under four strategies, for several seeds each:

  explore  Foray's planner, expected reward + information gain (weights 1 and 1);
  reward   the same planner with the information weight 0;
  noise    no model: a fixed nominal controller (a PD hold of the start pose) plus Gaussian
           noise of 0.3 of each action's half range, clipped to the bounds and rate limits;
  random   no model: random actions over each action's whole range, correlated over about 10
           control periods (an Ornstein-Uhlenbeck process), clipped to the bounds and rate
           limits: random pushing, where noise around a hold mostly stays put.

Every run starts with an empty data directory and a fresh forayd; the model is retrained on
everything sent after each episode and at no other time (foray-sim --train_each_episode), so
a run is repeatable for its seed. After every K exploration episodes (--evaluate_every), E
evaluation episodes (--evaluations) plan reward only on the current model: their success rate
(return > 0) over the run is the learning curve of the task. The baselines have no model, so
they have no evaluation. Per run it records the exploration
episode of first reward (the hidden goal discovered), the state-space coverage after each
exploration episode (fraction of occupied cells of a 20x20 grid over the robot's two coverage
dimensions, read from the SQLite store), returns, objects lost (episodes that ended in a
terminal state), the evaluation success per round and each evaluation episode's outcome and
stored states (to tell how it failed), the final model's holdout error, wall time
and plans, and how many model plans their deadline cut short of their CEM iterations (give a
deadline long enough for none, and the planners do the same work on any machine: foray-sim
waits for each plan, the simulation's clock is its own). Writes exploration_bench.json, prints
a summary table, and draws PNG plots with matplotlib (mean and min..max over seeds).

    /usr/bin/python3 tests/bench/exploration_bench.py --build build --out build/bench/exploration
"""

import argparse
import hashlib
import json
import os
import re
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time

import numpy as np

GRID = 20


def start_forayd(forayd, data_dir):
    log_path = os.path.join(data_dir, "forayd.log")
    log = open(log_path, "w+")
    process = subprocess.Popen([forayd, "--listen=127.0.0.1:0", f"--data_dir={data_dir}"],
                               stdout=log, stderr=subprocess.STDOUT)
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline:
        with open(log_path) as f:
            match = re.search(r"\(port (\d+)\)", f.read())
        if match:
            return process, f"127.0.0.1:{match.group(1)}"
        if process.poll() is not None:
            break
        time.sleep(0.05)
    raise RuntimeError(open(log_path).read())


def stop(process):
    process.send_signal(signal.SIGTERM)
    try:
        process.wait(timeout=30)
    except subprocess.TimeoutExpired:
        process.kill()


def read_store(data_dir, python_dir):
    """The robot's spec, its transitions' states in seq order with their episode ids, and the
    newest checkpoint's training report, straight from the SQLite file."""
    sys.path.insert(0, python_dir)
    from foray.v1 import types_pb2

    db = sqlite3.connect(os.path.join(data_dir, "foray.db"))
    try:
        robot_id, spec_bytes = db.execute("SELECT robot_id, spec FROM robots").fetchone()
        spec = types_pb2.RobotSpec.FromString(spec_bytes)
        rows = db.execute("SELECT episode, next_state FROM transitions WHERE robot_id = ? ORDER BY seq",
                          (robot_id,)).fetchall()
        report = db.execute("SELECT report FROM checkpoints WHERE robot_id = ? "
                            "ORDER BY model_version DESC LIMIT 1", (robot_id,)).fetchone()
    finally:
        db.close()
    episodes = np.array([r[0] for r in rows])
    states = np.array([np.frombuffer(r[1], dtype="<f8") for r in rows])
    training = types_pb2.TrainingReport.FromString(report[0]) if report else None
    return spec, episodes, states, training


def cells(spec, states):
    """Indices of the occupied cells of the coverage grid, one per state."""
    i, j = spec.coverage_indices[0], spec.coverage_indices[1]
    lo, hi = np.array(spec.coverage_lower), np.array(spec.coverage_upper)
    u = np.clip(((states[:, [i, j]] - lo) / (hi - lo) * GRID).astype(int), 0, GRID - 1)
    return u[:, 0] * GRID + u[:, 1]


def run_one(args, scenario, strategy, seed):
    with tempfile.TemporaryDirectory(prefix="foray-bench-") as data_dir:
        process, address = start_forayd(os.path.join(args.build, "server", "forayd"), data_dir)
        report_path = os.path.join(data_dir, "report.jsonl")
        start = time.monotonic()
        try:
            result = subprocess.run(
                [os.path.join(args.build, "client", "foray-sim"), f"--address={address}",
                 f"--admin_token_file={os.path.join(data_dir, 'admin-token')}",
                 f"--state_dir={os.path.join(data_dir, 'sim')}", f"--robots={scenario}",
                 f"--episodes={args.episodes}", f"--steps={args.steps}", f"--seed={seed}",
                 f"--strategy={strategy}", "--train_each_episode",
                 f"--deadline_ms={args.deadline_ms}", f"--report={report_path}",
                 f"--evaluate_every={args.evaluate_every}", f"--evaluation_episodes={args.evaluations}",
                 f"--terminal_value={args.terminal_value}", f"--horizon={args.horizon}",
                 f"--nll_beta={args.nll_beta}", f"--min_epoch_steps={args.min_epoch_steps}",
                 f"--evaluation_horizon={args.evaluation_horizon}",
                 f"--reward_nll_beta={args.reward_nll_beta}", f"--value_weight={args.value_weight}",
                 f"--value_estimate={args.value_estimate}",
                 f"--reward_estimate={args.reward_estimate}",
                 f"--evaluation_value_weight={args.evaluation_value_weight}",
                 f"--evaluation_reward_estimate={args.evaluation_reward_estimate}",
                 f"--name_prefix=bench-{strategy}-s{seed}"],
                capture_output=True, text=True, timeout=3600)
            if result.returncode != 0:
                raise RuntimeError(result.stdout + result.stderr)
            wall = time.monotonic() - start
            spec, episode_ids, states, training = read_store(data_dir, os.path.join(args.build, "python"))
        finally:
            stop(process)
        episodes = [json.loads(line) for line in open(report_path)]
    explored = [e for e in episodes if not e.get("evaluation")]
    occupied, coverage = set(), []
    visit = np.zeros(GRID * GRID, dtype=int)
    for e in episodes:
        mine = cells(spec, states[episode_ids == e["episode"]])
        occupied.update(mine.tolist())
        np.add.at(visit, mine, 1)
        if not e.get("evaluation"):
            coverage.append(len(occupied) / (GRID * GRID))
    returns = [e["return"] for e in explored]
    first = next((k + 1 for k, r in enumerate(returns) if r > 0), None)
    # Evaluation rounds: after exploration episode k, the success rate of the round's episodes.
    rounds, pending, done_explore = [], [], 0
    for e in episodes:
        if e.get("evaluation"):
            pending.append(1.0 if e["return"] > 0 else 0.0)
        else:
            if pending:
                rounds.append((done_explore, float(np.mean(pending))))
                pending = []
            done_explore += 1
    if pending:
        rounds.append((done_explore, float(np.mean(pending))))
    return {
        "scenario": scenario, "strategy": strategy, "seed": seed,
        "first_discovery_episode": first,
        "returns": returns, "coverage": coverage,
        "lost": sum(1 for e in episodes if e.get("outcome") == "lost"),
        "lost_exploring": sum(1 for e in explored if e.get("outcome") == "lost"),
        "evaluation_rounds": rounds,
        # Each evaluation episode's outcome (goal reached, lost or time up) and return, in order.
        "evaluation_outcomes": [e.get("outcome") for e in episodes if e.get("evaluation")],
        "evaluation_returns": [e["return"] for e in episodes if e.get("evaluation")],
        # Where each evaluation episode went: its stored next states in order, to tell how an
        # evaluation failed.
        "evaluation_states": [states[episode_ids == e["episode"]].tolist()
                              for e in episodes if e.get("evaluation")],
        "visits": visit.reshape(GRID, GRID).tolist(),
        # Every stored next state in order: two runs of one seed are the same run when these match.
        "states_sha256": hashlib.sha256(np.ascontiguousarray(states).tobytes()).hexdigest(),
        "holdout_mse": training.holdout_mse if training else None,
        "holdout_nll": training.holdout_nll if training else None,
        "plans": sum(e["plans"] for e in episodes),
        "model_plans": sum(e["model_plans"] for e in episodes),
        "plans_cut_short": sum(e["plans_cut_short"] for e in episodes),
        "plan_ms": float(np.mean([e["plan_ms"] for e in episodes if e["plans"] > 0])) if any(
            e["plans"] > 0 for e in episodes) else 0.0,
        "wall_s": wall,
    }


def summarise(runs):
    rows = []
    for scenario in sorted({r["scenario"] for r in runs}):
        for strategy in ("explore", "reward", "noise", "random"):
            mine = [r for r in runs if r["scenario"] == scenario and r["strategy"] == strategy]
            if not mine:
                continue
            found = [r["first_discovery_episode"] for r in mine if r["first_discovery_episode"]]
            late = [sum(1 for x in r["returns"][-5:] if x > 0) for r in mine if r["first_discovery_episode"]]
            final = [r["evaluation_rounds"][-1][1] for r in mine if r["evaluation_rounds"]]
            rows.append({
                "scenario": scenario, "strategy": strategy, "runs": len(mine),
                "discovered": len(found),
                "median_first_episode": float(np.median(found)) if found else None,
                "final_coverage_mean": float(np.mean([r["coverage"][-1] for r in mine])),
                "reached_in_4_of_last_5": sum(1 for n in late if n >= 4),
                "final_evaluation_success": float(np.mean(final)) if final else None,
                # Every evaluation episode of every run: less noisy than the last round alone.
                "evaluation_success_all": (float(np.mean([v for r in mine for _, v in r["evaluation_rounds"]]))
                                           if final else None),
                "lost_total": int(sum(r["lost"] for r in mine)),
                "wall_s_mean": float(np.mean([r["wall_s"] for r in mine])),
                # Model plans whose deadline came before their CEM iterations were done: where
                # this is not 0 the planners' work depends on the machine's speed.
                "plans_cut_short_fraction": (sum(r["plans_cut_short"] for r in mine) /
                                             max(1, sum(r["model_plans"] for r in mine))),
            })
    return rows


def print_table(rows, episodes, steps):
    print(f"budget: {episodes} episodes (exploration and evaluation) of "
          f"{steps or 'the scenario own number of'} steps per run")
    print(f"{'scenario':8} {'strategy':8} {'found':>7} {'median ep':>9} {'coverage':>9} "
          f"{'4 of last 5':>11} {'eval. last':>10} {'eval. all':>9} {'lost':>5} {'wall s':>7} {'cut short':>9}")
    for r in rows:
        med = f"{r['median_first_episode']:.1f}" if r["median_first_episode"] else "-"
        ev = f"{100 * r['final_evaluation_success']:.0f}%" if r["final_evaluation_success"] is not None else "-"
        ev_all = f"{100 * r['evaluation_success_all']:.0f}%" if r["evaluation_success_all"] is not None else "-"
        print(f"{r['scenario']:8} {r['strategy']:8} {r['discovered']:>3}/{r['runs']:<3} {med:>9} "
              f"{r['final_coverage_mean']:9.3f} {r['reached_in_4_of_last_5']:>11} {ev:>10} {ev_all:>9} "
              f"{r['lost_total']:>5} {r['wall_s_mean']:7.1f} {100 * r['plans_cut_short_fraction']:8.1f}%")


def plot(runs, out_dir):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    colours = {"explore": "tab:green", "reward": "tab:blue", "noise": "tab:grey", "random": "tab:orange"}
    for scenario in sorted({r["scenario"] for r in runs}):
        fig, axes = plt.subplots(1, 3, figsize=(16, 4))
        for strategy, colour in colours.items():
            mine = [r for r in runs if r["scenario"] == scenario and r["strategy"] == strategy]
            if not mine:
                continue
            for ax, key in zip(axes, ("coverage", "returns")):
                data = np.array([r[key] for r in mine], dtype=float)
                x = np.arange(1, data.shape[1] + 1)
                ax.plot(x, data.mean(0), color=colour, label=strategy)
                ax.fill_between(x, data.min(0), data.max(0), color=colour, alpha=0.2)
            # Evaluation success per round, by the exploration episodes done before it.
            by_round = {}
            for r in mine:
                for k, (after, rate) in enumerate(r["evaluation_rounds"]):
                    by_round.setdefault(after, []).append(rate)
            if by_round:
                x = sorted(by_round)
                rates = [np.array(by_round[k]) for k in x]
                axes[2].plot(x, [v.mean() for v in rates], color=colour, marker="o", label=strategy)
                axes[2].fill_between(x, [v.min() for v in rates], [v.max() for v in rates], color=colour, alpha=0.2)
        axes[0].set(title=f"{scenario}: coverage (20x20 grid)", xlabel="exploration episode",
                    ylabel="fraction of cells")
        axes[1].set(title=f"{scenario}: exploration return", xlabel="exploration episode",
                    ylabel="return (steps at the goal)")
        axes[2].set(title=f"{scenario}: evaluation success", xlabel="exploration episodes before the round",
                    ylabel="success rate (return > 0)", ylim=(-0.05, 1.05))
        axes[0].legend()
        fig.tight_layout()
        fig.savefig(os.path.join(out_dir, f"{scenario}_coverage_return.png"), dpi=110)
        plt.close(fig)

        strategies = [s for s in colours if any(r["scenario"] == scenario and r["strategy"] == s for r in runs)]
        fig, axes = plt.subplots(1, len(strategies), figsize=(4 * len(strategies), 4))
        for ax, strategy in zip(np.atleast_1d(axes), strategies):
            visits = sum(np.array(r["visits"]) for r in runs
                         if r["scenario"] == scenario and r["strategy"] == strategy)
            ax.imshow(np.log1p(visits).T, origin="lower", cmap="viridis")
            ax.set(title=f"{scenario} / {strategy}: visits (log)", xticks=[], yticks=[])
        fig.tight_layout()
        fig.savefig(os.path.join(out_dir, f"{scenario}_visits.png"), dpi=110)
        plt.close(fig)


def parse_args(argv=None):
    """The benchmark's settings; tests take their defaults from here."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--build", default="build")
    parser.add_argument("--out", default="build/bench/exploration")
    parser.add_argument("--scenarios", default="gantry,arm")
    parser.add_argument("--strategies", default="explore,reward,noise,random")
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--episodes", type=int, default=15)
    parser.add_argument("--steps", type=int, default=0, help="steps per episode; 0: the scenario's own")
    parser.add_argument("--deadline_ms", type=float, default=100)
    parser.add_argument("--horizon", type=int, default=0, help="plan horizon in steps; 0: the scenario's own")
    parser.add_argument("--evaluate_every", type=int, default=3, help="K: exploration episodes between rounds")
    parser.add_argument("--evaluations", type=int, default=2, help="E: evaluation episodes per round")
    parser.add_argument("--terminal_value", type=float, default=0.0,
                        help="the robots' objective value of a terminal state (foray-sim --terminal_value)")
    parser.add_argument("--nll_beta", type=float, default=-1.0,
                        help="beta of the models' beta-NLL training loss (foray-sim --nll_beta); 0: plain NLL; "
                             "negative: the server's default")
    parser.add_argument("--min_epoch_steps", type=int, default=0,
                        help="fewest minibatch steps in a training epoch (foray-sim --min_epoch_steps); "
                             "0: the server's default")
    parser.add_argument("--reward_nll_beta", type=float, default=-1.0,
                        help="beta of the reward's output in the training loss (foray-sim --reward_nll_beta); "
                             "negative: the server's default")
    parser.add_argument("--evaluation_horizon", type=int, default=0,
                        help="plan horizon of evaluation plans (foray-sim --evaluation_horizon); 0: the robot's")
    parser.add_argument("--value_weight", type=float, default=0.0,
                        help="objective weight of the value of the states a plan ends in; 0: none")
    parser.add_argument("--value_estimate", default="average", choices=("average", "best"),
                        help="how the value is estimated (foray-sim --value_estimate)")
    parser.add_argument("--reward_estimate", default="model", choices=("model", "nearby"),
                        help="where a plan's expected reward comes from (foray-sim --reward_estimate)")
    parser.add_argument("--evaluation_value_weight", type=float, default=0.0,
                        help="the value's weight in evaluation plans only; 0: the robot's")
    parser.add_argument("--evaluation_reward_estimate", default="", choices=("", "model", "nearby"),
                        help="where evaluation plans only take their expected reward from; empty: the robot's")
    parser.add_argument("--no-plots", action="store_true")
    return parser.parse_args(argv)


def main(argv=None):
    args = parse_args(argv)
    os.makedirs(args.out, exist_ok=True)
    runs = []
    for scenario in args.scenarios.split(","):
        for seed in range(1, args.seeds + 1):
            for strategy in args.strategies.split(","):
                run = run_one(args, scenario, strategy, seed)
                runs.append(run)
                last = run["evaluation_rounds"][-1][1] if run["evaluation_rounds"] else None
                print(f"{scenario} {strategy} seed {seed}: first reward episode "
                      f"{run['first_discovery_episode']}, coverage {run['coverage'][-1]:.3f}, lost {run['lost']}, "
                      f"last evaluation success {last}, {run['wall_s']:.0f} s", flush=True)
    rows = summarise(runs)
    with open(os.path.join(args.out, "exploration_bench.json"), "w") as f:
        json.dump({"settings": vars(args), "summary": rows, "runs": runs}, f, indent=1)
    print_table(rows, args.episodes, args.steps)
    if not args.no_plots:
        plot(runs, args.out)
    return runs, rows


if __name__ == "__main__":
    main()
