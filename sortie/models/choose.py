"""Choosing a surrogate by leave-one-out error, and building one by name."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from sortie.models._common import (
    _check_Xy,
    _plural,
)
from sortie.models.gp import GaussianProcessSurrogate
from sortie.models.quadratic import QuadraticSurface
from sortie.models.rbf import RadialBasisSurrogate

# --------------------------------------------------------------------------- model choice

Surrogate = GaussianProcessSurrogate | QuadraticSurface | RadialBasisSurrogate

_FACTORIES = {
    "gp": lambda random_state: GaussianProcessSurrogate(random_state=random_state),
    "quadratic": lambda random_state: QuadraticSurface(),
    "rbf": lambda random_state: RadialBasisSurrogate(),
}


def make_surrogate(name: str, random_state: int | np.random.RandomState | None = None) -> Surrogate:
    """An unfitted surrogate with default settings, by its ``name``.

    Parameters
    ----------
    name : {"gp", "quadratic", "rbf"}
    random_state : int, RandomState or None, default=None
        Used by the GP only (optimiser restarts).

    Returns
    -------
    surrogate : GaussianProcessSurrogate, QuadraticSurface or RadialBasisSurrogate

    Raises
    ------
    ValueError
        For an unknown name.
    """
    try:
        factory = _FACTORIES[name]
    except (KeyError, TypeError):
        raise ValueError(f"Unknown surrogate {name!r}; choose one of {sorted(_FACTORIES)}.") from None
    return factory(random_state)


@dataclass(frozen=True)
class ModelScore:
    """Leave-one-out score of one candidate surrogate.

    Attributes
    ----------
    name : str
        The surrogate's ``name``.
    loo_rmse : float
        ``sqrt(mean((y_i - yhat_(i))^2))`` in the units of y; ``inf`` if the candidate was skipped.
    loo_r2 : float
        Predictive R^2, ``1 - PRESS / SS_T`` with ``SS_T = sum (y_i - mean(y))^2``; NaN if skipped
        or if y is constant. Negative means worse than predicting the mean.
    n_points : int
        Number of designs scored.
    note : str
        Why the candidate was skipped, or a summary of fit warnings; empty otherwise.
    """

    name: str
    loo_rmse: float
    loo_r2: float
    n_points: int
    note: str = ""
    noise_std: float | None = None


def choose_surrogate(
    X: np.ndarray,
    y: np.ndarray,
    *,
    candidates: Sequence[str] = ("gp", "quadratic", "rbf"),
    random_state: int | np.random.RandomState | None = None,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    fitted: dict[str, Surrogate] | None = None,
) -> tuple[Surrogate, list[ModelScore]]:
    """Fit each candidate and keep the one with the smallest leave-one-out RMSE.

    Leave-one-out is the fair yardstick here because the GP and the RBF interpolate their data, so
    their training error says nothing. Each candidate's residuals come from its own closed form
    (PRESS, Rippa, R&W eq. 5.12), so scoring costs about one fit per candidate. The GP's score is
    slightly optimistic because its hyper-parameters were fitted on every point.

    Parameters
    ----------
    X : array-like of shape (n_points, n_dims)
        Designs in the unit cube.
    y : array-like of shape (n_points,)
        Finite solver outputs.
    candidates : sequence of {"gp", "quadratic", "rbf"}, default=("gp", "quadratic", "rbf")
        Tried in this order; ties go to the earlier one.
    random_state : int, RandomState or None, default=None
        Passed to :func:`make_surrogate`.
    options : mapping of name to parameters, optional
        Extra constructor parameters per candidate (``set_params``), e.g. a GP's warm kernel.
    fitted : dict, optional
        Filled with every candidate that could be fitted, by name (to reuse a GP's kernel even
        when another model won).

    Returns
    -------
    surrogate : GaussianProcessSurrogate, QuadraticSurface or RadialBasisSurrogate
        The chosen model, fitted on all points.
    scores : list of ModelScore
        One per candidate, in the order given, skipped ones included (``loo_rmse = inf``, reason
        in ``note``).

    Raises
    ------
    ValueError
        Invalid inputs, an unknown or empty candidate list, or no candidate that could be scored.
    """
    X, y = _check_Xy(X, y)
    names = [candidates] if isinstance(candidates, str) else list(candidates)
    if not names:
        raise ValueError("candidates must name at least one surrogate.")
    for name in names:
        make_surrogate(name)  # fail fast on a typo, before any fitting
    n = X.shape[0]
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    scores: list[ModelScore] = []
    best: Surrogate | None = None
    best_rmse = math.inf
    for name in names:
        model = make_surrogate(name, random_state)
        if options and name in options:
            model.set_params(**options[name])
        try:
            model.fit(X, y)
            residuals = model.loo_residuals()
        except (ValueError, np.linalg.LinAlgError) as exc:
            scores.append(ModelScore(name, math.inf, math.nan, n, f"skipped: {exc}"))
            continue
        if not np.all(np.isfinite(residuals)):
            scores.append(ModelScore(name, math.inf, math.nan, n, "skipped: leave-one-out residuals are undefined. " + " ".join(model.warnings_)))
            continue
        press = float(residuals @ residuals)
        rmse = math.sqrt(press / n)
        r2 = 1.0 - press / ss_tot if ss_tot > 0 else math.nan
        if fitted is not None:
            fitted[name] = model
        note = f"{_plural(len(model.warnings_), 'fit warning')}; see warnings_" if model.warnings_ else ""
        scores.append(ModelScore(name, rmse, r2, n, note, getattr(model, "noise_std_", None)))
        if rmse < best_rmse:
            best, best_rmse = model, rmse
    if best is None:
        reasons = " ".join(f"{s.name}: {s.note}" for s in scores)
        raise ValueError(f"No candidate surrogate could be scored on {n} designs. {reasons}")
    return best, scores

