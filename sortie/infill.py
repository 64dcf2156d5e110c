"""Choosing the next design: surrogates of the goal, expected improvement, and the classic path.

Both the campaign flow and the benchmarks call these pure functions with the campaign's history
as arrays, so the decision logic is tested once and runs the same everywhere.

Adaptive infill (:func:`propose_infill`) models the objective and each constraint margin with
the surrogate that predicts best by leave-one-out error among those that give a standard
deviation, and maximises

    log EI(objective) + Σ_j log P(margin_j ≤ 0) + log P(solver succeeds)

(Jones, Schonlau & Welch 1998; Schonlau, Welch & Jones 1998). Designs still running are handled
by the Kriging believer (Ginsbourger, Le Riche & Carraro 2010): their predicted values are taken
as observed, which shrinks the uncertainty there and pushes the next proposal elsewhere, so the
slots never wait for a whole batch. Until a feasible design exists the objective term is dropped
and the search looks for feasibility alone.

The classic path (:func:`optimize_surface`) fits the chosen surfaces once and optimises the
predicted objective under the predicted constraints with SLSQP, for a single confirmation run.

References
----------
.. [1] D. R. Jones, M. Schonlau and W. J. Welch, "Efficient global optimization of expensive
   black-box functions", J. Global Optim. 13(4):455-492, 1998.
.. [2] M. Schonlau, W. J. Welch and D. R. Jones, "Global versus local search in constrained
   optimization of computer models", IMS Lecture Notes 34:11-25, 1998.
.. [3] D. Ginsbourger, R. Le Riche and L. Carraro, "Kriging is well-suited to parallelize
   optimization", in Computational Intelligence in Expensive Optimization Problems, 2010.
.. [4] D. Kraft, "A software package for sequential quadratic programming", DFVLR-FB 88-28, 1988.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import minimize
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from sortie.acquisition import (
    SuccessModel,
    expected_improvement,
    log_expected_improvement,
    log_probability_of_feasibility,
    maximize,
    probability_of_feasibility,
)
from sortie.surrogate import GaussianProcessSurrogate, ModelScore, Surrogate, choose_surrogate

MIN_POINTS = 3


@dataclass(frozen=True)
class History:
    """What the campaign knows, as arrays over its finished designs (unit-cube inputs).

    Parameters
    ----------
    X : ndarray of shape (n_points, n_dims)
        Finished designs (succeeded or failed).
    objective : ndarray of shape (n_points,)
        Objective to *minimise* (negate a maximised one); NaN where the design failed.
    margins : ndarray of shape (n_points, n_constraints)
        Constraint margins (positive = violated); NaN where the design failed.
    succeeded : ndarray of shape (n_points,), bool
    pending : ndarray of shape (n_pending, n_dims)
        Designs proposed or running, not finished yet.
    """

    X: np.ndarray
    objective: np.ndarray
    margins: np.ndarray
    succeeded: np.ndarray
    pending: np.ndarray

    @property
    def n_dims(self) -> int:
        return int(self.X.shape[1]) if self.X.ndim == 2 and self.X.shape[1] else int(self.pending.shape[1])

    def usable(self) -> np.ndarray:
        """Rows that succeeded with a finite objective and margins."""
        ok = self.succeeded & np.isfinite(self.objective)
        if self.margins.size:
            ok &= np.isfinite(self.margins).all(axis=1)
        return ok


@dataclass(frozen=True)
class InfillSettings:
    """Knobs of the infill search; the defaults suit 2–20 parameters."""

    models: tuple[str, ...] = ("gp", "quadratic", "rbf")
    candidates: int = 2048
    restarts: int = 8
    min_distance: float = 0.001
    stop_below: float | None = None
    full_fit_every: int = 5
    std_cycle: tuple[float, ...] = (1.0, 0.3, 0.05)
    incumbent: str = "best-observed"

    @classmethod
    def from_spec(cls, spec: Any) -> InfillSettings:
        """Settings from the config's ``plan.infill`` section (an :class:`~sortie.config.InfillSpec`)."""
        return cls(models=tuple(spec.models), candidates=spec.candidates, restarts=spec.restarts,
                   min_distance=spec.min_distance, stop_below=spec.stop_below, incumbent=spec.incumbent)


@dataclass(frozen=True)
class Prediction:
    """A surrogate's prediction at one design, for later comparison with the solver."""

    objective_mean: float
    objective_std: float
    margins_mean: tuple[float, ...]
    margins_std: tuple[float, ...]

    def as_dict(self) -> dict[str, Any]:
        return {"objective_mean": self.objective_mean, "objective_std": self.objective_std,
                "margins_mean": list(self.margins_mean), "margins_std": list(self.margins_std)}


