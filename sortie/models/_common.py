"""Shared input checks and constants of the surrogate models (unit-cube inputs, finite outputs)."""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np
from sklearn.exceptions import ConvergenceWarning

# Tolerance on the unit cube: designs mapped from physical units may round a hair outside it.
_CUBE_TOL = 1e-9
# Rows per block in GP predictions: bounds the (rows x n_points) cross-kernel to a few tens of MB.
_PREDICT_CHUNK = 4096
# Smallest GP std on the normalised y scale (gp.md section 1: sigma >= 1e-9 std(y)). Values below
# ~1e-8 are round-off from var = k(x, x) - v'v anyway, and a strictly positive std keeps EI defined.
_STD_FLOOR = 1e-9
# Diagonal jitter on the normalised y scale, and the largest value a LinAlgError retry may reach.
_ALPHA_WITH_NOISE = 1e-10
_ALPHA_WITHOUT_NOISE = 1e-8
_ALPHA_MAX = 1e-4
# A leverage this close to 1 means the point alone determines a term: its LOO residual is undefined.
_LEVERAGE_TOL = 1e-10
# GP amplitude bounds on the normalised y scale (gp.md section 1), and the length-scale prior:
# (median at one input, std of the log); see GaussianProcessSurrogate._search.
_AMPLITUDE_BOUNDS = (1e-3, 1e3)
_LENGTH_SCALE_PRIOR = (1.0, 1.5)
# RBF kernels without a shape parameter whose minimum polynomial degree is at most 1, so that the
# linear tail used by Rippa's formula is valid; scipy's own formulas (epsilon = 1).
_RBF_KERNELS = {
    "linear": lambda r: -r,
    "thin_plate_spline": lambda r: np.where(r == 0.0, 0.0, r**2 * np.log(np.where(r == 0.0, 1.0, r))),
    "cubic": lambda r: r**3,
}



# --------------------------------------------------------------------------- validation


def _check_X(X: object, *, n_dims: int | None = None, name: str = "X", in_cube: bool = False) -> np.ndarray:
    """Return ``X`` as a finite float array of shape (n_points, n_dims); raise ValueError otherwise."""
    try:
        arr = np.asarray(X, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a numeric array of shape (n_points, n_dims): {exc}") from None
    if arr.ndim != 2:
        raise ValueError(f"{name} must have shape (n_points, n_dims), got shape {arr.shape}.")
    if n_dims is not None and arr.shape[1] != n_dims:
        raise ValueError(f"{name} must have {n_dims} columns (the model was fitted on {n_dims} dims), got {arr.shape[1]}.")
    if not np.all(np.isfinite(arr)):
        rows = np.flatnonzero(~np.all(np.isfinite(arr), axis=1))
        raise ValueError(f"{name} contains NaN or infinite values in rows {rows[:10].tolist()}.")
    if in_cube and arr.size and (arr.min() < -_CUBE_TOL or arr.max() > 1.0 + _CUBE_TOL):
        raise ValueError(
            f"{name} must lie in the unit cube [0, 1]^n_dims (map physical values through the design space first), "
            f"got values in [{arr.min():.6g}, {arr.max():.6g}]."
        )
    return arr


def _check_Xy(X: object, y: object, *, min_points: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Validate a training set once: X in the unit cube, y finite and of matching length."""
    X = _check_X(X, in_cube=True)
    try:
        y = np.asarray(y, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"y must be a numeric array of shape (n_points,): {exc}") from None
    if y.ndim != 1:
        raise ValueError(f"y must have shape (n_points,), got shape {y.shape}.")
    if y.shape[0] != X.shape[0]:
        raise ValueError(f"X and y must have the same number of points, got {X.shape[0]} and {y.shape[0]}.")
    bad = np.flatnonzero(~np.isfinite(y))
    if bad.size:
        raise ValueError(f"y contains NaN or infinite values at rows {bad[:10].tolist()}; drop failed runs before fitting.")
    if X.shape[0] < min_points:
        raise ValueError(f"At least {min_points} points are needed to fit, got {X.shape[0]}.")
    return X, y


def _plural(k: int, word: str) -> str:
    return f"{k} {word}" if k == 1 else f"{k} {word}s"


def _record(caught: Sequence[warnings.WarningMessage], into: list[str]) -> None:
    """Keep caught warnings as text; re-issue any that are not ConvergenceWarnings.

    ConvergenceWarnings are expected in routine GP fits (a length-scale at its bound is a
    sensitivity signal, not a fault; gp.md section 1), so they are kept for the log instead of
    being printed on every refit. Anything else is unexpected and is not swallowed.
    """
    for w in caught:
        into.append(f"{w.category.__name__}: {w.message}")
        if not issubclass(w.category, ConvergenceWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)

