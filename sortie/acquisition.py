"""Acquisition: decide where the next solver run is worth the most.

The surrogate gives, at each unit-cube point, a predictive mean and standard deviation of the
objective (to be *minimised*). This module turns them into a score and searches the unit cube for
the point with the best score. Everything works on plain arrays and callables, so any surrogate
with a ``predict(X) -> (mean, std)`` can be plugged in.

* :func:`expected_improvement` and :func:`log_expected_improvement` score the objective [1]_ [3]_.
* :func:`probability_of_feasibility` and :func:`log_probability_of_feasibility` weight the score by
  the chance that a modelled constraint ``g(x) <= 0`` holds [2]_.
* :class:`SuccessModel` learns where solver runs fail (divergence, meshing errors) from past
  outcomes, so that the score can be weighted by the chance that a run at ``x`` succeeds.
* :func:`maximize` searches the unit cube for the maximum of a log-score: Sobol' candidates, then
  L-BFGS-B polishing of the best few [5]_, never returning a point on top of an existing or
  pending design.
* :func:`believer_values` documents the Kriging believer used for asynchronous batches [4]_.

Scores are combined in logs because the product of small factors underflows long before the
optimiser can tell them apart:

>>> def log_score(X):                                      # doctest: +SKIP
...     mean, std = surrogate.predict(X)
...     return log_expected_improvement(mean, std, best) + success.log_predict_proba(X)
>>> proposal = maximize(log_score, n_dims=4, seed=7, exclude=np.vstack([X_done, X_pending]))  # doctest: +SKIP

References
----------
.. [1] D. R. Jones, M. Schonlau and W. J. Welch, "Efficient global optimization of expensive
   black-box functions", J. Global Optim. 13(4):455-492, 1998.
.. [2] M. Schonlau, W. J. Welch and D. R. Jones, "Global versus local search in constrained
   optimization of computer models", IMS Lecture Notes-Monograph Series 34:11-25, 1998.
.. [3] S. Ament, S. Daulton, D. Eriksson, M. Balandat and E. Bakshy, "Unexpected improvements to
   expected improvement for Bayesian optimization", NeurIPS 2023, arXiv:2310.20708.
.. [4] D. Ginsbourger, R. Le Riche and L. Carraro, "Kriging is well-suited to parallelize
   optimization", in Computational Intelligence in Expensive Optimization Problems, Springer,
   ALO 2:131-162, 2010.
.. [5] R. H. Byrd, P. Lu, J. Nocedal and C. Zhu, "A limited memory algorithm for bound constrained
   optimization", SIAM J. Sci. Comput. 16(5):1190-1208, 1995.
.. [6] C. E. Rasmussen and C. K. I. Williams, *Gaussian Processes for Machine Learning*, MIT Press,
   2006, section 6.5 (least-squares classification).
"""

from __future__ import annotations

import logging
import math
import numbers
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy.optimize import minimize
from scipy.spatial.distance import cdist
from scipy.special import erfcx, log_ndtr, logsumexp, ndtr, ndtri
from scipy.stats import qmc
from sklearn.base import BaseEstimator
from sklearn.exceptions import ConvergenceWarning
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel
from sklearn.utils.validation import check_is_fitted
from threadpoolctl import threadpool_limits

__all__ = [
    "Proposal",
    "SuccessModel",
    "believer_values",
    "expected_improvement",
    "log_expected_improvement",
    "log_probability_of_feasibility",
    "maximize",
    "mc_expected_improvement",
    "mc_log_expected_improvement",
    "mc_log_probability_of_feasibility",
    "mc_probability_of_feasibility",
    "normal_base_samples",
    "probability_of_feasibility",
]

logger = logging.getLogger(__name__)

Seed = int | np.random.Generator | None

_SQRT2 = math.sqrt(2.0)
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
_HALF_LOG_PI_OVER_2 = 0.5 * math.log(math.pi / 2.0)
# Below this z the middle branch of log h has nothing left to resolve: 1 - |z| sqrt(pi/2) erfcx
# equals 1/z^2 to within rounding, so the asymptote is exact in double precision (Ament et al.).
_Z_TAIL = -1.0 / math.sqrt(np.finfo(float).eps)
# Rows per call to the user's score: large enough to amortise a GP predict, small enough that
# the (rows x n_train) cross-kernel stays in memory.
_CHUNK_ROWS = 10_000
# Forward-difference step for the gradient: sqrt(machine epsilon) balances truncation and rounding.
_FD_STEP = math.sqrt(np.finfo(float).eps)


# --------------------------------------------------------------------------- helpers


def _check_int(name: str, value: object, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}.")
    return int(value)


def _broadcast_mean_std(mean: object, std: object, *extra: object) -> tuple[np.ndarray, ...]:
    """Broadcast the inputs to one float shape and reject negative standard deviations."""
    arrays = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (mean, std, *extra)))
    if np.any(arrays[1] < 0):
        raise ValueError("std must be >= 0 everywhere; clip tiny negative predictive variances to 0 first.")
    return tuple(arrays)


def _normal_pdf(z: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * z * z - _LOG_SQRT_2PI)


