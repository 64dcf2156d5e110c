"""How many designs a designed experiment makes, computed before anything is allocated.

``sortie check`` must refuse ``{method: sobol, designs: 1000000000}`` or an 11-level full
factorial over 8 parameters in one line, not by trying to allocate tens of gigabytes. The
counts here are exact integer arithmetic on the config (no sampler runs, no scipy import), and
:func:`tests.test_sizes` holds them equal to the samplers' own output.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from sortie.space import DesignSpace

if TYPE_CHECKING:
    from sortie.config import StageSpec

DEFAULT_FACTORIAL_LEVELS = 3
DEFAULT_SWEEP_LEVELS = 5
#: Unit-cube values (designs x free parameters) one designed experiment may hold: 80 MB of floats.
MAX_VALUES = 10_000_000
#: scipy's Sobol' engine has direction numbers for at most this many dimensions.
SOBOL_MAX_DIMS = 21201


def initial_size(stage: StageSpec, space: DesignSpace) -> int:
    """Designs of the initial experiment (baseline excluded), as ``plan.initial_unit_points`` makes them."""
    d = space.n_dims
    if stage.method in ("sobol", "lhs"):
        return int(stage.designs or 0)
    if stage.method == "full-factorial":
        wanted = stage.levels or DEFAULT_FACTORIAL_LEVELS
        n = 1
        for p in space.free:
            n *= min(wanted, p.levels) if p.levels else wanted
        return n
    if stage.method == "fractional-factorial":
        return 2 ** (d - 1)
    if stage.method == "central-composite":
        return 2**d + 2 * d + stage.center_points
    return sweep_size(space, stage.levels or DEFAULT_SWEEP_LEVELS)


def sweep_size(space: DesignSpace, levels: int) -> int:
    """Designs of a one-at-a-time sweep, baseline excluded: grid values that differ from the baseline."""
    grid = np.linspace(0.0, 1.0, levels)
    base = space.baseline_unit()
    return int(sum(np.sum(np.abs(grid - b) > 1e-12) for b in base))


def allocated_points(stage: StageSpec, n_points: int) -> int:
    """Points the sampler allocates: Sobol' draws the next power of two and keeps the first ``n_points``."""
    if stage.method == "sobol" and n_points > 1:
        return 1 << (n_points - 1).bit_length()
    return n_points


def count(n: int) -> str:
    """A design count for a message: exact while readable, else its order of magnitude."""
    return f"{n:,}" if n < 10**15 else f"about 1e{len(str(n)) - 1}"


def stage_problem(key: str, method: str, n_points: int, allocated: int, n_dims: int) -> str | None:
    """Why a designed experiment of this size cannot be made, as one config line; None if it can."""
    if method in ("sobol", "surrogate") and n_dims > SOBOL_MAX_DIMS:
        return (f"{key}: Sobol' points exist for at most {SOBOL_MAX_DIMS:,} parameters, the config has "
                f"{n_dims:,} free; use lhs, or fix parameters")
    if allocated * n_dims > MAX_VALUES:
        return (f"{key}: {method} makes {count(n_points)} designs of {n_dims} parameters "
                f"({count(allocated * n_dims)} values); allowed: at most {MAX_VALUES:,} values per experiment")
    return None

