"""Sample efficiency of infill against the classic path and one-shot sampling.

For each problem and seed, every strategy spends the problem's budget of evaluations (the
baseline design first, counted). Reported per strategy: evaluations until the best feasible
value is within 1 % of the reference optimum, and the regret f - f* at the budget.

The strategies drive sortie's own decision functions (``sortie.infill``) with a simulated clock,
not the Prefect flow, so ten seeds of five strategies run in minutes; the flow's own overhead is
measured by ``benchmarks.overhead``. ``ei-async4`` keeps four evaluations in flight with
random durations (uniform 0.5-1.5 time units) and proposes each new design the moment a slot
frees, with the running designs handled by the Kriging believer, exactly as the flow does.

    python -m benchmarks.infill --problem branin --seeds 10 --json benchmarks/results/branin.json
    python -m benchmarks.infill --timing --json benchmarks/results/proposal-timing.json

Every adaptive strategy starts from the same rule: the baseline, then a Latin hypercube of
2d + 1 designs (``Problem.n_initial``), and the same budget as the others.
"""

from __future__ import annotations

import argparse
import heapq
import json
import statistics
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from benchmarks.problems import PROBLEMS, Problem
from sortie import sampling
from sortie.infill import History, InfillSettings, optimize_surface, propose_infill

STRATEGIES = ("random", "lhs", "classic", "ei", "ei-async4")
# Jones, Schonlau & Welch 1998, evaluations EGO needed (from memory; CHECKS.md §3 marks them [R]).
PUBLISHED_EGO = {"branin": 28, "hartmann6": 121}


@dataclass
class Run:
    """What one strategy did on one seed: designs in the order their results came back."""

    X: list[np.ndarray] = field(default_factory=list)
    objective: list[float] = field(default_factory=list)
    margins: list[np.ndarray] = field(default_factory=list)
    succeeded: list[bool] = field(default_factory=list)
    proposal_s: list[float] = field(default_factory=list)

    def add(self, problem: Problem, x: np.ndarray) -> None:
        values = problem.space.to_values(x[None, :])[0]
        f, g, ok = problem.evaluate(values)
        self.X.append(problem.space.to_unit([values])[0])
        self.objective.append(f)
        self.margins.append(g)
        self.succeeded.append(ok)

    def history(self, pending: list[np.ndarray], n_dims: int) -> History:
        n_g = len(self.margins[0]) if self.margins else 0
        return History(np.array(self.X).reshape(len(self.X), n_dims), np.array(self.objective, dtype=float),
                       np.array(self.margins, dtype=float).reshape(len(self.X), n_g), np.array(self.succeeded, dtype=bool),
                       np.array(pending, dtype=float).reshape(len(pending), n_dims))

    def best_curve(self) -> list[float]:
        """Best feasible objective after each evaluation (inf until one is feasible)."""
        best, out = np.inf, []
        for f, g, ok in zip(self.objective, self.margins, self.succeeded, strict=True):
            if ok and np.isfinite(f) and (g <= 0).all():
                best = min(best, f)
            out.append(best)
        return out


def _settings() -> InfillSettings:
    return InfillSettings()


def run_strategy(problem: Problem, strategy: str, seed: int) -> Run:
    d = problem.space.n_dims
    run = Run()
    run.add(problem, problem.space.baseline_unit())
    budget = problem.budget
    if strategy == "random":
        for x in np.random.default_rng(seed).random((budget - 1, d)):
            run.add(problem, x)
    elif strategy == "lhs":
        for x in sampling.latin_hypercube(budget - 1, d, seed=seed):
            run.add(problem, x)
    elif strategy == "classic":
        ccd = sampling.central_composite(d, fraction="half" if d >= 5 else None)
        unit = sampling.coded_to_unit(ccd)
        for x in unit[np.random.default_rng(seed).permutation(len(unit))]:
            run.add(problem, x)
        t0 = time.perf_counter()
        proposal = optimize_surface(run.history([], d), InfillSettings(models=("quadratic",)), seed=seed)
        run.proposal_s.append(time.perf_counter() - t0)
        if proposal is not None:
            run.add(problem, proposal.x)
    elif strategy == "ei":
        for x in sampling.latin_hypercube(problem.n_initial, d, seed=seed):
            run.add(problem, x)
        warm = None
        while len(run.X) < budget:
            t0 = time.perf_counter()
            proposal = propose_infill(run.history([], d), _settings(), seed=seed * 1000 + len(run.X), warm=warm)
            run.proposal_s.append(time.perf_counter() - t0)
            assert proposal is not None
            warm = proposal.kernels
            run.add(problem, proposal.x)
    elif strategy == "ei-async4":
        _run_async(problem, run, seed, slots=4)
    else:
        raise ValueError(f"unknown strategy {strategy!r}; choose from {', '.join(STRATEGIES)}")
    return run


