"""Variance-based sensitivity: Sobol' first-order and total indices on the unit cube.

Morris screening (:mod:`sortie.screening`) ranks parameters from a few dozen solver runs. Once a
campaign has enough designs for a trustworthy surrogate, the Sobol' indices of the surrogate's
mean prediction give a second opinion that also says *how much* of the output variance each
parameter explains, alone (first order, ``S_i``) and with all its interactions (total, ``S_Ti``)
[1]_ [2]_. They cost tens of thousands of evaluations, which is free on a surrogate and
unaffordable on the solver.

The estimator is scipy's: :func:`scipy.stats.sobol_indices` with its ``"saltelli_2010"`` method,
which is Saltelli et al. (2010) [3]_ for the first-order index (their Table 2 (b)) and Jansen
(1999) [4]_ for the total index (Table 2 (f)), on the radial ``A``, ``B``, ``A_B^(i)`` matrices of
a scrambled Sobol' sequence. Two things are done here rather than in scipy, each for a reason:

* the sample matrices are built here (the same construction as scipy's: one scrambled Sobol'
  sequence of dimension ``2 d`` split into ``A`` and ``B``) so that the function -- usually a
  surrogate's ``predict`` -- is called **once** on all ``n (d + 2)`` points instead of three
  times, and the evaluations are then handed to scipy in its dictionary form;
* the bootstrap confidence intervals use :func:`scipy.stats.bootstrap` with percentile
  intervals on those stored evaluations [5]_, instead of ``SobolResult.bootstrap``, whose BCa
  intervals need a jackknife of ``n`` extra estimates (about 4 s for ``n = 4096``, ``d = 3``
  here, against 0.4 s for 500 percentile resamples).

The bootstrap resamples the base points as if they were independent; on a quasi-random sample
the estimator is more accurate than that, so the intervals are conservative.

:func:`ishigami`, :func:`g_function` and their ``*_indices`` are the analytic test functions used
to check the estimator (``../shared/CHECKS.md`` §5).

References
----------
.. [1] I. M. Sobol', "Sensitivity estimates for nonlinear mathematical models", Math. Model.
   Comput. Exp. 1:407-414, 1993.
.. [2] T. Homma and A. Saltelli, "Importance measures in global sensitivity analysis of
   nonlinear models", Reliab. Eng. Syst. Saf. 52(1):1-17, 1996.
.. [3] A. Saltelli, P. Annoni, I. Azzini, F. Campolongo, M. Ratto and S. Tarantola, "Variance
   based sensitivity analysis of model output. Design and estimator for the total sensitivity
   index", Comput. Phys. Commun. 181(2):259-270, 2010.
.. [4] M. J. W. Jansen, "Analysis of variance designs for model output", Comput. Phys. Commun.
   117(1-2):35-43, 1999.
.. [5] G. E. B. Archer, A. Saltelli and I. M. Sobol', "Sensitivity measures, ANOVA-like
   techniques and the use of bootstrap", J. Stat. Comput. Simul. 58(2):99-120, 1997.
.. [6] T. Ishigami and T. Homma, "An importance quantification technique in uncertainty
   analysis for computer models", Proc. ISUMA '90, 398-403, 1990.
.. [7] A. Saltelli and I. M. Sobol', "About the use of rank transformation in sensitivity
   analysis of model output", Reliab. Eng. Syst. Saf. 50(3):225-239, 1995.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from scipy import stats
from scipy.stats import qmc

from sortie.screening import _check_int, _check_names  # one set of argument checks for both modules

__all__ = [
    "AnalyticIndices",
    "SobolIndices",
    "SurrogateScreen",
    "g_function",
    "g_function_indices",
    "ishigami",
    "ishigami_indices",
    "sobol_indices",
    "surrogate_screening",
    "surrogate_sobol_indices",
]

Seed = int | np.random.Generator | None


class _Predictor(Protocol):
    def predict(self, X: np.ndarray) -> Any: ...


@dataclass(frozen=True)
class SobolIndices:
    """First-order and total Sobol' indices per parameter (rows) and output (columns).

    Attributes
    ----------
    names, output_names : tuple of str
        Parameter names (rows) and output names (columns).
    first_order, total_order : ndarray of shape (n_dims, n_outputs)
        ``S_i`` (share of the variance explained by parameter ``i`` alone) and ``S_Ti`` (share
        that would vanish if parameter ``i`` were fixed: its own and all its interactions).
        ``S_Ti - S_i`` measures the interactions. Small negative values are estimation noise.
    first_order_low, first_order_high, total_order_low, total_order_high : ndarray of shape (n_dims, n_outputs)
        Bootstrap percentile interval at ``confidence_level``; NaN when ``n_resamples`` was 0.
    variance : ndarray of shape (n_outputs,)
        Output variance over the cube (from the ``A`` and ``B`` samples). Zero variance gives
        indices of 0.
    n_base : int
        Base sample size ``n`` (rows of ``A`` and of ``B``).
    n_evaluations : int
        Function evaluations used, ``n_base (n_dims + 2)``.
    confidence_level : float
        Level of the intervals.
    """

    names: tuple[str, ...]
    output_names: tuple[str, ...]
    first_order: np.ndarray
    total_order: np.ndarray
    first_order_low: np.ndarray
    first_order_high: np.ndarray
    total_order_low: np.ndarray
    total_order_high: np.ndarray
    variance: np.ndarray
    n_base: int
    n_evaluations: int
    confidence_level: float


def _estimate(f_A: np.ndarray, f_B: np.ndarray, f_AB: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """scipy's Saltelli (2010) / Jansen (1999) estimates as (n_outputs, n_dims) arrays."""
    s, d = f_A.shape[0], f_AB.shape[0]
    if s == 1 and d == 1:
        # scipy squeezes a single index to a scalar and then fails on item assignment; a copy of
        # the output as a second column keeps its arrays 1-D and changes nothing else.
        f_A, f_B, f_AB = np.vstack([f_A, f_A]), np.vstack([f_B, f_B]), np.concatenate([f_AB, f_AB], axis=1)
        first, total = _estimate(f_A, f_B, f_AB, n)
        return first[:1], total[:1]
    res = stats.sobol_indices(func={"f_A": f_A, "f_B": f_B, "f_AB": f_AB}, n=n)
    # scipy squeezes single outputs (and single inputs); restore (n_outputs, n_dims).
    return np.reshape(res.first_order, (s, d)), np.reshape(res.total_order, (s, d))


