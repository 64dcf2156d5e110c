"""Benchmark problems for infill: Branin, Hartmann-6 and the mock solver's sled aft body.

Each problem is a design space, an evaluation returning (objective, constraint margins,
succeeded), the reference optimum with its source, and the baseline design every strategy runs
first (it counts as an evaluation).
"""

from __future__ import annotations

import json
import math
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from sortie.adapters.base import CaseSpec, JobState
from sortie.adapters.python_fn import PythonAdapter, PythonOptions
from sortie.goal import Constraint, Expression, Goal
from sortie.space import DesignSpace, Parameter

HERE = Path(__file__).resolve().parent

# Hartmann-6 coefficients (CHECKS.md §2: Dixon & Szegő 1978 via the SFU `hart6` page; they reproduce
# the published f* = -3.32237 at the published minimiser to 1e-10).
_H6_ALPHA = np.array([1.0, 1.2, 3.0, 3.2])
_H6_A = np.array([[10, 3, 17, 3.5, 1.7, 8], [0.05, 10, 17, 0.1, 8, 14], [3, 3.5, 1.7, 10, 17, 8], [17, 8, 0.05, 10, 0.1, 14]])
_H6_P = 1e-4 * np.array([[1312, 1696, 5569, 124, 8283, 5886], [2329, 4135, 8307, 3736, 1004, 9991],
                         [2348, 1451, 3522, 2883, 3047, 6650], [4047, 8828, 8732, 5743, 1091, 381]])


def branin(x1: float, x2: float) -> float:
    """Branin–Hoo (Branin 1972; Dixon & Szegő 1978), x1 in [-5, 10], x2 in [0, 15]."""
    return (x2 - 5.1 * x1**2 / (4 * math.pi**2) + 5 * x1 / math.pi - 6) ** 2 + 10 * (1 - 1 / (8 * math.pi)) * math.cos(x1) + 10


def hartmann6(x: np.ndarray) -> float:
    """Hartmann 6-D on [0, 1]^6 (Hartman 1973; Dixon & Szegő 1978)."""
    return float(-np.sum(_H6_ALPHA * np.exp(-np.sum(_H6_A * (np.asarray(x) - _H6_P) ** 2, axis=1))))


def sled_case(parameters: dict[str, Any], condition: dict[str, float]) -> dict[str, float]:
    """The mock solver's physics as a python-adapter function: one case at one Mach number."""
    from sortie.mock_solver import physics

    return physics.evaluate(parameters, condition["mach"])


@dataclass(frozen=True)
class Problem:
    """A benchmark problem: the space, how to score a design, and where the optimum is."""

    name: str
    space: DesignSpace
    evaluate: Callable[[dict[str, Any]], tuple[float, np.ndarray, bool]]
    reference: float
    reference_source: str
    baseline_value: float
    budget: int
    n_initial: int

    def within_1pct(self, best: float) -> bool:
        """The issue's success rule: relative to |f*| for test functions, to the baseline gap for sled."""
        if self.name == "sled":
            return best - self.reference <= 0.01 * (self.baseline_value - self.reference)
        return abs(best - self.reference) <= 0.01 * abs(self.reference)


def _continuous(name: str, lower: float, upper: float, baseline: float) -> Parameter:
    return Parameter(name, "continuous", baseline, lower=lower, upper=upper)


def make_branin() -> Problem:
    space = DesignSpace((_continuous("x1", -5.0, 10.0, 2.5), _continuous("x2", 0.0, 15.0, 7.5)))
    return Problem("branin", space, lambda v: (branin(v["x1"], v["x2"]), np.zeros(0), True),
                   5 / (4 * math.pi), "Branin f* = 5/(4 pi) = 0.397887 (CHECKS.md §2; netlib branin.mod)",
                   branin(2.5, 7.5), budget=30, n_initial=5)


def make_hartmann6() -> Problem:
    names = [f"x{i}" for i in range(1, 7)]
    space = DesignSpace(tuple(_continuous(n, 0.0, 1.0, 0.5) for n in names))
    return Problem("hartmann6", space, lambda v: (hartmann6(np.array([v[n] for n in names])), np.zeros(0), True),
                   -3.32237, "Hartmann-6 f* = -3.32237 (CHECKS.md §2; Hedar's test-problem page)",
                   hartmann6(np.full(6, 0.5)), budget=80, n_initial=13)


def make_sled() -> Problem:
    """The demo's aft body over its six active parameters, run through the python adapter."""
    from sortie.mock_solver import physics

    reference = json.loads((HERE / "sled_reference.json").read_text())
    params = [Parameter("fin_count", "choice", 3, choices=(2, 3, 4))]
    params = [_continuous(p, *physics.BOUNDS[p], physics.BASELINE[p]) for p in physics.ACTIVE_PARAMETERS
              if p != "fin_count"] + params
    space = DesignSpace(tuple(params))
    conditions = [{"mach": m} for m in physics.SWING_MACHS]
    goal = Goal("minimize", Expression.parse("max(lift) - min(lift)", where="goal.minimize"),
                (Constraint.parse("drag <= baseline.drag", where="goal.subject_to[0]"),))
    workdir = Path(tempfile.mkdtemp(prefix="sortie-bench-sled-"))
    adapter = PythonAdapter(PythonOptions(adapter="python", function="benchmarks.problems:sled_case"),
                            {"lift": None, "drag": None}, HERE)  # type: ignore[dict-item]
    counter = iter(range(1, 10**9))

    def run(values: dict[str, Any]) -> dict[str, np.ndarray] | None:
        quantities: dict[str, list[float]] = {"lift": [], "drag": []}
        for cond in conditions:
            i = next(counter)
            case = CaseSpec(i, f"c{i}", i, values, cond, workdir / f"c{i}")
            handle = adapter.start(case)
            if adapter.poll(handle) is not JobState.DONE:
                return None
            outcome = adapter.collect(handle, case)
            for q in quantities:
                quantities[q].append(outcome.quantities[q])
        return {q: np.array(v) for q, v in quantities.items()}

    base = run(space.baseline())
    assert base is not None

    def evaluate(values: dict[str, Any]) -> tuple[float, np.ndarray, bool]:
        q = run(values)
        if q is None:
            return math.nan, np.array([math.nan]), False
        score = goal.score(q, base, conditions)
        return score.objective, np.array(list(score.constraints.values())), True

    return Problem("sled", space, evaluate, float(reference["reference"]),
                   f"sled_reference.json: {reference['how']}", float(reference["baseline"]), budget=60, n_initial=13)


PROBLEMS = {"branin": make_branin, "hartmann6": make_hartmann6, "sled": make_sled}