@dataclass(frozen=True)
class InfillProposal:
    """The next design and why: the acquisition's factors at that point, and the models used."""

    x: np.ndarray
    expected_improvement: float
    probability_feasible: float
    probability_success: float
    incumbent: float | None
    prediction: Prediction
    model_scores: dict[str, list[ModelScore]] = field(default_factory=dict)
    chosen: dict[str, str] = field(default_factory=dict)
    converged: bool = False
    kernels: dict[str, Any] = field(default_factory=dict)

    def reason(self) -> str:
        if self.incumbent is None:
            return (f"searching for feasibility: P(feasible) {self.probability_feasible:.3g}, "
                    f"P(success) {self.probability_success:.3g}")
        return (f"expected improvement {self.expected_improvement:.4g} x P(feasible) {self.probability_feasible:.3g} "
                f"x P(success) {self.probability_success:.3g} over best {self.incumbent:.6g} ({self.chosen.get('objective', '?')})")


@dataclass
class _Models:
    objective: Surrogate
    margins: list[Surrogate]
    success: SuccessModel
    scores: dict[str, list[ModelScore]]
    chosen: dict[str, str]
    kernels: dict[str, Any]

    def predict(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, list[tuple[np.ndarray, np.ndarray]]]:
        mean, std = self.objective.predict(X, return_std=True)
        return mean, std, [m.predict(X, return_std=True) for m in self.margins]


def _fit_target(X: np.ndarray, y: np.ndarray, models: Sequence[str], seed: int,
                gp_options: dict[str, Any]) -> tuple[Surrogate, list[ModelScore], dict[str, Surrogate]]:
    """The best model by LOO among those with a standard deviation (EI needs one), and all fitted."""
    with_std = [m for m in models if m in ("gp", "quadratic")] or ["gp"]
    fitted: dict[str, Surrogate] = {}
    best, scores = choose_surrogate(X, y, candidates=list(dict.fromkeys([*with_std, *models])), random_state=seed,
                                    options={"gp": gp_options}, fitted=fitted)
    if not best.has_std:
        usable = [s for s in scores if s.name in with_std and np.isfinite(s.loo_rmse)]
        best = fitted[min(usable, key=lambda s: s.loo_rmse).name] if usable else best
    return best, scores, fitted


def fit_models(history: History, settings: InfillSettings, seed: int,
               warm: Mapping[str, Any] | None = None) -> _Models | None:
    """Fit the objective, margin and success models; None when too few designs have succeeded.

    Every ``full_fit_every``-th design (counted by finished designs) the GP hyper-parameters get a
    full maximum-likelihood search with restarts; in between each GP keeps the previous fit's
    kernel (``warm``) and is only refactorised on the new data, one Cholesky instead of a search
    (gp.md §1: hyper-parameters move little from one design to the next).
    """
    ok = history.usable()
    if ok.sum() < MIN_POINTS:
        return None
    X = history.X[ok]
    full = warm is None or len(history.X) % max(settings.full_fit_every, 1) == 0
    targets = ["objective"] + [f"constraint {j}" for j in range(history.margins.shape[1])]
    ys = [history.objective[ok]] + [history.margins[ok, j] for j in range(history.margins.shape[1])]
    fitted, scores, chosen, kernels = [], {}, {}, {}
    for i, (target, y) in enumerate(zip(targets, ys, strict=True)):
        gp_options = {} if full or target not in (warm or {}) else {"warm_kernel": warm[target], "optimize": False}
        model, s, candidates = _fit_target(X, y, settings.models, seed + i, gp_options)
        fitted.append(model)
        scores[target], chosen[target] = s, model.name
        gp = candidates.get("gp")
        if isinstance(gp, GaussianProcessSurrogate):
            kernels[target] = gp.kernel_  # kept even when another model won, to warm-start the next GP
        elif warm and target in warm:
            kernels[target] = warm[target]
    success = SuccessModel(random_state=seed).fit(history.X, history.succeeded)
    return _Models(fitted[0], fitted[1:], success, scores, chosen, kernels)


def _believe(model: Surrogate, pending: np.ndarray) -> Surrogate:
    if len(pending) and isinstance(model, GaussianProcessSurrogate):
        return model.believer(pending)
    return model


