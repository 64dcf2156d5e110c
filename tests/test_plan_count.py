"""Counting the initial experiment without drawing it gives the size that drawing it gives."""

from __future__ import annotations

import pytest

from sortie.config import StageSpec
from sortie.plan import initial_count, initial_unit_points
from sortie.space import DesignSpace, Parameter


def _space() -> DesignSpace:
    return DesignSpace(tuple(Parameter(name=f"p{i}", kind="continuous", lower=0.0, upper=1.0, baseline=0.5)
                             for i in range(4)))


@pytest.mark.parametrize("stage", [
    {"method": "sobol", "designs": 16},
    {"method": "sobol", "designs": 10},  # not a power of two: still exactly 10 points
    {"method": "lhs", "designs": 7},
    {"method": "lhs", "designs": 12, "optimization": "random-cd"},
    {"method": "full-factorial", "levels": 2},
    {"method": "fractional-factorial"},
    {"method": "central-composite"},
    {"method": "one-at-a-time", "levels": 3},
])
def test_counted_size_equals_the_drawn_size(stage: dict) -> None:
    spec = StageSpec(**stage)
    assert initial_count(spec, _space(), seed=3) == len(initial_unit_points(spec, _space(), seed=3))
