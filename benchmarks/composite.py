"""Composite against direct infill on goals composed over conditions (issue 11).

For each problem and seed both modes spend the same budget from the same start (the baseline,
then a Latin hypercube of ``n_initial`` designs): ``direct`` models the objective and each
constraint margin, ``composite`` models each quantity at each condition the goal reads and
composes the goal from their samples (Astudillo & Frazier 2019). Reported per mode: evaluations
until the best feasible objective is within 1 % of the baseline's gap to the optimum, the regret
at the budget, and for ``target`` the angle error of the best design after 8 evaluations.

    python -m benchmarks.composite --seeds 10 --json benchmarks/results/composite.json
    python -m benchmarks.composite --problems target --seeds 3     # a quick look

The decision functions are sortie's own (``sortie.infill.propose_infill``), driven one design at
a time, as a one-slot campaign does.
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np

from benchmarks.problems import COMPOSITE_PROBLEMS, CompositeProblem
from sortie import sampling
from sortie.goal import Composition, read_outputs
from sortie.infill import History, InfillSettings, propose_infill

MODES = ("direct", "composite")
# Designs after which the target problem's best angle is judged (issue 11: within 0.02° in at most 8).
TARGET_DESIGNS = 8


def run(problem: CompositeProblem, mode: str, seed: int) -> dict[str, Any]:
    """One seed of one mode: the best-so-far curve, the designs, and the seconds per proposal."""
    space, d = problem.space, problem.space.n_dims
    base = problem.baseline_values()
    comp = Composition(problem.goal, problem.quantities, problem.conditions, base,
                       read_outputs(problem.goal, problem.quantities, problem.conditions))
    X: list[np.ndarray] = []
    values: list[dict[str, Any]] = []
    objective: list[float] = []
    margins: list[list[float]] = []
    outputs: list[list[float]] = []

    def add(x: np.ndarray) -> None:
        v = space.to_values(np.asarray(x, dtype=float)[None, :])[0]
        q = problem.solve(v)
        score = problem.goal.score(q, base, problem.conditions)
        X.append(space.to_unit([v])[0])
        values.append(v)
        objective.append(score.objective if problem.goal.sense == "minimize" else -score.objective)
        margins.append(list(score.constraints.values()))
        outputs.append([float(q[name][c]) for name, c in comp.outputs])

    add(space.baseline_unit())
    for x in sampling.latin_hypercube(problem.n_initial, d, seed=seed):
        add(x)
    warm, seconds = None, []
    settings = InfillSettings()
    n_c = len(problem.goal.constraints)
    while len(X) < problem.budget:
        n = len(X)
        history = History(np.array(X), np.array(objective), np.array(margins, dtype=float).reshape(n, n_c),
                          np.ones(n, bool), np.empty((0, d)),
                          np.array(outputs) if mode == "composite" else None, comp if mode == "composite" else None)
        t0 = time.perf_counter()
        proposal = propose_infill(history, settings, seed=seed * 1000 + n, warm=warm)
        seconds.append(time.perf_counter() - t0)
        assert proposal is not None
        warm = proposal.kernels
        add(proposal.x)
    best, curve, best_values = math.inf, [], []
    for f, g, v in zip(objective, margins, values, strict=True):
        if np.isfinite(f) and all(m <= 0 for m in g) and f < best:
            best, best_v = f, v
        curve.append(best)
        best_values.append(dict(best_v) if math.isfinite(best) else None)
    return {"curve": curve, "best_values": best_values, "proposal_s": seconds}


def summarise(problem: CompositeProblem, results: dict[str, list[dict[str, Any]]]) -> dict[str, Any]:
    base = problem.baseline_values()
    baseline_value = problem.goal.score(base, base, problem.conditions).objective
    out: dict[str, Any] = {"reference": problem.reference, "reference_source": problem.reference_source,
                           "budget": problem.budget, "baseline_objective": baseline_value}
    for mode, runs in results.items():
        hits = [next((i + 1 for i, b in enumerate(r["curve"]) if math.isfinite(b) and problem.within_1pct(b, baseline_value)),
                     None) for r in runs]
        regret = [float(r["curve"][-1] - problem.reference) if math.isfinite(r["curve"][-1]) else None for r in runs]
        med = statistics.median([h if h is not None else math.inf for h in hits]) if hits else math.inf
        finite = [r for r in regret if r is not None]
        entry: dict[str, Any] = {
            "evals_to_1pct": hits,
            "median_evals_to_1pct": float(med) if math.isfinite(med) else None,
            "final_regret": regret,
            "median_final_regret": statistics.median(finite) if finite else None,
            "mean_proposal_s": float(np.mean([t for r in runs for t in r["proposal_s"]])),
        }
        if problem.optimum is not None and problem.name == "target":
            errors = []
            for r in runs:
                v = r["best_values"][min(TARGET_DESIGNS, len(r["best_values"])) - 1]
                errors.append(abs(float(v["ramp_angle"]) - problem.optimum["ramp_angle"]) if v is not None else None)
            entry[f"angle_error_deg_at_{TARGET_DESIGNS}"] = errors
            entry[f"median_angle_error_deg_at_{TARGET_DESIGNS}"] = statistics.median(
                [e if e is not None else math.inf for e in errors])
        out[mode] = entry
    return out


def _one(task: tuple[str, str, int]) -> tuple[str, str, int, dict[str, Any], float]:
    name, mode, seed = task
    t0 = time.perf_counter()
    result = run(COMPOSITE_PROBLEMS[name](), mode, seed)
    return name, mode, seed, result, time.perf_counter() - t0


def print_table(name: str, summary: dict[str, Any]) -> None:
    print(f"\n{name}: budget {summary['budget']}, reference {summary['reference']:.6g}, "
          f"baseline {summary['baseline_objective']:.6g}")
    print("| mode | median evals to 1 % | reached | median final regret | mean proposal s | extra |")
    print("|---|---|---|---|---|---|")
    for mode in MODES:
        s = summary.get(mode)
        if s is None:
            continue
        med = "never" if s["median_evals_to_1pct"] is None else f"{s['median_evals_to_1pct']:g}"
        reached = sum(h is not None for h in s["evals_to_1pct"])
        reg = "-" if s["median_final_regret"] is None else f"{s['median_final_regret']:.3g}"
        key = f"median_angle_error_deg_at_{TARGET_DESIGNS}"
        extra = f"median angle error after {TARGET_DESIGNS} designs {s[key]:.4f}°" if key in s else ""
        print(f"| {mode} | {med} | {reached}/{len(s['evals_to_1pct'])} | {reg} | {s['mean_proposal_s']:.2f} | {extra} |")


def main() -> None:
    parser = argparse.ArgumentParser(description="Composite against direct infill on composed goals.")
    parser.add_argument("--problems", nargs="+", choices=sorted(COMPOSITE_PROBLEMS), default=list(COMPOSITE_PROBLEMS))
    parser.add_argument("--modes", nargs="+", choices=MODES, default=list(MODES))
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--jobs", type=int, default=1, help="runs side by side (the machine is shared: keep it small)")
    parser.add_argument("--json", type=Path, default=Path("benchmarks/results/composite.json"))
    parser.add_argument("--only-seeds", type=int, nargs="+", default=None, help="run these seeds instead of 0..seeds-1")
    parser.add_argument("--runs", type=Path, default=None,
                        help="also append each finished run to this JSON-lines file, so runs split over several "
                             "processes can be summarised together with --merge")
    parser.add_argument("--merge", type=Path, nargs="+", default=None, help="summarise these JSON-lines files instead of running")
    args = parser.parse_args()
    seeds = args.only_seeds if args.only_seeds is not None else list(range(args.seeds))
    results: dict[str, dict[str, dict[int, Any]]] = {p: {m: {} for m in args.modes} for p in args.problems}
    if args.merge:
        for path in args.merge:
            for line in path.read_text().splitlines():
                row = json.loads(line)
                if row["problem"] in results and row["mode"] in results[row["problem"]]:
                    results[row["problem"]][row["mode"]][row["seed"]] = row["result"]
    else:
        tasks = [(p, m, s) for p in args.problems for m in args.modes for s in seeds]
        with ProcessPoolExecutor(args.jobs) as pool:
            for name, mode, seed, result, seconds in pool.map(_one, tasks):
                results[name][mode][seed] = result
                print(f"{name} {mode} seed {seed}: best {result['curve'][-1]:.4g} in {seconds:.1f} s", flush=True)
                if args.runs is not None:
                    with args.runs.open("a") as f:
                        f.write(json.dumps({"problem": name, "mode": mode, "seed": seed, "result": result}) + "\n")
    ordered = {p: {m: [runs[k] for k in sorted(runs)] for m, runs in modes.items() if runs} for p, modes in results.items()}
    summary = {"problems": {name: summarise(COMPOSITE_PROBLEMS[name](), ordered[name]) for name in args.problems
                            if ordered[name]}}
    for name, s in summary["problems"].items():
        print_table(name, s)
    args.json.parent.mkdir(parents=True, exist_ok=True)
    args.json.write_text(json.dumps(summary, indent=2) + "\n")
    print(f"wrote {args.json}")


if __name__ == "__main__":
    main()
