"""The design space: parameters and the map between the unit cube and physical values.

Samplers and surrogates work in the unit cube ``[0, 1]^n_dims`` over the *free* parameters only,
so that length-scales and distances are comparable across parameters with different units.
Fixed parameters are held at their baseline and never appear as a dimension. Integer and choice
parameters are continuous in the unit cube and snapped to their nearest allowed value when a
design is made, which keeps every sampler and optimiser continuous.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np

Kind = Literal["continuous", "integer", "choice"]
Value = float | int | str


@dataclass(frozen=True)
class Parameter:
    """One design variable.

    Parameters
    ----------
    name : str
        Placeholder name used in templates and goal expressions.
    kind : {"continuous", "integer", "choice"}
        Continuous and integer parameters have ``lower``/``upper``; choice parameters have
        ``choices`` (an ordered list, so that neighbouring choices are neighbours in the cube).
    baseline : float, int or str
        The value of the reference design, which every campaign runs first.
    fixed : bool
        Held at ``baseline`` for the whole campaign (not a dimension of the cube).
    """

    name: str
    kind: Kind
    baseline: Value
    lower: float | None = None
    upper: float | None = None
    choices: tuple[Value, ...] = ()
    unit: str = ""
    fixed: bool = False

    @property
    def levels(self) -> int | None:
        """Number of distinct values, or None for a continuous parameter."""
        if self.kind == "choice":
            return len(self.choices)
        if self.kind == "integer":
            return int(self.upper) - int(self.lower) + 1  # type: ignore[arg-type]
        return None

    def from_unit(self, u: float) -> Value:
        """Map a unit-interval coordinate to a value of this parameter."""
        u = float(min(max(u, 0.0), 1.0))
        if self.kind == "continuous":
            return float(self.lower + u * (self.upper - self.lower))  # type: ignore[operator]
        n = self.levels or 1
        index = min(int(np.floor(u * n)), n - 1)
        if self.kind == "integer":
            return int(self.lower) + index  # type: ignore[arg-type]
        return self.choices[index]

    def to_unit(self, value: Value) -> float:
        """Map a value to the centre of its cell in the unit interval (inverse of from_unit)."""
        if self.kind == "continuous":
            return (float(value) - self.lower) / (self.upper - self.lower)  # type: ignore[operator]
        n = self.levels or 1
        index = (int(value) - int(self.lower)) if self.kind == "integer" else self.choices.index(value)  # type: ignore[arg-type]
        return (index + 0.5) / n


@dataclass(frozen=True)
class DesignSpace:
    """An ordered set of parameters with the unit-cube map over the free ones.

    Examples
    --------
    >>> space = DesignSpace((Parameter("a", "continuous", 1.0, lower=0.0, upper=2.0),))
    >>> space.to_values(np.array([[0.25]]))
    [{'a': 0.5}]
    """

    parameters: tuple[Parameter, ...]

    @property
    def free(self) -> tuple[Parameter, ...]:
        """Parameters that span the unit cube, in config order."""
        return tuple(p for p in self.parameters if not p.fixed)

    @property
    def n_dims(self) -> int:
        """Dimension of the unit cube."""
        return len(self.free)

    @property
    def names(self) -> tuple[str, ...]:
        """All parameter names, free and fixed, in config order."""
        return tuple(p.name for p in self.parameters)

    def keep_free(self, names: Sequence[str]) -> DesignSpace:
        """The same space with every free parameter not in ``names`` fixed at its baseline.

        This is how a screening stage's selection reaches later stages: their samplers and
        surrogates see only the parameters that matter.
        """
        unknown = set(names) - {p.name for p in self.free}
        if unknown:
            raise ValueError(f"{sorted(unknown)} are not free parameters; allowed: {[p.name for p in self.free]}")
        return DesignSpace(tuple(p if p.fixed or p.name in names else replace(p, fixed=True) for p in self.parameters))

    def baseline(self) -> dict[str, Value]:
        """The reference design: every parameter at its baseline."""
        return {p.name: p.baseline for p in self.parameters}

    def baseline_unit(self) -> np.ndarray:
        """The baseline as a point of the unit cube, shape (n_dims,)."""
        return np.array([p.to_unit(p.baseline) for p in self.free], dtype=float)

    def to_values(self, X: np.ndarray) -> list[dict[str, Value]]:
        """Map unit-cube points of shape (n_points, n_dims) to full designs (fixed included)."""
        X = np.atleast_2d(np.asarray(X, dtype=float))
        if X.shape[1] != self.n_dims:
            raise ValueError(f"points have {X.shape[1]} columns, the space has {self.n_dims} free parameters")
        designs = []
        for row in X:
            values = iter(row)
            designs.append(
                {p.name: (p.baseline if p.fixed else p.from_unit(next(values))) for p in self.parameters}
            )
        return designs

    def to_unit(self, designs: Sequence[Mapping[str, Value]]) -> np.ndarray:
        """Map full designs back to the unit cube, shape (n_points, n_dims)."""
        return np.array([[p.to_unit(d[p.name]) for p in self.free] for d in designs], dtype=float).reshape(
            len(designs), self.n_dims
        )
