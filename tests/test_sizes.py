"""Design counts computed before allocating equal what the samplers then make."""

from __future__ import annotations

import pytest

from sortie import sizes
from sortie.config import StageSpec
from sortie.plan import initial_unit_points
from sortie.space import DesignSpace, Parameter


def _space(n: int, *, choice: bool = False, off_grid: bool = False) -> DesignSpace:
    params = [Parameter(f"p{i}", "continuous", 0.37 if off_grid else 0.5, lower=0.0, upper=1.0) for i in range(n)]
    if choice:
        params.append(Parameter("fins", "choice", 3, choices=(2, 3, 4)))
        params.append(Parameter("blades", "integer", 1, lower=0.0, upper=1.0))
    return DesignSpace(tuple(params))


STAGES = [
    StageSpec(method="sobol", designs=16), StageSpec(method="sobol", designs=10), StageSpec(method="lhs", designs=7),
    StageSpec(method="full-factorial"), StageSpec(method="full-factorial", levels=5),
    StageSpec(method="fractional-factorial"), StageSpec(method="central-composite", center_points=3),
    StageSpec(method="central-composite", variant="face"), StageSpec(method="one-at-a-time"),
    StageSpec(method="one-at-a-time", levels=4),
]


@pytest.mark.parametrize("stage", STAGES, ids=lambda s: f"{s.method}-{s.designs or s.levels or s.center_points}")
@pytest.mark.parametrize(("n", "choice", "off_grid"), [(3, False, False), (4, True, False), (3, False, True)])
def test_counted_size_equals_the_sampler_output(stage, n, choice, off_grid):
    space = _space(n, choice=choice, off_grid=off_grid)
    assert sizes.initial_size(stage, space) == len(initial_unit_points(stage, space, seed=3))


def test_sobol_allocates_the_next_power_of_two():
    stage = StageSpec(method="sobol", designs=1_000_000_000)
    assert sizes.allocated_points(stage, 1_000_000_000) == 1 << 30
    assert sizes.allocated_points(StageSpec(method="lhs", designs=9), 9) == 9


def test_the_issue_experiments_are_refused_by_count_alone():
    space = _space(7, choice=True)  # 9 free parameters
    factorial = StageSpec(method="full-factorial", levels=11)
    n = sizes.initial_size(factorial, space)  # 11^7 continuous levels, 3 fin counts, 2 blade counts
    assert n == 11**7 * 3 * 2
    problem = sizes.stage_problem("plan.initial", "full-factorial", n, n, space.n_dims)
    assert problem is not None and problem.startswith("plan.initial: full-factorial makes 116,923,026 designs")
    assert sizes.stage_problem("plan.initial", "sobol", 16, 16, 8) is None


def test_huge_counts_are_shown_by_magnitude():
    assert sizes.count(1234) == "1,234"
    assert sizes.count(2**200) == "about 1e60"