def sobol_indices(
    func: Callable[[np.ndarray], Any],
    n_dims: int,
    *,
    n_base: int = 4096,
    seed: Seed = None,
    n_resamples: int = 500,
    confidence_level: float = 0.95,
    names: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
) -> SobolIndices:
    """Sobol' first-order and total indices of a function of the unit cube, with bootstrap intervals.

    The inputs are independent and uniform on ``[0, 1]^n_dims``, which is what a sortie design
    space means (each parameter anywhere between its bounds); a non-uniform input belongs in the
    function. The estimator is :func:`scipy.stats.sobol_indices` (Saltelli 2010 first order,
    Jansen 1999 total [3]_ [4]_); see the module notes for what is done here and why.

    Parameters
    ----------
    func : callable
        ``func(X)`` with ``X`` of shape ``(n_points, n_dims)`` in the unit cube, returning shape
        ``(n_points,)`` or ``(n_points, n_outputs)``. Called once, with ``n_base (n_dims + 2)``
        points. Every value must be finite (a solver with failed runs belongs behind a surrogate).
    n_dims : int
        Number of inputs ``d``, >= 1.
    n_base : int, default 4096
        Base sample size ``n``, a power of two (the balance property of Sobol' points; scipy
        requires it). Around 4096 gives errors of a few thousandths on smooth functions of a few
        variables; the error shrinks roughly like ``1/n``.
    seed : int, numpy.random.Generator or None
        Drives the scrambling of the Sobol' sequence and the bootstrap; the same integer seed
        gives the same result.
    n_resamples : int, default 500
        Bootstrap resamples, >= 0; 0 skips the intervals (they are then NaN).
    confidence_level : float, default 0.95
        Level of the percentile intervals, in (0, 1).
    names, output_names : sequence of str, optional
        Parameter and output names (default ``x0, ...`` and ``y0, ...``).

    Returns
    -------
    SobolIndices

    Raises
    ------
    ValueError
        On bad arguments, or if ``func`` returns the wrong shape or a non-finite value.

    Examples
    --------
    >>> res = sobol_indices(lambda X: X[:, 0] + 2 * X[:, 1], 2, n_base=1024, seed=0, n_resamples=0)
    >>> np.round(res.first_order[:, 0], 2).tolist()
    [0.2, 0.8]
    """
    d = _check_int("n_dims", n_dims, 1)
    n = _check_int("n_base", n_base, 2)
    if n & (n - 1):
        raise ValueError(f"n_base must be a power of two (balance of the Sobol' sequence), got {n}.")
    n_resamples = _check_int("n_resamples", n_resamples, 0)
    if not 0.0 < float(confidence_level) < 1.0:
        raise ValueError(f"confidence_level must be in (0, 1), got {confidence_level!r}.")
    names = _check_names("names", names, d, "x")
    rng = np.random.default_rng(seed)

    # A and B side by side from one 2d-dimensional sequence, as scipy does; A_B^(i) is A with
    # column i taken from B.
    base = qmc.Sobol(d=2 * d, scramble=True, rng=rng).random(n)
    A, B = base[:, :d], base[:, d:]
    AB = np.repeat(A[None, :, :], d, axis=0)
    AB[np.arange(d), :, np.arange(d)] = B.T
    X = np.vstack([A, B, AB.reshape(d * n, d)])
    Y = np.asarray(func(X), dtype=float)
    if Y.ndim == 1:
        Y = Y[:, None]
    if Y.ndim != 2 or Y.shape[0] != X.shape[0]:
        raise ValueError(f"func must return shape ({X.shape[0]},) or ({X.shape[0]}, n_outputs), got {np.shape(Y)}.")
    if not np.all(np.isfinite(Y)):
        raise ValueError("func returned NaN or infinite values; Sobol' indices need a value everywhere in the cube.")
    s = Y.shape[1]
    output_names = _check_names("output_names", output_names, s, "y")
    f_A, f_B = Y[:n].T, Y[n : 2 * n].T  # (s, n)
    f_AB = Y[2 * n :].reshape(d, n, s).transpose(0, 2, 1)  # (d, s, n)
    first, total = _estimate(f_A, f_B, f_AB, n)

    nan = np.full((s, d), np.nan)
    low1, high1, lowT, highT = nan, nan, nan, nan
    if n_resamples:

        def statistic(idx: np.ndarray) -> np.ndarray:
            idx = idx.astype(int)
            return np.stack(_estimate(f_A[:, idx], f_B[:, idx], f_AB[..., idx], n))

        boot = stats.bootstrap(
            (np.arange(n),),
            statistic,
            vectorized=False,
            n_resamples=n_resamples,
            confidence_level=confidence_level,
            method="percentile",
            rng=rng,
        )
        (low1, lowT), (high1, highT) = boot.confidence_interval.low, boot.confidence_interval.high

    return SobolIndices(
        names=names,
        output_names=output_names,
        first_order=first.T,
        total_order=total.T,
        first_order_low=np.asarray(low1).T,
        first_order_high=np.asarray(high1).T,
        total_order_low=np.asarray(lowT).T,
        total_order_high=np.asarray(highT).T,
        variance=np.var(np.hstack([f_A, f_B]), axis=1),
        n_base=n,
        n_evaluations=n * (d + 2),
        confidence_level=float(confidence_level),
    )