def _run_async(problem: Problem, run: Run, seed: int, slots: int) -> None:
    """Event simulation: `slots` evaluations in flight, each new design proposed when one frees."""
    d = problem.space.n_dims
    rng = np.random.default_rng(seed + 99)
    queue = list(sampling.latin_hypercube(problem.n_initial, d, seed=seed))
    running: list[tuple[float, int, np.ndarray]] = []
    clock, started, order, warm = 0.0, len(run.X), 0, None
    while started < problem.budget or running:
        while len(running) < slots and started < problem.budget:
            if queue:
                x = queue.pop(0)
            else:
                t0 = time.perf_counter()
                proposal = propose_infill(run.history([r[2] for r in running], d), _settings(),
                                          seed=seed * 1000 + started, warm=warm)
                run.proposal_s.append(time.perf_counter() - t0)
                if proposal is None:
                    break
                warm, x = proposal.kernels, proposal.x
            order += 1
            heapq.heappush(running, (clock + rng.uniform(0.5, 1.5), order, np.asarray(x, dtype=float)))
            started += 1
        clock, _, x = heapq.heappop(running)
        run.add(problem, x)


def summarise(problem: Problem, runs: dict[str, list[Run]]) -> dict[str, Any]:
    out: dict[str, Any] = {"problem": problem.name, "budget": problem.budget, "reference": problem.reference,
                           "reference_source": problem.reference_source, "strategies": {}}
    for name, seeds in runs.items():
        evals, regret = [], []
        for run in seeds:
            curve = run.best_curve()
            hit = next((i + 1 for i, b in enumerate(curve) if np.isfinite(b) and problem.within_1pct(b)), None)
            evals.append(hit)
            regret.append(float(curve[-1] - problem.reference) if np.isfinite(curve[-1]) else None)
        reached = sorted(e if e is not None else np.inf for e in evals)
        median = float(statistics.median(reached)) if reached else None
        timings = [t for r in seeds for t in r.proposal_s]
        out["strategies"][name] = {
            "best_curves": [[None if not np.isfinite(b) else float(b) for b in run.best_curve()] for run in seeds],
            "evals_to_1pct": evals,
            "median_evals_to_1pct": median if median is not None and np.isfinite(median) else None,
            "final_regret": regret,
            "median_final_regret": statistics.median([r for r in regret if r is not None]) if any(r is not None for r in regret) else None,
            "evaluations": [len(r.X) for r in seeds],
            "mean_proposal_s": float(np.mean(timings)) if timings else None,
        }
    if "classic" in out["strategies"]:
        finals = [r for r in out["strategies"]["classic"]["final_regret"] if r is not None]
        if finals:
            target = problem.reference + statistics.median(finals)
            for s in out["strategies"].values():
                # evaluations until the best feasible value is as good as classic's median final value
                hits = [next((i + 1 for i, b in enumerate(curve) if b is not None and b <= target), None)
                        for curve in s["best_curves"]]
                reached = sorted(h if h is not None else np.inf for h in hits)
                med = float(statistics.median(reached))
                s["evals_to_match_classic"] = hits
                s["median_evals_to_match_classic"] = med if np.isfinite(med) else None
            out["classic_designs"] = statistics.median(out["strategies"]["classic"]["evaluations"])
    return out


def print_table(summary: dict[str, Any]) -> None:
    print(f"\n{summary['problem']}: budget {summary['budget']} evaluations, reference {summary['reference']:.6g}")
    print("| strategy | median evals to 1 % | reached 1 % | median final regret | median evals to match classic | mean proposal s |")
    print("|---|---|---|---|---|---|")
    for name, s in summary["strategies"].items():
        reached = sum(e is not None for e in s["evals_to_1pct"])
        med = "never" if s["median_evals_to_1pct"] is None else f"{s['median_evals_to_1pct']:g}"
        reg = "-" if s["median_final_regret"] is None else f"{s['median_final_regret']:.3g}"
        match = s.get("median_evals_to_match_classic", "-")
        match = "never" if match is None else (f"{match:g}" if isinstance(match, float) else match)
        tps = "-" if s["mean_proposal_s"] is None else f"{s['mean_proposal_s']:.2f}"
        print(f"| {name} | {med} | {reached}/{len(s['evals_to_1pct'])} | {reg} | {match} | {tps} |")
    if "classic_designs" in summary:
        print(f"(classic spends {summary['classic_designs']:g} evaluations: baseline, central composite, confirmation)")
    if summary["problem"] in PUBLISHED_EGO:
        print(f"(efficient global optimisation needed about {PUBLISHED_EGO[summary['problem']]} evaluations; "
              "Jones et al. 1998, from memory)")