def propose_infill(history: History, settings: InfillSettings, *, seed: int,
                   warm: Mapping[str, Any] | None = None) -> InfillProposal | None:
    """The next design by constrained, failure-aware expected improvement; None if it cannot be fitted yet.

    BLAS is limited to one thread while fitting: on small machines the solver cases and the
    orchestrator share the cores, and multi-threaded BLAS on n < 1000 matrices only adds contention.
    """
    with threadpool_limits(limits=1, user_api="blas"):
        models = fit_models(history, settings, seed, warm)
        if models is None:
            return None
        ok = history.usable()
        objective = _believe(models.objective, history.pending)
        margins = [_believe(m, history.pending) for m in models.margins]
        feasible = ok.copy()
        if history.margins.size:
            feasible &= (np.nan_to_num(history.margins, nan=np.inf) <= 0).all(axis=1)
        incumbent = float(history.objective[feasible].min()) if feasible.any() else None
        # A std factor below 1 on some steps sharpens EI towards the predicted minimum: alternating
        # exploratory and exploitative steps, in the spirit of weighted EI (Sobester et al. 2005).
        sharpen = settings.std_cycle[(len(history.X) + len(history.pending)) % len(settings.std_cycle)]

        def log_score(X: np.ndarray) -> np.ndarray:
            total = models.success.log_predict_proba(X)
            for m in margins:
                mu, sd = m.predict(X, return_std=True)
                total = total + log_probability_of_feasibility(mu, sd)
            if incumbent is not None:
                mu, sd = objective.predict(X, return_std=True)
                total = total + log_expected_improvement(mu, sharpen * sd, incumbent)
            return total

        exclude = np.vstack([history.X, history.pending]) if len(history.pending) else history.X
        found = maximize(log_score, history.n_dims, seed=seed, n_candidates=settings.candidates,
                         n_starts=settings.restarts, exclude=exclude, min_distance=settings.min_distance)
        x = found.x[None, :]
        mu, sd = models.objective.predict(x, return_std=True)
        ei = float(expected_improvement(*objective.predict(x, return_std=True), incumbent)[0]) if incumbent is not None else 0.0
        pf = 1.0
        m_means, m_stds = [], []
        for m, mb in zip(models.margins, margins, strict=True):
            mm, ms = m.predict(x, return_std=True)
            m_means.append(float(mm[0]))
            m_stds.append(float(ms[0]))
            pf *= float(probability_of_feasibility(*mb.predict(x, return_std=True))[0])
        ps = float(models.success.predict_proba(x)[0])
    scale = max(abs(incumbent), float(np.ptp(history.objective[ok])), 1e-12) if incumbent is not None else 1.0
    converged = settings.stop_below is not None and incumbent is not None and ei < settings.stop_below * scale
    return InfillProposal(found.x, ei, pf, ps, incumbent,
                          Prediction(float(mu[0]), float(sd[0]), tuple(m_means), tuple(m_stds)),
                          models.scores, models.chosen, converged, models.kernels)


def optimize_surface(history: History, settings: InfillSettings, *, seed: int,
                     n_starts: int = 16) -> InfillProposal | None:
    """Classic one-shot: minimise the predicted objective subject to predicted margins ≤ 0 (SLSQP).

    Multi-start from scrambled Sobol' points, bounds of the unit cube; the best feasible local
    optimum wins (the least-violating one if none is feasible). Returns the point with the
    surfaces' predictions, to be run once as a confirmation design.
    """
    with threadpool_limits(limits=1, user_api="blas"):
        models = fit_models(history, settings, seed)
        if models is None:
            return None
        d = history.n_dims

        def f(x: np.ndarray) -> float:
            return float(models.objective.predict(x[None, :])[0])

        constraints = [{"type": "ineq", "fun": (lambda x, m=m: -float(m.predict(x[None, :])[0]))} for m in models.margins]
        starts = qmc.Sobol(d, rng=seed).random(n_starts)
        best: tuple[float, float, np.ndarray] | None = None
        for x0 in starts:
            res = minimize(f, x0, method="SLSQP", bounds=[(0.0, 1.0)] * d, constraints=constraints,
                           options={"maxiter": 200})
            x = np.clip(res.x, 0.0, 1.0)
            violation = max([float(m.predict(x[None, :])[0]) for m in models.margins] + [0.0])
            key = (violation, f(x))
            if best is None or key < best[:2]:
                best = (*key, x)
        assert best is not None
        x = best[2][None, :]
        mu, sd = models.objective.predict(x, return_std=True)
        means, stds = zip(*[(float(a[0]), float(b[0])) for a, b in (m.predict(x, return_std=True) for m in models.margins)],
                          strict=True) if models.margins else ((), ())
        pf = float(np.prod([probability_of_feasibility(mm, ss) for mm, ss in zip(means, stds, strict=True)])) if means else 1.0
    return InfillProposal(best[2], 0.0, pf, 1.0, None, Prediction(float(mu[0]), float(sd[0]), tuple(means), tuple(stds)),
                          models.scores, models.chosen)