def surrogate_sobol_indices(
    model: _Predictor | Mapping[str, _Predictor],
    n_dims: int | None = None,
    **kwargs: Any,
) -> SobolIndices:
    """Sobol' indices of a fitted surrogate's mean prediction (or of several, one per output).

    The indices describe the *surrogate*, not the solver: they are as good as the model, and a
    parameter the model has not resolved (a long GP length-scale from too few designs) shows as
    unimportant. Check the leave-one-out error before trusting them.

    Parameters
    ----------
    model : object with ``predict(X)``, or a mapping of output name to such objects
        Anything whose ``predict(X)`` takes unit-cube points of shape ``(n_points, n_dims)`` and
        returns the mean, shape ``(n_points,)`` (every sortie surrogate does). With a mapping,
        all models are evaluated on the same sample and the keys name the outputs.
    n_dims : int, optional
        Number of inputs; by default read from the fitted ``X_`` of the (first) model.
    **kwargs
        Passed to :func:`sobol_indices` (``n_base``, ``seed``, ``n_resamples``,
        ``confidence_level``, ``names``).

    Returns
    -------
    SobolIndices
    """
    models = dict(model) if isinstance(model, Mapping) else {"y0": model}
    if not models:
        raise ValueError("model must be a fitted surrogate or a non-empty mapping of them.")
    if n_dims is None:
        fitted_X = getattr(next(iter(models.values())), "X_", None)
        if fitted_X is None:
            raise ValueError("n_dims is needed when the model has no fitted X_ attribute.")
        n_dims = int(np.shape(fitted_X)[1])
    if isinstance(model, Mapping):
        kwargs.setdefault("output_names", list(models))

    def predict(X: np.ndarray) -> np.ndarray:
        return np.column_stack([np.asarray(m.predict(X), dtype=float).reshape(-1) for m in models.values()])

    return sobol_indices(predict, n_dims, **kwargs)


