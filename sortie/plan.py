"""Turning the config's plan into designs: the baseline first, then screening or the initial experiment.

Each list is a pure function of the config, the space and the seed, so a campaign that was
interrupted while recording it can recompute the list and add only what is missing.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from sortie import sampling
from sortie.sizes import DEFAULT_FACTORIAL_LEVELS, DEFAULT_SWEEP_LEVELS
from sortie.space import DesignSpace

if TYPE_CHECKING:
    from sortie.config import PlanSection, ScreeningSpec, StageSpec

@dataclass(frozen=True)
class ProposedDesign:
    """A design not yet in the ledger: where it is, and why it was chosen."""

    stage: str
    reason: str
    unit: tuple[float, ...]
    values: dict[str, Any]


def initial_unit_points(stage: StageSpec, space: DesignSpace, seed: int) -> np.ndarray:
    """The initial experiment as unit-cube points, shape (n_points, n_dims); baseline excluded."""
    d = space.n_dims
    if stage.method == "sobol":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", sampling.SamplingWarning)  # reported by `sortie check`
            return sampling.sobol(int(stage.designs or 0), d, seed=seed)
    if stage.method == "lhs":
        return sampling.latin_hypercube(int(stage.designs or 0), d, seed=seed, optimization=stage.optimization)
    if stage.method == "full-factorial":
        wanted = stage.levels or DEFAULT_FACTORIAL_LEVELS
        levels = [min(wanted, p.levels) if p.levels else wanted for p in space.free]
        return sampling.full_factorial(levels)
    if stage.method == "fractional-factorial":
        return sampling.coded_to_unit(sampling.fractional_factorial(d))
    if stage.method == "central-composite":
        return sampling.coded_to_unit(sampling.central_composite(d, variant=stage.variant, center_points=stage.center_points))
    if stage.method == "one-at-a-time":
        sweep = sampling.one_at_a_time(space.baseline_unit(), stage.levels or DEFAULT_SWEEP_LEVELS)
        return sweep[1:]  # the baseline itself is always run as design 1
    raise ValueError(f"unknown sampling method {stage.method!r}")


def sampling_notes(plan: PlanSection, n_free: int) -> list[str]:
    """Advice (not errors) about the plan's Sobol' stages, shown by `sortie check`."""
    sized = [("plan.initial.designs", plan.initial.designs if plan.initial.method == "sobol" else None)]
    if plan.screening is not None and plan.screening.method == "surrogate":
        sized.append(("plan.screening.designs", plan.screening.n_designs(n_free)))
    notes = []
    for key, n in sized:
        if n is not None and n & (n - 1):
            lo = 1 << (n.bit_length() - 1)
            notes.append(f"{key}: {n} is not a power of two, so the Sobol' points lose their balance; {lo} or {lo * 2} keep it")
    return notes


def initial_designs(stage: StageSpec, space: DesignSpace, seed: int, *, full: DesignSpace | None = None) -> list[ProposedDesign]:
    """The initial experiment over the free parameters of ``space``.

    ``full`` is the campaign's whole space when ``space`` keeps only the parameters a screening
    stage selected; the recorded unit point is always in the whole space, so every design's
    ``unit`` means the same thing.
    """
    points = initial_unit_points(stage, space, seed)
    values = space.to_values(points)
    units = full.to_unit(values) if full is not None else points
    return [ProposedDesign("initial", f"{stage.method} point {i} of {len(points)}", tuple(float(x) for x in u), v)
            for i, (u, v) in enumerate(zip(units, values, strict=True), start=1)]


def screening_unit_points(spec: ScreeningSpec, space: DesignSpace, seed: int) -> np.ndarray:
    """The screening design as unit-cube points (baseline excluded), shape (n_points, n_dims)."""
    from sortie.screening import morris_trajectories

    if spec.method == "morris":
        return morris_trajectories(space.n_dims, spec.trajectories, levels=spec.levels, seed=seed)
    if spec.method == "surrogate":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", sampling.SamplingWarning)  # a size that is not a power of two: `sortie check` says so
            return sampling.sobol(spec.n_designs(space.n_dims), space.n_dims, seed=seed)
    return sampling.one_at_a_time(space.baseline_unit(), spec.levels)[1:]


def screening_designs(spec: ScreeningSpec, space: DesignSpace, seed: int) -> list[ProposedDesign]:
    """The screening stage's designs. The recorded unit point is the planned grid point, which the
    elementary effects are computed from (an integer or choice parameter may snap to a value that
    differs slightly from it)."""
    points = screening_unit_points(spec, space, seed)
    if spec.method == "morris":
        per = space.n_dims + 1
        reasons = [f"morris trajectory {i // per + 1} of {spec.trajectories}, point {i % per + 1} of {per}" for i in range(len(points))]
    else:
        what = "sobol screening point" if spec.method == "surrogate" else "one-at-a-time sweep point"
        reasons = [f"{what} {i} of {len(points)}" for i in range(1, len(points) + 1)]
    return [ProposedDesign("screening", why, tuple(float(x) for x in u), v)
            for why, u, v in zip(reasons, points, space.to_values(points), strict=True)]


def baseline_design(space: DesignSpace) -> ProposedDesign:
    return ProposedDesign("baseline", "reference design: every parameter at its baseline",
                          tuple(space.baseline_unit()), space.baseline())


def first_designs(plan: PlanSection, space: DesignSpace, seed: int) -> list[ProposedDesign]:
    """What a campaign records at its start: the baseline, then screening or the initial experiment."""
    if plan.screening is not None:
        return [baseline_design(space), *screening_designs(plan.screening, space, seed)]
    return [baseline_design(space), *initial_designs(plan.initial, space, seed)]