def _log1mexp(x: np.ndarray) -> np.ndarray:
    """``log(1 - exp(x))`` for ``x <= 0`` without cancellation (Maechler 2012's two branches)."""
    x = np.asarray(x, dtype=float)
    near_zero = x > -math.log(2.0)
    with np.errstate(divide="ignore"):
        return np.where(near_zero, np.log(-np.expm1(np.where(near_zero, x, -1.0))), np.log1p(-np.exp(np.minimum(x, 0.0))))


# --------------------------------------------------------------------------- expected improvement


def expected_improvement(mean: object, std: object, best: object, *, xi: float = 0.0) -> np.ndarray:
    """Expected improvement over ``best`` of a Gaussian prediction, for minimisation.

    Why: it rewards both a low predicted value (exploitation) and a large uncertainty
    (exploration) in one number with a closed form, so a whole candidate set is scored in one
    vectorised call [1]_.

    Parameters
    ----------
    mean : array-like, broadcastable with ``std`` and ``best``
        Predictive mean μ of the objective.
    std : array-like, broadcastable with ``mean``
        Predictive standard deviation σ >= 0 of the latent objective (without observation noise).
    best : float or array-like
        Best (lowest) value observed so far, ``f_min``. For constrained problems take it over
        feasible runs only [2]_.
    xi : float, default 0.0
        Margin that an improvement must beat; a positive value pushes towards exploration.

    Returns
    -------
    ndarray of the broadcast shape
        ``(best - μ - xi) Φ(z) + σ φ(z)`` with ``z = (best - μ - xi) / σ``; ``(best - μ - xi)⁺``
        where ``σ == 0`` (so exactly 0 there when ``μ + xi >= best``). Never negative.

    Raises
    ------
    ValueError
        If any ``std`` is negative.

    Notes
    -----
    For ``z <= -1`` the value is computed as ``σ exp(log h(z))`` with the stable ``log h`` of
    :func:`log_expected_improvement`, because the two terms of the closed form nearly cancel
    there. EI underflows to exactly 0 once ``z`` is below about -38, which leaves an optimiser
    with no gradient. Search on :func:`log_expected_improvement` instead; use this function to
    report values.

    References
    ----------
    .. [1] D. R. Jones, M. Schonlau and W. J. Welch, J. Global Optim. 13(4):455-492, 1998.
    .. [2] M. Schonlau, W. J. Welch and D. R. Jones, IMS Lecture Notes 34:11-25, 1998.

    Examples
    --------
    >>> float(expected_improvement(0.0, 1.0, 0.0))  # 1/sqrt(2 pi)
    0.3989422804014327
    """
    mean, std, best = _broadcast_mean_std(mean, std, best)
    gap = best - mean - xi
    positive = std > 0
    safe_std = np.where(positive, std, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(positive, gap / safe_std, 0.0)
        ei = np.where(positive, gap * ndtr(z) + std * _normal_pdf(z), np.maximum(gap, 0.0))
        # For z <= -1 the two terms nearly cancel (relative error grows like z^2 * eps, and the
        # sum can even go negative); sigma * exp(log h(z)) from the stable log form does not.
        tail = positive & (z <= -1.0)
        ei[tail] = safe_std[tail] * np.exp(_log_h(z[tail]))
    return ei


def _log_h(z: np.ndarray) -> np.ndarray:
    """``log(z Φ(z) + φ(z))`` for ``z <= -1``: branches 2 and 3 of Ament et al. 2023's logEI."""
    z = np.asarray(z, dtype=float)
    with np.errstate(over="ignore"):
        out = -0.5 * z * z - _LOG_SQRT_2PI - 2.0 * np.log(np.abs(z))  # asymptote, branch 3
    mid = z > _Z_TAIL
    zm = z[mid]
    # h(z) = φ(z) (1 - |z| sqrt(pi/2) erfcx(-z/sqrt2)); the bracket is computed as 1 - exp(log(...)).
    log_bracket_term = np.log(erfcx(-zm / _SQRT2) * np.abs(zm)) + _HALF_LOG_PI_OVER_2
    # Just above the cut-off the bracket (about 1/z^2) can round to <= 0, which would give NaN;
    # there the asymptote is already exact to within the last bit, so it stays.
    resolved = log_bracket_term < 0
    idx = np.flatnonzero(mid)[resolved]
    zr = zm[resolved]
    out[idx] = -0.5 * zr * zr - _LOG_SQRT_2PI + _log1mexp(log_bracket_term[resolved])
    return out


def log_expected_improvement(mean: object, std: object, best: object, *, xi: float = 0.0) -> np.ndarray:
    """Natural log of :func:`expected_improvement`, accurate where EI itself underflows.

    Why: far from the incumbent EI is smaller than the smallest double, so it is exactly 0 with a
    zero gradient and an optimiser cannot move. Its log stays finite and smooth, which keeps the
    search informative everywhere and lets scores be combined by addition [1]_.

    Parameters
    ----------
    mean, std, best, xi
        As in :func:`expected_improvement`.

    Returns
    -------
    ndarray of the broadcast shape
        ``log EI``. Finite wherever ``std > 0`` and ``z²/2`` fits in a double (``|z|`` below
        about 1e154; tested down to ``z = -1e9``); ``log (best - μ - xi)`` where ``std == 0``
        and the gap is positive; ``-inf`` where ``std == 0`` and ``μ + xi >= best``.

    Raises
    ------
    ValueError
        If any ``std`` is negative.

    Notes
    -----
    With ``z = (best - μ - xi)/σ`` and ``h(z) = z Φ(z) + φ(z)``, ``EI = σ h(z)``. Three branches [1]_:

    * ``z > -1``: ``log(gap Φ(z) + σ φ(z))`` directly; the two terms cancel by at most a factor
      ``φ(-1)/h(-1) ≈ 2.9`` here, so under two bits are lost.
    * ``-1/sqrt(eps) < z <= -1``: ``log h = -z²/2 - log(2π)/2 + log1mexp(log(erfcx(-z/√2)|z|) +
      log(π/2)/2)``; the scaled complementary error function removes the ``exp(-z²/2)`` factor
      that underflows, and ``log1mexp`` keeps the small difference ``1 - |z|√(π/2) erfcx``.
    * ``z <= -1/sqrt(eps)``: the asymptote ``log h = -z²/2 - log(2π)/2 - 2 log|z|``, exact to
      double precision there. It is also used just above the cut-off wherever the middle
      branch's bracket ``1 - |z|√(π/2) erfcx`` rounds to zero (seen from ``z ≈ -4.8e7``), which
      would otherwise give NaN.

    References
    ----------
    .. [1] S. Ament, S. Daulton, D. Eriksson, M. Balandat and E. Bakshy, "Unexpected improvements
       to expected improvement for Bayesian optimization", NeurIPS 2023, arXiv:2310.20708.

    Examples
    --------
    >>> bool(np.isfinite(log_expected_improvement(1e6, 1.0, 0.0)))  # EI itself is 0.0 here
    True
    """
    mean, std, best = _broadcast_mean_std(mean, std, best)
    gap = best - mean - xi
    positive = std > 0
    safe_std = np.where(positive, std, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(positive, gap / safe_std, 0.0)
        upper = positive & (z > -1.0)
        lower = positive & ~upper
        out = np.empty(z.shape, dtype=float)
        zu = z[upper]
        out[upper] = np.log(gap[upper] * ndtr(zu) + std[upper] * _normal_pdf(zu))
        out[lower] = np.log(safe_std[lower]) + _log_h(z[lower])
        out[~positive] = np.log(np.maximum(gap[~positive], 0.0))
    return out


# --------------------------------------------------------------------------- feasibility


def probability_of_feasibility(mean: object, std: object) -> np.ndarray:
    """Probability that a constraint modelled as ``g(x) ~ N(μ, σ²)`` satisfies ``g(x) <= 0``.

    Why: multiplying EI by this probability steers the search away from regions predicted to
    violate the constraint, while still allowing it where the model is unsure [1]_.

    Parameters
    ----------
    mean : array-like, broadcastable with ``std``
        Predictive mean μ of the constraint function ``g``.
    std : array-like
        Predictive standard deviation σ >= 0 of ``g``.

    Returns
    -------
    ndarray of the broadcast shape
        ``Φ(-μ/σ)``; where ``σ == 0`` exactly 1 if ``μ <= 0`` and 0 otherwise.

    Raises
    ------
    ValueError
        If any ``std`` is negative.

    References
    ----------
    .. [1] M. Schonlau, W. J. Welch and D. R. Jones, "Global versus local search in constrained
       optimization of computer models", IMS Lecture Notes-Monograph Series 34:11-25, 1998.

    Examples
    --------
    >>> round(float(probability_of_feasibility(-0.5, 1.0)), 6)
    0.691462
    """
    mean, std = _broadcast_mean_std(mean, std)
    positive = std > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        pf = ndtr(-mean / np.where(positive, std, 1.0))
    return np.where(positive, pf, (mean <= 0).astype(float))


def log_probability_of_feasibility(mean: object, std: object) -> np.ndarray:
    """Natural log of :func:`probability_of_feasibility`, accurate deep in the infeasible tail.

    Why: ``Φ(-μ/σ)`` underflows to 0 for ``μ/σ`` above about 38, and ``log 0`` would hide how
    infeasible a point is; ``scipy.special.log_ndtr`` stays accurate across its whole range.

    Parameters
    ----------
    mean, std
        As in :func:`probability_of_feasibility`.

    Returns
    -------
    ndarray of the broadcast shape
        ``log Φ(-μ/σ)``; where ``σ == 0`` exactly 0 if ``μ <= 0`` and ``-inf`` otherwise.

    Raises
    ------
    ValueError
        If any ``std`` is negative.
    """
    mean, std = _broadcast_mean_std(mean, std)
    positive = std > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        log_pf = log_ndtr(-mean / np.where(positive, std, 1.0))
    return np.where(positive, log_pf, np.where(mean <= 0, 0.0, -np.inf))


# --------------------------------------------------------------------------- Monte-Carlo (composite goals)

# Weight of the Cauchy-like tail added to the softplus in the smoothed improvement (Ament et al.
# 2023's "fat" softplus): where no sample improves, log EI still falls off gently, like -2 log(gap).
_FAT_TAIL = 0.1


def normal_base_samples(n_outputs: int, n_samples: int = 256, seed: int = 0) -> np.ndarray:
    """Fixed standard-normal base samples, shape (n_samples, n_outputs): scrambled Sobol' mapped by Φ⁻¹.

    Why: with the same base samples at every point, a Monte-Carlo acquisition is a deterministic,
    continuous function of the design (a sample average approximation), so a local search can
    polish it; quasi-random points give a lower variance than plain normal draws for the same count
    (Astudillo & Frazier 2019; Balandat et al. 2020). ``n_samples`` is rounded up to a power of two.
    """
    n_outputs = _check_int("n_outputs", n_outputs, 1)
    m = (_check_int("n_samples", n_samples, 2) - 1).bit_length()
    u = qmc.Sobol(n_outputs, rng=seed).random_base2(m)
    return ndtri(np.clip(u, 1e-12, 1.0 - 1e-12))


def mc_expected_improvement(objective_samples: object, best: float) -> np.ndarray:
    """Monte-Carlo expected improvement over ``best``: ``mean_s max(0, best - g_s)`` for each row.

    ``objective_samples`` has shape (n_points, n_samples): posterior draws of the composed
    objective (to minimise). This is the number reported; the search uses the smooth log form.
    """
    g = np.atleast_2d(np.asarray(objective_samples, dtype=float))
    return np.mean(np.maximum(best - g, 0.0), axis=1)


def mc_log_expected_improvement(objective_samples: object, best: float, tau: float) -> np.ndarray:
    """Smoothed log of :func:`mc_expected_improvement`, finite everywhere, shape (n_points,).

    ``max(0, u)`` is replaced by ``tau (softplus(u / tau) + 0.1 / (1 + (u / tau)^2))`` (a "fat"
    softplus, after Ament et al. 2023's qLogEI): within a hair of the exact value when ``tau`` is
    small against the improvements, and, where no sample improves at all, a gently decreasing value
    instead of exactly 0, so the search still knows which way the improvement lies.
    """
    g = np.atleast_2d(np.asarray(objective_samples, dtype=float))
    if not tau > 0:
        raise ValueError(f"tau must be positive, got {tau!r}.")
    u = np.clip((best - g) / tau, -1e100, 1e100)
    with np.errstate(over="ignore", divide="ignore"):
        log_terms = np.log(np.logaddexp(0.0, u) + _FAT_TAIL / (1.0 + u * u))
    return math.log(tau) + logsumexp(log_terms, axis=1) - math.log(g.shape[1])


def mc_probability_of_feasibility(margin_samples: object) -> np.ndarray:
    """Fraction of posterior samples in which every margin is at most 0.

    ``margin_samples`` has shape (n_points, n_samples, n_constraints); returns shape (n_points,).
    """
    m = np.asarray(margin_samples, dtype=float)
    return np.mean(np.all(m <= 0.0, axis=2), axis=1)


def _log_fat_step(x: np.ndarray) -> np.ndarray:
    """``log f(x)`` for the algebraic step ``f(x) = (1 + x / sqrt(1 + x^2)) / 2``, stable for x << 0."""
    h = np.hypot(1.0, x)
    with np.errstate(divide="ignore"):
        # For x < 0, 1 + x/h = 1 / (h (h - x)): no cancellation.
        return np.where(x >= 0, np.log(0.5 * (1.0 + x / h)), -math.log(2.0) - np.log(h) - np.log(h - np.minimum(x, 0.0)))


def mc_log_probability_of_feasibility(margin_samples: object, tau: object) -> np.ndarray:
    """Smoothed log of :func:`mc_probability_of_feasibility`, finite everywhere, shape (n_points,).

    The indicator ``margin <= 0`` of each constraint becomes a smooth step of width ``tau`` (one
    per constraint, in the margin's units) with algebraic tails, so the fixed-sample estimate has a
    slope a local search can follow, and a region where no sample is feasible is still ranked by
    how far it is from feasibility.
    """
    m = np.asarray(margin_samples, dtype=float)
    tau = np.broadcast_to(np.asarray(tau, dtype=float), (m.shape[2],))
    if np.any(~(tau > 0)):
        raise ValueError("tau must be positive for every constraint.")
    per_sample = _log_fat_step(-m / tau).sum(axis=2)
    return logsumexp(per_sample, axis=1) - math.log(m.shape[1])


# --------------------------------------------------------------------------- solver success


class SuccessModel(BaseEstimator):
    """Probability that a solver run at a unit-cube point succeeds, learned from past runs.

    Why: CFD runs fail in regions of the design space (bad meshes, divergence), and every failed
    run costs a slot. Weighting the acquisition score by ``P(success)`` avoids those regions once
    they are seen, while the floor keeps their edge open to probing.

    Parameters
    ----------
    floor : float, default 1e-12
        Smallest probability returned, in ``(0, 1]``. A score multiplied by 0 could never pull
        the search back towards a boundary that the model has placed too conservatively. The
        floor only acts deep inside a region the model is sure fails (near a boundary the
        probability is well above it), so it is set low: at 1e-3 (gp.md's suggestion) a search
        that had converged elsewhere, where EI had fallen a thousandfold and more, went back into
        the failing region every other design.
    n_restarts : int, default 2
        Extra random restarts of the kernel hyperparameter fit (scikit-learn's
        ``n_restarts_optimizer``).
    random_state : int, numpy.random.RandomState or None, default None
        Drives the restarts (passed to scikit-learn, which does not take a ``Generator``); the
        same integer and data give the same fit.

    Attributes
    ----------
    n_features_in_ : int
        Number of input dimensions seen in :meth:`fit`.
    n_failures_ : int
        Number of failed runs seen in :meth:`fit`.
    constant_ : float or None
        The probability returned everywhere when the runs had only one outcome, else None.
    gp_ : sklearn.gaussian_process.GaussianProcessRegressor or None
        The regression on ±1 labels, fitted only when both outcomes occurred.
    convergence_warnings_ : tuple of str
        Messages of the ConvergenceWarnings raised by the hyperparameter fit (typically a length
        scale at its bound). They are logged at DEBUG level, not re-raised: a length scale at its
        upper bound just means that input does not affect success.

    Notes
    -----
    scikit-learn's classifiers refuse data with a single class, which is the normal state early
    in a campaign, so with no failures the model returns exactly 1 everywhere (nothing says any
    region is worse). With no successes it returns the rule-of-succession estimate
    ``1/(n + 2)`` (at least ``floor``) everywhere: a constant carries no information about
    *where* to go, so the objective alone decides.

    With both outcomes, a Gaussian process regression is fitted to labels ``+1`` (success) and
    ``-1`` (failure) with a Matern 5/2 kernel, one length scale per input, plus a fitted white
    noise term, and the label mean and scale normalised [1]_. Its predictive distribution
    ``N(μ, σ²)`` includes the fitted label noise, and ``P(success) = Φ(μ/σ)`` is the chance that
    the predicted label is positive. This costs about half of a Laplace-approximation classifier
    and reuses the regression machinery of the objective surrogate.

    References
    ----------
    .. [1] C. E. Rasmussen and C. K. I. Williams, *Gaussian Processes for Machine Learning*,
       MIT Press, 2006, section 6.5.

    Examples
    --------
    >>> X = np.random.default_rng(0).random((30, 2))
    >>> model = SuccessModel(random_state=0).fit(X, X[:, 0] < 0.7)
    >>> p = model.predict_proba(np.array([[0.2, 0.5], [0.95, 0.5]]))
    >>> bool(p[0] > p[1])
    True
    """

    def __init__(
        self, *, floor: float = 1e-12, n_restarts: int = 2, random_state: int | np.random.RandomState | None = None
    ) -> None:
        self.floor = floor
        self.n_restarts = n_restarts
        self.random_state = random_state

    def fit(self, X: object, succeeded: object) -> SuccessModel:
        """Learn where runs succeed.

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
            Unit-cube inputs of finished runs (successful and failed).
        succeeded : array-like of bool, shape (n_points,)
            True where the run succeeded. Integers 0/1 are accepted.

        Returns
        -------
        SuccessModel
            ``self``, fitted.

        Raises
        ------
        ValueError
            If the shapes disagree, ``X`` is not finite, ``succeeded`` is not boolean, or
            ``floor``/``n_restarts`` are out of range.
        """
        if not (isinstance(self.floor, numbers.Real) and 0.0 < self.floor <= 1.0):
            raise ValueError(f"floor must be a number in (0, 1], got {self.floor!r}.")
        n_restarts = _check_int("n_restarts", self.n_restarts, 0)
        X = np.asarray(X, dtype=float)
        if X.ndim != 2 or not np.all(np.isfinite(X)):
            raise ValueError(f"X must be a finite array of shape (n_points, n_dims), got shape {X.shape}.")
        labels = np.asarray(succeeded)
        if labels.dtype != bool:
            if labels.size and not np.all(np.isin(labels, (0, 1))):
                raise ValueError("succeeded must hold booleans (or 0/1), one per row of X.")
            labels = labels.astype(bool)
        if labels.shape != (X.shape[0],):
            raise ValueError(f"succeeded must have shape ({X.shape[0]},) to match X, got {labels.shape}.")

        self.n_features_in_ = X.shape[1]
        self.n_failures_ = int(np.count_nonzero(~labels))
        self.convergence_warnings_: tuple[str, ...] = ()
        n_points = X.shape[0]
        if self.n_failures_ == 0:
            self.constant_, self.gp_ = 1.0, None
            return self
        if self.n_failures_ == n_points:
            self.constant_, self.gp_ = max(float(self.floor), 1.0 / (n_points + 2)), None
            return self

        n_dims = X.shape[1]
        kernel = ConstantKernel(1.0, (1e-3, 1e3)) * Matern(
            length_scale=np.full(n_dims, 0.2), length_scale_bounds=(1e-2, 1e2), nu=2.5
        ) + WhiteKernel(noise_level=0.1, noise_level_bounds=(1e-6, 1e1))
        gp = GaussianProcessRegressor(
            kernel, alpha=1e-8, normalize_y=True, n_restarts_optimizer=n_restarts, random_state=self.random_state
        )
        y = np.where(labels, 1.0, -1.0)
        # One BLAS thread: small matrices gain nothing from threads, and on a machine whose cores
        # run solver cases the threads' contention made fits orders of magnitude slower.
        with warnings.catch_warnings(record=True) as caught, threadpool_limits(limits=1, user_api="blas"):
            warnings.simplefilter("always")
            gp.fit(X, y)
        messages = []
        for w in caught:
            if issubclass(w.category, ConvergenceWarning):
                messages.append(str(w.message))
                logger.debug("success-model fit: %s", w.message)
            else:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        self.constant_, self.gp_ = None, gp
        self.convergence_warnings_ = tuple(messages)
        return self

    def _check_X(self, X: object) -> np.ndarray:
        check_is_fitted(self, "n_features_in_")
        X = np.asarray(X, dtype=float)
        if X.ndim != 2 or X.shape[1] != self.n_features_in_:
            raise ValueError(f"X must have shape (n_points, {self.n_features_in_}), got {X.shape}.")
        return X

    def _latent_ratio(self, X: np.ndarray) -> np.ndarray:
        """``μ/σ`` of the label regression; σ already contains the fitted label noise."""
        mean, std = self.gp_.predict(X, return_std=True)
        return mean / np.maximum(std, np.finfo(float).tiny)

    def predict_proba(self, X: object) -> np.ndarray:
        """Probability that a run succeeds at each point.

        Unlike scikit-learn classifiers, this returns one column (success), because that is the
        only quantity the acquisition needs.

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
            Unit-cube points.

        Returns
        -------
        ndarray of shape (n_points,)
            ``P(success)`` in ``[floor, 1]``.
        """
        X = self._check_X(X)
        if self.constant_ is not None:
            return np.full(X.shape[0], self.constant_)
        if X.shape[0] == 0:
            return np.empty(0)
        return np.maximum(ndtr(self._latent_ratio(X)), self.floor)

    def log_predict_proba(self, X: object, std_factor: float = 1.0) -> np.ndarray:
        """Natural log of :meth:`predict_proba`, to add to a log acquisition score.

        Parameters
        ----------
        X : array-like of shape (n_points, n_dims)
            Unit-cube points.
        std_factor : float, default 1.0
            Scales the predictive std of the label regression, ``log Φ(μ / (std_factor σ))``. An
            acquisition that sharpens EI by scaling the objective's std (weighted EI) must sharpen
            this factor alike: otherwise EI ratios grow like ``exp(z² / 2 std_factor²)`` while
            ``P(success)`` stays put, and a region the model is sure fails outscores every
            other once the search has converged.

        Returns
        -------
        ndarray of shape (n_points,)
            ``log P(success)`` in ``[log floor, 0]``.
        """
        X = self._check_X(X)
        if not (isinstance(std_factor, numbers.Real) and std_factor > 0):
            raise ValueError(f"std_factor must be a positive number, got {std_factor!r}.")
        if self.constant_ is not None:
            return np.full(X.shape[0], math.log(self.constant_))
        if X.shape[0] == 0:
            return np.empty(0)
        return np.maximum(log_ndtr(self._latent_ratio(X) / std_factor), math.log(self.floor))


# --------------------------------------------------------------------------- Kriging believer


def believer_values(predict_mean: Callable[[np.ndarray], np.ndarray], X_pending: object) -> np.ndarray:
    """Fantasised objective values at pending points under the Kriging believer.

    Why: in an asynchronous campaign some designs are still running. Refitting the surrogate as
    if each pending run had returned its posterior mean leaves the mean almost unchanged but
    collapses the uncertainty there, so the next proposal moves elsewhere instead of repeating a
    running case [1]_. Refit with the hyperparameters held fixed; that refit is the surrogate's job.

    Parameters
    ----------
    predict_mean : callable
        ``predict_mean(X) -> mean`` with ``X`` of shape (n_pending, n_dims) and ``mean`` of shape
        (n_pending,), the surrogate's posterior mean fitted on finished runs only.
    X_pending : array-like of shape (n_pending, n_dims)
        Unit-cube inputs of runs that are submitted but not finished.

    Returns
    -------
    ndarray of shape (n_pending,)
        The values to append to ``y`` for the believer refit. Empty if nothing is pending.

    Raises
    ------
    ValueError
        If ``X_pending`` is not 2-D or ``predict_mean`` returns the wrong shape.

    References
    ----------
    .. [1] D. Ginsbourger, R. Le Riche and L. Carraro, "Kriging is well-suited to parallelize
       optimization", Springer ALO 2:131-162, 2010.
    """
    X_pending = np.asarray(X_pending, dtype=float)
    if X_pending.ndim != 2:
        raise ValueError(f"X_pending must have shape (n_pending, n_dims), got {X_pending.shape}.")
    if X_pending.shape[0] == 0:
        return np.empty(0)
    values = np.asarray(predict_mean(X_pending), dtype=float)
    if values.shape != (X_pending.shape[0],):
        raise ValueError(f"predict_mean must return shape ({X_pending.shape[0]},), got {values.shape}.")
    return values


# --------------------------------------------------------------------------- maximisation


@dataclass(frozen=True, eq=False)
class Proposal:
    """The point :func:`maximize` chose, and how it was found.

    Attributes
    ----------
    x : ndarray of shape (n_dims,)
        The point in the unit cube (read-only).
    log_score : float
        ``log_score`` evaluated at ``x``.
    n_evaluations : int
        Number of points at which ``log_score`` was evaluated in total (candidates plus every
        point of the polishing runs, including finite-difference stencils).
    source : {"polished", "candidate"}
        ``"polished"`` if L-BFGS-B produced ``x``; ``"candidate"`` if it is a raw Sobol' point,
        because every polished point was too close to an excluded design or scored lower.
    """

    x: np.ndarray
    log_score: float
    n_evaluations: int
    source: Literal["polished", "candidate"]

    def __post_init__(self) -> None:
        x = np.array(self.x, dtype=float)
        x.setflags(write=False)
        object.__setattr__(self, "x", x)


class _CountingScore:
    """Wrap the user's score: count rows, check the shape, refuse NaN."""

    def __init__(self, log_score: Callable[[np.ndarray], np.ndarray]) -> None:
        self.log_score = log_score
        self.n_rows = 0

    def __call__(self, X: np.ndarray) -> np.ndarray:
        values = np.asarray(self.log_score(X), dtype=float)
        self.n_rows += X.shape[0]
        if values.shape != (X.shape[0],):
            raise ValueError(f"log_score must return shape ({X.shape[0]},) for X of shape {X.shape}, got {values.shape}.")
        if np.any(np.isnan(values)):
            raise ValueError(f"log_score returned NaN at {int(np.isnan(values).sum())} of {X.shape[0]} points; check the surrogate's predictions.")
        return values


def _far_enough(X: np.ndarray, exclude: np.ndarray | None, min_distance: float) -> np.ndarray:
    """Boolean mask of rows of ``X`` at least ``min_distance`` from every row of ``exclude``."""
    if exclude is None or exclude.shape[0] == 0:
        return np.ones(X.shape[0], dtype=bool)
    keep = np.ones(X.shape[0], dtype=bool)
    limit = min_distance * min_distance
    # Chunked so that (rows x excluded) distance blocks stay small; cdist avoids the
    # (rows x excluded x n_dims) temporary that made this a tenth of a proposal at n = 500.
    step = max(1, _CHUNK_ROWS * 10 // max(1, exclude.shape[0]))
    for start in range(0, X.shape[0], step):
        block = X[start : start + step]
        keep[start : start + step] = cdist(block, exclude, "sqeuclidean").min(axis=1) >= limit
    return keep


def _polish(score: _CountingScore, x0: np.ndarray, max_iter: int, lower: np.ndarray,
            upper: np.ndarray) -> tuple[np.ndarray, float]:
    """Run L-BFGS-B on ``-score`` from ``x0`` inside ``[lower, upper]``; return the final point and its score.

    The forward-difference gradient is computed here, with the point and its ``n_dims`` shifted
    copies scored in one call: a GP predict on d+1 rows costs about the same as on one row.
    """
    n_dims = x0.shape[0]
    shifts = np.eye(n_dims) * _FD_STEP

    def objective(x: np.ndarray) -> tuple[float, np.ndarray]:
        x = np.clip(x, lower, upper)
        # Step inwards at the upper bound so every stencil point stays in the box.
        signs = np.where(x + _FD_STEP <= upper, 1.0, -1.0)
        stencil = np.vstack([x, x + shifts * signs[:, None]])
        values = -score(stencil)
        f0 = values[0]
        if not np.isfinite(f0):
            # A zero-EI plateau (std == 0 at a training point): stop here, L-BFGS-B backs off.
            return math.inf, np.zeros(n_dims)
        grad = (values[1:] - f0) / (_FD_STEP * signs)
        grad[~np.isfinite(grad)] = 0.0
        return float(f0), grad

    result = minimize(
        objective, x0, jac=True, method="L-BFGS-B", bounds=list(zip(lower, upper, strict=True)), options={"maxiter": max_iter}
    )
    x = np.clip(result.x, lower, upper)
    return x, float(score(x[None, :])[0])


def maximize(
    log_score: Callable[[np.ndarray], np.ndarray],
    n_dims: int,
    *,
    seed: Seed,
    n_candidates: int = 2048,
    n_starts: int = 8,
    exclude: np.ndarray | None = None,
    min_distance: float = 1e-3,
    max_iter: int = 50,
    lower: np.ndarray | None = None,
    upper: np.ndarray | None = None,
) -> Proposal:
    """Find the unit-cube point with the highest log-score, away from known designs.

    Why: acquisition surfaces are multimodal and flat over large areas, so a local optimiser
    alone gets lost, and a candidate set alone is coarse. A dense quasi-random set finds the
    basins cheaply in one vectorised call; L-BFGS-B [1]_ then sharpens the best few. The distance
    check stops the search from proposing a design that is already run or queued.

    Parameters
    ----------
    log_score : callable
        ``log_score(X) -> scores`` with ``X`` of shape (n, n_dims) in the unit cube and
        ``scores`` of shape (n,), higher is better; typically log EI plus log P(success). It
        must be vectorised and deterministic. ``-inf`` is allowed; NaN is an error.
    n_dims : int
        Number of input dimensions, >= 1.
    seed : int, numpy.random.Generator or None
        Passed to ``scipy.stats.qmc.Sobol(rng=seed)``; the same seed gives the same proposal.
    n_candidates : int, default 2048
        Minimum number of Sobol' candidates; rounded up to a power of two to keep the sequence
        balanced. Scored in chunks of 10 000 rows.
    n_starts : int, default 8
        Number of best candidates (among those far enough from ``exclude``) polished with
        L-BFGS-B. 0 returns the best candidate unpolished.
    exclude : ndarray of shape (n_excluded, n_dims), optional
        Unit-cube points the proposal must keep away from: finished and pending designs.
    min_distance : float, default 1e-3
        Smallest allowed Euclidean distance, in the unit cube, to every row of ``exclude``.
    max_iter : int, default 50
        Iteration limit of each L-BFGS-B run.
    lower, upper : ndarray of shape (n_dims,), optional
        A box inside the unit cube to search instead of the whole cube (default 0 and 1), for a
        local step around the best design. Candidates are Sobol' points of the box.

    Returns
    -------
    Proposal
        The best polished point that is far enough from ``exclude``; if a raw candidate that is
        far enough scores higher (or every polished point is too close), that candidate.

    Raises
    ------
    ValueError
        If an argument is out of range, ``log_score`` returns the wrong shape or NaN, or no
        candidate is at least ``min_distance`` from ``exclude``.

    Notes
    -----
    The gradient is a forward difference with step ``sqrt(eps)``, the point and its ``n_dims``
    shifted copies scored in one call. Polishing stops early (and keeps its start) if it reaches
    a point scored ``-inf``.

    References
    ----------
    .. [1] R. H. Byrd, P. Lu, J. Nocedal and C. Zhu, "A limited memory algorithm for bound
       constrained optimization", SIAM J. Sci. Comput. 16(5):1190-1208, 1995.

    Examples
    --------
    >>> target = np.array([0.3, 0.7])
    >>> proposal = maximize(lambda X: -((X - target) ** 2).sum(axis=1), 2, seed=0)
    >>> bool(np.allclose(proposal.x, target, atol=1e-4)), proposal.source
    (True, 'polished')
    """
    n_dims = _check_int("n_dims", n_dims, 1)
    n_candidates = _check_int("n_candidates", n_candidates, 1)
    n_starts = _check_int("n_starts", n_starts, 0)
    max_iter = _check_int("max_iter", max_iter, 1)
    if not (isinstance(min_distance, numbers.Real) and min_distance >= 0):
        raise ValueError(f"min_distance must be a number >= 0, got {min_distance!r}.")
    if exclude is not None:
        exclude = np.asarray(exclude, dtype=float)
        if exclude.ndim != 2 or exclude.shape[1] != n_dims:
            raise ValueError(f"exclude must have shape (n_excluded, {n_dims}), got {exclude.shape}.")

    lower = np.zeros(n_dims) if lower is None else np.asarray(lower, dtype=float)
    upper = np.ones(n_dims) if upper is None else np.asarray(upper, dtype=float)
    if lower.shape != (n_dims,) or upper.shape != (n_dims,) or not np.all((lower >= 0) & (lower < upper) & (upper <= 1)):
        raise ValueError(f"lower and upper must have shape ({n_dims},) with 0 <= lower < upper <= 1.")

    score = _CountingScore(log_score)

    # (1) Candidates: a scrambled Sobol' net of 2^m >= n_candidates points, scored in chunks.
    m = (n_candidates - 1).bit_length()
    candidates = lower + (upper - lower) * qmc.Sobol(n_dims, rng=seed).random_base2(m)
    cand_scores = np.concatenate(
        [score(candidates[i : i + _CHUNK_ROWS]) for i in range(0, candidates.shape[0], _CHUNK_ROWS)]
    )
    far = _far_enough(candidates, exclude, min_distance)
    if not far.any():
        raise ValueError(
            f"No candidate point is at least min_distance={min_distance:g} from the {exclude.shape[0]} excluded designs; lower min_distance or raise n_candidates."
        )
    far_idx = np.flatnonzero(far)
    # Stable sort on the negated scores: ties keep Sobol' order, so the result is reproducible.
    order = far_idx[np.argsort(-cand_scores[far_idx], kind="stable")]
    best_idx = order[0]
    best = (candidates[best_idx], float(cand_scores[best_idx]), "candidate")

    # (2)-(3) Polish the best few candidates; an infinite start has no slope to follow.
    polished = []
    for idx in order[:n_starts]:
        if not np.isfinite(cand_scores[idx]):
            continue
        polished.append(_polish(score, candidates[idx], max_iter, lower, upper))

    # (4) Best polished point that keeps its distance, unless a raw candidate beats it.
    if polished:
        points = np.array([p[0] for p in polished])
        values = np.array([p[1] for p in polished])
        ok = _far_enough(points, exclude, min_distance)
        if ok.any():
            i = np.flatnonzero(ok)[np.argmax(values[ok])]
            if values[i] >= best[1]:
                best = (points[i], float(values[i]), "polished")

    x, value, source = best
    return Proposal(x=x, log_score=value, n_evaluations=score.n_rows, source=source)