@dataclass(frozen=True)
class SurrogateScreen:
    """Screening numbers read from Gaussian processes fitted to a space-filling design.

    Attributes
    ----------
    indices : SobolIndices
        Sobol' indices of each output's GP mean.
    importance : ndarray of shape (n_dims, n_outputs)
        ``sqrt(max(S_Ti, 0))``: the total index on the scale of the output itself rather than of
        its variance, so that a selection ``fraction`` means what it means for Morris μ* (a share
        of the largest effect). On the variance scale a parameter with half the effect of the
        strongest scores a quarter. NaN for an output with too few finished designs.
    loo_r2 : ndarray of shape (n_outputs,)
        Leave-one-out coefficient of determination of each GP: how far its indices can be
        trusted. Below about 0.5 the process has not resolved the output and a weak parameter may
        look inert.
    n_points : ndarray of int, shape (n_outputs,)
        Finished designs each GP was fitted to.
    """

    indices: SobolIndices
    importance: np.ndarray
    loo_r2: np.ndarray
    n_points: np.ndarray


def surrogate_screening(
    X: np.ndarray,
    y: np.ndarray,
    *,
    names: Sequence[str] | None = None,
    output_names: Sequence[str] | None = None,
    seed: int = 0,
    n_base: int = 1024,
    n_resamples: int = 200,
) -> SurrogateScreen:
    """Fit a GP to each output and compute the Sobol' indices of its mean: a screen from a space-filling design.

    Morris trajectories cost r(k+1) runs that are of little use afterwards (their grid points
    collapse onto a few points of the selected parameters). A Sobol' design of about 3k runs,
    read through an ARD Gaussian process, ranks the parameters by their total effect
    (interactions included), and its runs remain a well-spread experiment in whatever subspace
    is kept. Rows where an output is NaN (a failed design) are left out of that output's fit.

    Parameters
    ----------
    X : array-like of shape (n_runs, n_dims)
        Designs in the unit cube.
    y : array-like of shape (n_runs,) or (n_runs, n_outputs)
        Outputs; NaN where a run failed.
    names, output_names : sequence of str, optional
        Parameter and output names.
    seed : int
        Seeds the GP restarts, the Sobol' sample and the bootstrap.
    n_base : int, default 1024
        Base sample of the indices (``n_base (d + 2)`` GP predictions); the GP's own error
        dominates long before the estimator's.
    n_resamples : int, default 200
        Bootstrap resamples for the intervals.

    Returns
    -------
    SurrogateScreen
    """
    from sortie.models import choose_surrogate  # the models module is heavy; screening numbers are not

    X = np.asarray(X, dtype=float)
    Y = np.asarray(y, dtype=float)
    Y = Y[:, None] if Y.ndim == 1 else Y
    if X.ndim != 2 or Y.ndim != 2 or X.shape[0] != Y.shape[0]:
        raise ValueError(f"X must be (n_runs, n_dims) and y (n_runs, n_outputs) with the same rows, got {X.shape} and {Y.shape}.")
    n_dims, n_out = X.shape[1], Y.shape[1]
    out_names = _check_names("output_names", output_names, n_out, "y")
    models: dict[str, Any] = {}
    loo_r2 = np.full(n_out, np.nan)
    n_points = np.zeros(n_out, dtype=int)
    for j in range(n_out):
        ok = np.isfinite(Y[:, j])
        n_points[j] = int(ok.sum())
        if n_points[j] < 3:
            continue
        # the one-candidate model choice: the fit and its leave-one-out score, as every surrogate gets them
        gp, (score,) = choose_surrogate(X[ok], Y[ok, j], candidates=["gp"], random_state=seed + j,
                                        options={"gp": {"n_restarts": 4}})
        models[out_names[j]] = gp
        loo_r2[j] = score.loo_r2
    if not models:
        raise ValueError("no output has 3 or more finished designs; a surrogate screen needs runs that succeeded.")
    fitted = surrogate_sobol_indices(models, n_dims, n_base=n_base, seed=seed, n_resamples=n_resamples, names=names)
    # Outputs without a model get NaN columns, so rows and columns keep their meaning.
    where = [out_names.index(k) for k in models]

    def widen(a: np.ndarray) -> np.ndarray:
        full = np.full((n_dims, n_out), np.nan)
        full[:, where] = a
        return full

    variance = np.full(n_out, np.nan)
    variance[where] = fitted.variance
    indices = dataclasses.replace(
        fitted, output_names=tuple(out_names), first_order=widen(fitted.first_order), total_order=widen(fitted.total_order),
        first_order_low=widen(fitted.first_order_low), first_order_high=widen(fitted.first_order_high),
        total_order_low=widen(fitted.total_order_low), total_order_high=widen(fitted.total_order_high),
        variance=variance)
    return SurrogateScreen(indices, np.sqrt(np.clip(indices.total_order, 0.0, None)), loo_r2, n_points)


