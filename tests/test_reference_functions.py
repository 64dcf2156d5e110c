"""The benchmark and fixture test functions at their published minimisers (CHECKS.md §2).

A mistyped coefficient in Branin or in Hartmann-6's 4 x 6 tables would still give a smooth
function that the benchmarks happily optimise; only its value at the published minimiser shows it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchmarks.problems import branin, hartmann6, make_branin, make_hartmann6
from tests.fixtures.models import branin as branin_fixture

# Branin–Hoo minimisers and f* = 0.397887 (exactly 5/(4π)): netlib ampl/models/nlmodels/branin.mod,
# citing Jansson & Knüppel 1992 (CHECKS.md §2, [S]; the exact value [N]).
BRANIN_MINIMISERS = [(-math.pi, 12.275), (math.pi, 2.275), (3 * math.pi, 2.475)]
BRANIN_F_STAR = 0.397887
# Hartmann-6 minimiser and f* = −3.32237: Hedar's global-optimisation test-problem page (CHECKS.md §2, [S]).
HARTMANN6_X_STAR = np.array([0.20169, 0.150011, 0.476874, 0.275332, 0.311652, 0.6573])
HARTMANN6_F_STAR = -3.32237


@pytest.mark.parametrize(("x1", "x2"), BRANIN_MINIMISERS)
def test_branin_gives_the_published_minimum_at_each_published_minimiser(x1: float, x2: float) -> None:
    assert branin(x1, x2) == pytest.approx(BRANIN_F_STAR, abs=5e-7)
    assert branin_fixture({"x1": x1, "x2": x2}, {"scale": 1.0})["f"] == pytest.approx(BRANIN_F_STAR, abs=5e-7)
    objective, margins, ok = make_branin().evaluate({"x1": x1, "x2": x2})
    assert objective == pytest.approx(BRANIN_F_STAR, abs=5e-7) and ok and margins.size == 0
    # ...and it is a minimum: every step of 1e-3 along an axis goes up.
    for dx1, dx2 in ((1e-3, 0), (-1e-3, 0), (0, 1e-3), (0, -1e-3)):
        assert branin(x1 + dx1, x2 + dx2) > branin(x1, x2)


def test_branin_reference_of_the_benchmark_is_the_published_minimum() -> None:
    assert make_branin().reference == pytest.approx(BRANIN_F_STAR, abs=5e-7)


def test_hartmann6_gives_the_published_minimum_at_the_published_minimiser() -> None:
    assert hartmann6(HARTMANN6_X_STAR) == pytest.approx(HARTMANN6_F_STAR, abs=5e-6)
    names = [f"x{i}" for i in range(1, 7)]
    problem = make_hartmann6()
    objective, _, ok = problem.evaluate(dict(zip(names, HARTMANN6_X_STAR, strict=True)))
    assert objective == pytest.approx(HARTMANN6_F_STAR, abs=5e-6) and ok
    assert problem.reference == pytest.approx(HARTMANN6_F_STAR, abs=5e-6)
    # ...and it is a minimum: a step of 1e-3 along any axis goes up (the published x* has 4–6 digits).
    for i in range(6):
        for step in (1e-3, -1e-3):
            moved = HARTMANN6_X_STAR.copy()
            moved[i] += step
            assert hartmann6(moved) > hartmann6(HARTMANN6_X_STAR)