def proposal_timing(sizes: tuple[int, ...] = (100, 300, 500), n_dims: int = 10, seed: int = 0,
                    repeats: int = 3) -> dict[str, Any]:
    """Seconds to propose one design at n finished designs in 10 parameters, for each kind of step.

    A campaign meets three kinds of step: *cold* (no previous kernel: the first proposal, or the
    first after a restart of the run), *restarts* (every ``full_fit_every``-th design: the
    hyper-parameter search adds random restarts to the start at the previous kernel) and *warm*
    (the others: a local search from the previous kernel). Each is timed ``repeats`` times and the
    slowest kept, since the target (2 s) is on every step. The objective and one constraint margin
    are modelled, with three designs pending, as in a four-slot campaign.
    """
    rng = np.random.default_rng(seed)
    settings = InfillSettings()
    rows = []
    for n in sizes:
        X = rng.random((n + 1, n_dims))
        y = np.sum((X - 0.3) ** 2, axis=1) + 0.3 * np.sin(6 * X[:, 0]) * X[:, 1]
        g = (X[:, 2] - 0.6)[:, None]
        pending = rng.random((3, n_dims))

        def history(m: int, X: np.ndarray = X, y: np.ndarray = y, g: np.ndarray = g,
                    pending: np.ndarray = pending) -> History:
            return History(X[:m], y[:m], g[:m], np.ones(m, bool), pending)

        # n is a multiple of full_fit_every (5) and n + 1 is not: the two warm-started kinds of step.
        assert n % settings.full_fit_every == 0 and (n + 1) % settings.full_fit_every != 0
        times: dict[str, list[float]] = {"cold_s": [], "restarts_s": [], "warm_s": []}
        for r in range(repeats):
            t0 = time.perf_counter()
            first = propose_infill(history(n), settings, seed=seed + r)
            times["cold_s"].append(time.perf_counter() - t0)
            assert first is not None
            t0 = time.perf_counter()
            propose_infill(history(n), settings, seed=seed + r, warm=first.kernels)
            times["restarts_s"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            propose_infill(history(n + 1), settings, seed=seed + r, warm=first.kernels)
            times["warm_s"].append(time.perf_counter() - t0)
        row = {"n": n, "n_dims": n_dims, **{k: max(v) for k, v in times.items()}, "all_s": times}
        rows.append(row)
        print(f"| {n} | {n_dims} | {row['cold_s']:.2f} | {row['restarts_s']:.2f} | {row['warm_s']:.2f} |", flush=True)
    return {"timing": rows, "repeats": repeats, "note": "slowest of the repeats, seconds per proposal"}


def main() -> None:
    parser = argparse.ArgumentParser(description="Sample efficiency of sortie's infill strategies.")
    parser.add_argument("--problem", choices=sorted(PROBLEMS), default="branin")
    parser.add_argument("--seeds", type=int, default=10)
    parser.add_argument("--strategies", nargs="+", choices=STRATEGIES, default=list(STRATEGIES))
    parser.add_argument("--json", type=Path, default=None)
    parser.add_argument("--timing", action="store_true", help="measure proposal time at n = 100, 300, 500 instead")
    args = parser.parse_args()
    if args.timing:
        print("| designs | parameters | cold s | restarts step s | warm step s |\n|---|---|---|---|---|")
        result = proposal_timing()
    else:
        problem = PROBLEMS[args.problem]()
        runs: dict[str, list[Run]] = {}
        for strategy in args.strategies:
            runs[strategy] = []
            for seed in range(args.seeds):
                t0 = time.perf_counter()
                runs[strategy].append(run_strategy(problem, strategy, seed))
                print(f"{problem.name} {strategy} seed {seed}: {time.perf_counter() - t0:.1f} s", flush=True)
        result = summarise(problem, runs)
        print_table(result)
    path = args.json or Path("benchmarks/results") / (f"{args.problem}.json" if not args.timing else "proposal-timing.json")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(result, indent=2) + "\n")
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