# --------------------------------------------------------------------------- analytic test functions


@dataclass(frozen=True)
class AnalyticIndices:
    """Exact mean, variance and Sobol' indices of a test function, shape (n_dims,) for the indices."""

    mean: float
    variance: float
    first_order: np.ndarray
    total_order: np.ndarray


def ishigami(X: np.ndarray, a: float = 7.0, b: float = 0.1) -> np.ndarray:
    """Ishigami & Homma's function [6]_ of unit-cube points, inputs mapped to ``[-π, π]^3``.

    ``f = sin x1 + a sin^2 x2 + b x3^4 sin x1`` with ``x = -π + 2π u``. ``x3`` acts only through
    its interaction with ``x1``: its first-order index is 0 and its total index is not.

    Parameters
    ----------
    X : array-like of shape (n_points, 3)
        Unit-cube points.
    a, b : float
        Coefficients; ``a = 7, b = 0.1`` is the usual choice (CHECKS.md §5).

    Returns
    -------
    ndarray of shape (n_points,)
    """
    x = -np.pi + 2.0 * np.pi * np.asarray(X, dtype=float)
    return np.sin(x[:, 0]) + a * np.sin(x[:, 1]) ** 2 + b * x[:, 2] ** 4 * np.sin(x[:, 0])


def ishigami_indices(a: float = 7.0, b: float = 0.1) -> AnalyticIndices:
    """Exact Sobol' indices of :func:`ishigami` (formulas in CHECKS.md §5, after Sobol' & Levitan 1999).

    ``V = 1/2 + a^2/8 + b^2 π^8/18 + b π^4/5``, ``V1 = (1 + b π^4/5)^2 / 2``, ``V2 = a^2/8``,
    ``V13 = 8 b^2 π^8 / 225``; every other partial variance is 0.
    """
    pi4 = np.pi**4
    v = 0.5 + a**2 / 8 + b**2 * pi4**2 / 18 + b * pi4 / 5
    v1 = 0.5 * (1 + b * pi4 / 5) ** 2
    v2 = a**2 / 8
    v13 = 8 * b**2 * pi4**2 / 225
    return AnalyticIndices(
        mean=a / 2,
        variance=float(v),
        first_order=np.array([v1, v2, 0.0]) / v,
        total_order=np.array([v1 + v13, v2, v13]) / v,
    )


def g_function(X: np.ndarray, a: Sequence[float]) -> np.ndarray:
    """Sobol' g-function [7]_ on the unit cube: ``prod_i (|4 u_i - 2| + a_i) / (1 + a_i)``.

    Small ``a_i`` make input ``i`` important (``a_i = 0``: very; 99: hardly at all), and every
    input interacts with every other, so first-order and total indices differ.

    Parameters
    ----------
    X : array-like of shape (n_points, len(a))
        Unit-cube points.
    a : sequence of float
        Non-negative coefficients, one per input.

    Returns
    -------
    ndarray of shape (n_points,)
        Values with mean 1 over the cube.
    """
    a = np.asarray(a, dtype=float)
    return np.prod((np.abs(4.0 * np.asarray(X, dtype=float) - 2.0) + a) / (1.0 + a), axis=1)


def g_function_indices(a: Sequence[float]) -> AnalyticIndices:
    """Exact Sobol' indices of :func:`g_function` (CHECKS.md §5, after Saltelli & Sobol' 1995).

    ``V_i = 1 / (3 (1 + a_i)^2)``, ``V = prod(1 + V_i) - 1``, ``S_i = V_i / V`` and
    ``S_Ti = V_i prod_{j != i}(1 + V_j) / V``.
    """
    a = np.asarray(a, dtype=float)
    vi = 1.0 / (3.0 * (1.0 + a) ** 2)
    v = float(np.prod(1.0 + vi) - 1.0)
    total = vi * np.prod(1.0 + vi) / (1.0 + vi) / v
    return AnalyticIndices(mean=1.0, variance=v, first_order=vi / v, total_order=total)
