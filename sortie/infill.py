"""Choosing the next design: surrogates of the goal, expected improvement, and the classic path.

Both the campaign flow and the benchmarks call these pure functions with the campaign's history
as arrays, so the decision logic is tested once and runs the same everywhere.

Adaptive infill (:func:`propose_infill`) models the objective with a Gaussian process and each
constraint margin with the surrogate that predicts best by leave-one-out error among those that
give a standard deviation, and maximises

    log EI(objective) + Σ_j log P(margin_j ≤ 0) + log P(solver succeeds)

(Jones, Schonlau & Welch 1998; Schonlau, Welch & Jones 1998). Steps follow a short cycle
(:attr:`InfillSettings.cycle`): a global step over the whole space with the predicted std scaled
down (weighted EI, Sóbester, Leary & Keane 2005), then a local step that searches a box around the
best design; a design that improved the best is refined locally at once (see :func:`propose_infill`).
Designs still running are handled by the Kriging believer (Ginsbourger, Le Riche & Carraro 2010):
their predicted values are taken as observed, which shrinks the uncertainty there and pushes the
next proposal elsewhere, so the slots never wait for a whole batch. Until a feasible design
exists the objective term is dropped and the search looks for feasibility alone.

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
.. [5] A. Sóbester, S. J. Leary and A. J. Keane, "On the design of optimization strategies based on
   global response surface approximation models", J. Global Optim. 33(1):31-59, 2005.
.. [7] A. I. J. Forrester, A. Sóbester and A. J. Keane, "Optimization with missing data", Proc. R.
   Soc. A 462(2067):935-945, 2006.
.. [6] R. G. Regis and C. A. Shoemaker, "A stochastic radial basis function method for the global
   optimization of expensive functions", INFORMS J. Comput. 19(4):497-509, 2007.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.optimize import minimize
from scipy.stats import norm, qmc
from threadpoolctl import threadpool_limits

from sortie.acquisition import (
    SuccessModel,
    expected_improvement,
    log_expected_improvement,
    log_probability_of_feasibility,
    maximize,
    mc_expected_improvement,
    mc_log_expected_improvement,
    mc_log_probability_of_feasibility,
    mc_probability_of_feasibility,
    normal_base_samples,
    probability_of_feasibility,
)
from sortie.goal import Composition
from sortie.models import GaussianProcessSurrogate, ModelScore, Surrogate, choose_surrogate

MIN_POINTS = 3
# Composite mode ranks a candidate set of more than _SCREEN_ROWS points on the first _SCREEN_SAMPLES
# base samples only (see _CompositeAcquisition.log_score); a finite-difference stencil is d + 1 rows.
_SCREEN_ROWS = 64
_SCREEN_SAMPLES = 32
# Plain EI below this fraction of the objective's scale means the local box around the best
# design is exhausted, and the step is taken globally (see propose_infill).
_EXHAUSTED = 1e-6


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
    outputs : ndarray of shape (n_points, n_outputs), optional
        For composite infill: each quantity the goal reads at each condition it reads it
        (``composition.outputs``), NaN where that case failed or did not run. A design that failed at
        one condition keeps its other conditions' values, which still train their models.
    composition : Composition, optional
        The goal as a function of ``outputs``; with it (and ``outputs``) infill models each output
        and composes the goal from their samples, without it the objective and margins directly.
    """

    X: np.ndarray
    objective: np.ndarray
    margins: np.ndarray
    succeeded: np.ndarray
    pending: np.ndarray
    outputs: np.ndarray | None = None
    composition: Composition | None = None

    @property
    def composite(self) -> bool:
        """Whether infill models the outputs and composes the goal (Astudillo & Frazier 2019)."""
        return self.composition is not None and self.outputs is not None

    @property
    def n_dims(self) -> int:
        return int(self.X.shape[1]) if self.X.ndim == 2 and self.X.shape[1] else int(self.pending.shape[1])

    def usable(self) -> np.ndarray:
        """Rows that succeeded with a finite objective and margins."""
        ok = self.succeeded & np.isfinite(self.objective)
        if self.margins.size:
            ok &= np.isfinite(self.margins).all(axis=1)
        return ok


INCUMBENT_RULES = ("best-observed", "best-predicted")


@dataclass(frozen=True)
class Step:
    """One step of the infill cycle: EI with the predicted std scaled by ``std``, globally or locally.

    A factor below 1 sharpens EI towards the predicted minimum (weighted EI; Sóbester, Leary &
    Keane 2005): plain EI (``std=1``) spends many designs on corners of the space where the std is
    largest, which a campaign of tens of designs cannot afford. A ``local`` step searches only the box
    of half-width :attr:`InfillSettings.local_radius` around the best design, so it refines that
    design instead of jumping to another basin that looks as good.
    """

    std: float = 1.0
    local: bool = False


@dataclass(frozen=True)
class InfillSettings:
    """Knobs of the infill search; the defaults suit 2–20 parameters.

    ``cycle`` alternates a global step (EI with the std scaled by 0.3) and a local step (std by
    0.05, inside a box of half-width ``local_radius`` = 0.1 of each range around the best design),
    in the spirit of the global-local cycles of Regis & Shoemaker (2007). With
    ``refine_improvements`` a design that improved the best is followed by a local step whatever the
    cycle says: an improvement shows the model is right about that region, and polishing it is the
    cheapest next gain. Local steps wait until there are 2d + 1 usable designs. On Branin (10
    seeds) the previous all-global cycle of std factors (1, 0.3, 0.05) needed a median of 22.5
    evaluations to 1 %, 17 with this cycle, 14 with refinement too (benchmarks/infill.py);
    half-widths 0.05 and 0.2 gave 14.5, and cycles (1, local) 17 and (0.3, 0.3, local) 15.

    ``full_fit_every``: every that many designs the GP hyper-parameters are searched with random
    restarts; on the other steps the search starts from the previous kernel alone (a few
    likelihood evaluations). ``incumbent``: the value EI must beat, ``"best-observed"`` (the best
    feasible objective run so far, Jones et al. 1998) or ``"best-predicted"`` (the lowest GP mean at
    a feasible evaluated design, which does not chase a lucky draw when the solver is noisy).
    """

    models: tuple[str, ...] = ("gp", "quadratic", "rbf")
    candidates: int = 2048
    restarts: int = 8
    min_distance: float = 0.001
    stop_below: float | None = None
    full_fit_every: int = 5
    cycle: tuple[Step, ...] = (Step(0.3), Step(0.05, local=True))
    local_radius: float = 0.1
    refine_improvements: bool = True
    incumbent: str = "best-observed"
    mc_samples: int = 256
    mc_seed: int = 0

    def __post_init__(self) -> None:
        if self.incumbent not in INCUMBENT_RULES:
            raise ValueError(f"incumbent must be one of {', '.join(INCUMBENT_RULES)}, got {self.incumbent!r}.")
        if not self.cycle:
            raise ValueError("cycle must hold at least one step.")
        if not 0.0 < self.local_radius <= 0.5:
            raise ValueError(f"local_radius must be in (0, 0.5], got {self.local_radius!r}.")

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
    outputs: dict[str, tuple[float, float]] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"objective_mean": self.objective_mean, "objective_std": self.objective_std,
                               "margins_mean": list(self.margins_mean), "margins_std": list(self.margins_std)}
        if self.outputs:
            out["outputs"] = {k: {"mean": m, "std": sd} for k, (m, sd) in self.outputs.items()}
        return out


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

    local: bool = False

    def reason(self) -> str:
        if self.incumbent is None:
            return (f"searching for feasibility: P(feasible) {self.probability_feasible:.3g}, "
                    f"P(success) {self.probability_success:.3g}")
        where = "near the best design: " if self.local else ""
        return (f"{where}expected improvement {self.expected_improvement:.4g} x P(feasible) {self.probability_feasible:.3g} "
                f"x P(success) {self.probability_success:.3g} over best {self.incumbent:.6g} ({self._models()})")

    def _models(self) -> str:
        if "objective" in self.chosen or not self.chosen:
            return self.chosen.get("objective", "?")
        return f"composite of {len(self.chosen)} {'/'.join(sorted(set(self.chosen.values())))} models"


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


def _fit_target(X: np.ndarray, y: np.ndarray, models: Sequence[str], seed: int, gp_options: dict[str, Any],
                prefer_gp: bool = False) -> tuple[Surrogate, list[ModelScore], dict[str, Surrogate]]:
    """The model to use (see :func:`fit_models`), every candidate's LOO score, and all fitted models."""
    with_std = [m for m in models if m in ("gp", "quadratic")] or ["gp"]
    fitted: dict[str, Surrogate] = {}
    best, scores = choose_surrogate(X, y, candidates=list(dict.fromkeys([*with_std, *models])), random_state=seed,
                                    options={"gp": gp_options}, fitted=fitted)
    if prefer_gp and "gp" in fitted:
        return fitted["gp"], scores, fitted
    if not best.has_std:
        usable = [s for s in scores if s.name in with_std and np.isfinite(s.loo_rmse)]
        best = fitted[min(usable, key=lambda s: s.loo_rmse).name] if usable else best
    return best, scores, fitted


def _fit_warm(target: str, X: np.ndarray, y: np.ndarray, models: Sequence[str], seed: int,
              warm: Mapping[str, Any] | None, full: bool, prefer_gp: bool,
              record: tuple[dict[str, list[ModelScore]], dict[str, str], dict[str, Any]]) -> Surrogate:
    """Fit one target from its previous kernel (see :func:`fit_models`); record its scores, choice and GP kernel."""
    scores, chosen, kernels = record
    previous = (warm or {}).get(target)
    gp_options: dict[str, Any] = {} if previous is None else {"warm_kernel": previous}
    if not full and previous is not None:
        gp_options["n_restarts"] = 0
    model, s, candidates = _fit_target(X, y, models, seed, gp_options, prefer_gp=prefer_gp)
    scores[target], chosen[target] = s, model.name
    gp = candidates.get("gp")
    if isinstance(gp, GaussianProcessSurrogate):
        kernels[target] = gp.kernel_  # kept even when another model won, to warm-start the next GP
    elif warm and target in warm:
        kernels[target] = warm[target]
    return model


def fit_models(history: History, settings: InfillSettings, seed: int,
               warm: Mapping[str, Any] | None = None, *, for_infill: bool = False) -> _Models | None:
    """Fit the objective, margin and success models; None when too few designs have succeeded.

    Every GP fit searches its hyper-parameters, starting from the previous fit's kernel (``warm``)
    when there is one. Every ``full_fit_every``-th design (counted by finished designs), and
    whenever there is no previous kernel, the search adds random restarts; in between it is a
    local search from the previous kernel, which moves little from one design to the next (gp.md
    §1), so it costs a few likelihood evaluations. The GP caps the likelihood at a random subset
    of designs, so neither kind of step grows past a second or so with the campaign.

    With ``for_infill`` the objective is modelled by the GP whenever it could be fitted, whatever
    the leave-one-out ranking says (the ranking is still returned and recorded). EI needs a std
    that vanishes at the designs already run and grows away from them; a least-squares surface's
    standard error does neither (it is the uncertainty of its coefficients, valid only if the
    surface's form is right), so EI on a quadratic keeps proposing the quadratic's minimum even after
    designs there have come back worse. On Branin the quadratic often won leave-one-out (the
    corners' large values dominate the RMSE) and then held the search near a value of 1.5-3 for 20
    designs. Constraint margins keep the leave-one-out choice: there only P(margin <= 0) matters.
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
        fitted.append(_fit_warm(target, X, y, settings.models, seed + i, warm, full, for_infill and i == 0,
                                (scores, chosen, kernels)))
    success = SuccessModel(random_state=seed).fit(history.X, history.succeeded)
    return _Models(fitted[0], fitted[1:], success, scores, chosen, kernels)


@dataclass
class _CompositeModels:
    """One surrogate per output (a quantity at a condition), the success model, and what was chosen."""

    composition: Composition
    outputs: list[Surrogate]
    success: SuccessModel
    scores: dict[str, list[ModelScore]]
    chosen: dict[str, str]
    kernels: dict[str, Any]

    def predict(self, X: np.ndarray, models: Sequence[Surrogate] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Means and stds of every output at ``X``, each of shape (n_points, n_outputs)."""
        pairs = [m.predict(X, return_std=True) for m in (models if models is not None else self.outputs)]
        std = np.column_stack([p[1] for p in pairs])
        std[np.isnan(std)] = 0.0  # a model without a std (RBF) is taken at its mean
        return np.column_stack([p[0] for p in pairs]), std


def fit_composite(history: History, settings: InfillSettings, seed: int, warm: Mapping[str, Any] | None = None, *,
                  for_infill: bool = False) -> _CompositeModels | None:
    """Fit one surrogate per output the goal reads, each on every design whose case there succeeded.

    A design that failed at one condition still trains the models of its other conditions (its
    row of ``history.outputs`` is NaN only where the case failed). With ``for_infill`` every output
    gets a GP (EI needs a std that vanishes at the designs run; see :func:`fit_models`) and only
    the GP's leave-one-out score is computed; otherwise each output takes the leave-one-out choice
    among ``settings.models`` that give a std (the classic and confirmation surfaces). Hyper-
    parameters are warm-started per output as in :func:`fit_models`. None while too few designs
    have succeeded, or while some output has fewer than :data:`MIN_POINTS` values.
    """
    assert history.composition is not None and history.outputs is not None
    if history.usable().sum() < MIN_POINTS:
        return None
    full = warm is None or len(history.X) % max(settings.full_fit_every, 1) == 0
    candidates = ("gp",) if for_infill else settings.models
    models, scores, chosen, kernels = [], {}, {}, {}
    for k, label in enumerate(history.composition.labels):
        rows = np.isfinite(history.outputs[:, k])
        if rows.sum() < MIN_POINTS:
            return None
        models.append(_fit_warm(label, history.X[rows], history.outputs[rows, k], candidates, seed + k, warm, full,
                                for_infill, (scores, chosen, kernels)))
    success = SuccessModel(random_state=seed).fit(history.X, history.succeeded)
    return _CompositeModels(history.composition, models, success, scores, chosen, kernels)


class _CompositeAcquisition:
    """Monte-Carlo EI x Monte-Carlo P(feasible) x P(success) on the composed goal (Astudillo & Frazier 2019).

    At a design x each output is N(mu_k(x), sigma_k(x)^2) under its own GP, so posterior draws are
    ``mu(x) + sigma(x) * z_s`` with fixed base samples ``z_s`` (scrambled Sobol' through the normal
    quantile). The goal's own evaluator, vectorised, turns the draws into the objective and the
    margins; EI and P(feasible) are their sample averages, smoothed so the search can follow a slope
    (:func:`~sortie.acquisition.mc_log_expected_improvement`). The same base samples everywhere make
    the score a deterministic function of x, which the L-BFGS-B polish of :func:`maximize` needs.

    Pending designs: every output's GP believes its own mean there (Kriging believer per output).
    Failed designs: an output a failed design did not return is imputed at its mean plus or minus
    one std, whichever makes the composed objective worse (penalised imputation per output), and the
    success model learns the failure, as in direct mode.
    """

    def __init__(self, models: _CompositeModels, history: History, settings: InfillSettings) -> None:
        assert history.outputs is not None
        comp = models.composition
        self.models, self.comp = models, comp
        self.Z = normal_base_samples(len(comp.outputs), settings.mc_samples, settings.mc_seed)
        outputs = list(models.outputs)
        failed = np.flatnonzero(~history.succeeded)
        if failed.size:
            mu, sd = models.predict(history.X[failed])
            for k, model in enumerate(outputs):
                missing = ~np.isfinite(history.outputs[failed, k])
                if not missing.any() or not isinstance(model, GaussianProcessSurrogate):
                    continue
                up, down = mu[missing].copy(), mu[missing].copy()
                up[:, k] += sd[missing, k]
                down[:, k] -= sd[missing, k]
                worse = np.where(comp.objective(up) >= comp.objective(down), up[:, k], down[:, k])
                outputs[k] = model.condition(history.X[failed][missing], worse)
        self.outputs = [_believe(m, history.pending) for m in outputs]
        ok = history.usable()
        margins_seen = history.margins[ok] if history.margins.size else np.zeros((int(ok.sum()), 0))
        # Smoothing widths: a millionth of the objective's spread, a thousandth of each margin's.
        self.margin_tau = np.maximum(1e-3 * np.nan_to_num(np.std(margins_seen, axis=0), nan=1.0), 1e-12) \
            if margins_seen.shape[1] else np.zeros(0)
        best = _incumbent(history, _feasible_rows(history), self.mean_objective, _incumbent_rule(settings, models.outputs))
        self.best_row = best[1] if best is not None else None
        self.incumbent = best[0] if best is not None else None
        spread = float(np.ptp(history.objective[ok])) if ok.any() else 0.0
        self.tau = 1e-6 * max(abs(self.incumbent) if self.incumbent is not None else 0.0, spread, 1e-12)
        if len(history.pending):
            mu_p, _ = models.predict(history.pending)
            self.incumbent = _believed_best(self.incumbent, comp.objective(mu_p), comp.margins(mu_p))

    def _samples(self, mean: np.ndarray, std: np.ndarray, factor: float = 1.0, Z: np.ndarray | None = None) -> np.ndarray:
        """Posterior draws of the outputs, shape (n_points * n_samples, n_outputs)."""
        Z = self.Z if Z is None else Z
        return (mean[:, None, :] + factor * std[:, None, :] * Z[None, :, :]).reshape(-1, mean.shape[1])

    def mean_objective(self, X: np.ndarray) -> np.ndarray:
        """Posterior mean of the composed objective (sample average), with the models before any belief."""
        mean, std = self.models.predict(X)
        return self.comp.objective(self._samples(mean, std)).reshape(X.shape[0], -1).mean(axis=1)

    def log_score(self, X: np.ndarray, std_factor: float) -> np.ndarray:
        total = self.models.success.log_predict_proba(X, std_factor=std_factor)
        # A large candidate set is ranked on the first 32 base samples (a balanced Sobol' prefix); the
        # few points the search polishes, and the one it returns, are scored on all of them.
        Z = self.Z[:_SCREEN_SAMPLES] if X.shape[0] > _SCREEN_ROWS else self.Z
        out = np.empty(X.shape[0])
        for start in range(0, X.shape[0], 128):  # (rows x samples x outputs) stays a few MB
            rows = slice(start, start + 128)
            mean, std = self.models.predict(X[rows], self.outputs)
            part = np.zeros(mean.shape[0])
            if self.margin_tau.size:
                m = self.comp.margins(self._samples(mean, std, Z=Z)).reshape(mean.shape[0], len(Z), -1)
                part += mc_log_probability_of_feasibility(m, self.margin_tau)
            if self.incumbent is not None:
                g = self.comp.objective(self._samples(mean, std, std_factor, Z)).reshape(mean.shape[0], len(Z))
                part += mc_log_expected_improvement(g, self.incumbent, self.tau)
            out[rows] = part
        return total + out

    def improvement(self, X: np.ndarray) -> np.ndarray:
        assert self.incumbent is not None
        mean, std = self.models.predict(X, self.outputs)
        g = self.comp.objective(self._samples(mean, std)).reshape(X.shape[0], -1)
        return mc_expected_improvement(g, self.incumbent)

    def feasibility(self, X: np.ndarray) -> float:
        if not self.margin_tau.size:
            return 1.0
        mean, std = self.models.predict(X, self.outputs)
        m = self.comp.margins(self._samples(mean, std)).reshape(X.shape[0], self.Z.shape[0], -1)
        return float(mc_probability_of_feasibility(m)[0])

    def prediction(self, X: np.ndarray) -> Prediction:
        return _composite_prediction(self.models, X, self.Z)


def _composite_prediction(models: _CompositeModels, X: np.ndarray, Z: np.ndarray) -> Prediction:
    """Objective and margins as sample mean and std of the composed goal, plus each output's mean and std."""
    mean, std = models.predict(X)
    Y = mean[:1, None, :] + std[:1, None, :] * Z[None, :, :]
    g = models.composition.objective(Y[0])
    m = models.composition.margins(Y[0])
    outputs = {label: (float(mean[0, k]), float(std[0, k])) for k, label in enumerate(models.composition.labels)}
    return Prediction(float(g.mean()), float(g.std()), tuple(float(v) for v in m.mean(axis=0)),
                      tuple(float(v) for v in m.std(axis=0)), outputs)


def _believe(model: Surrogate, pending: np.ndarray) -> Surrogate:
    if len(pending) and isinstance(model, GaussianProcessSurrogate):
        return model.believer(pending)
    return model


def _feasible_rows(history: History) -> np.ndarray:
    """Designs that succeeded with a finite objective and every observed margin at most 0."""
    feasible = history.usable()
    if history.margins.size:
        feasible &= (np.nan_to_num(history.margins, nan=np.inf) <= 0).all(axis=1)
    return feasible


def _incumbent(history: History, feasible: np.ndarray, objective: Surrogate | Callable[[np.ndarray], np.ndarray],
               rule: str) -> tuple[float, int] | None:
    """The value EI must beat and the row of the design that holds it; None without a feasible design.

    ``best-observed`` is Jones et al.'s (1998) f_min, the best feasible objective run so far.
    ``best-predicted`` is the lowest surrogate mean at a feasible evaluated design: with a noisy
    solver the best observation is often a lucky draw, EI against it is too pessimistic around it,
    and the smoothed value is the better estimate of what that design really gives. ``objective``
    is the objective's surrogate, or (composite mode) a function giving the predicted objective.
    Only designs *observed* feasible count: an infeasible design better than every feasible one
    never becomes the incumbent, whatever its prediction.
    """
    if not feasible.any():
        return None
    rows = np.flatnonzero(feasible)
    if rule == "best-observed":
        values = history.objective[rows]
    else:
        predict = objective.predict if hasattr(objective, "predict") else objective
        values = np.asarray(predict(history.X[rows]))
    best = int(np.argmin(values))
    return float(values[best]), int(rows[best])


# Fitted white-noise variance, as a share of the output's variance, above which the solver counts as
# noisy (a noise std above about 3 % of the output's spread): EI then beats the best *predicted*
# feasible design instead of the best observed one, which may be a lucky draw (Picheny et al. 2013).
_NOISY = 1e-3


def _incumbent_rule(settings: InfillSettings, models: Sequence[Surrogate]) -> str:
    """``settings.incumbent``, or ``best-predicted`` when a GP found significant noise in its output.

    Composite mode only: direct mode keeps the configured rule (``plan.infill.incumbent``), as before.
    """
    noisy = any(isinstance(m, GaussianProcessSurrogate) and m.noise_std_ > math.sqrt(_NOISY) * m.y_std_ for m in models)
    return "best-predicted" if noisy else settings.incumbent


def _believed_best(incumbent: float | None, objective: np.ndarray, margins: np.ndarray) -> float | None:
    """The incumbent once pending designs count as observed at their predictions (Kriging believer).

    Ginsbourger et al. (2010) add the believed values to the data, f_min included: a pending design
    predicted feasible and better than the best run so far lowers the bar, so EI at that very design
    is 0 and the next proposal does not crowd it. ``objective`` and ``margins`` are the predictions
    at the pending designs, shapes (n_pending,) and (n_pending, n_constraints).
    """
    if incumbent is None or objective.size == 0:
        return incumbent
    believed_feasible = (margins <= 0).all(axis=1) if margins.size else np.ones(objective.shape[0], bool)
    if not believed_feasible.any():
        return incumbent
    return float(min(incumbent, float(np.min(objective[believed_feasible]))))


class _DirectAcquisition:
    """Log EI of the objective's surrogate x P(margin <= 0) of each margin's x P(success)."""

    def __init__(self, models: _Models, history: History, settings: InfillSettings) -> None:
        ok = history.usable()
        objective = models.objective
        if (~ok).any() and isinstance(objective, GaussianProcessSurrogate):
            # A failed design has no objective, so the GP stays as uncertain there as if it had never
            # been tried, and EI keeps asking for the region where the solver fails: once the search
            # has converged elsewhere, EI there can exceed EI anywhere else by more than P(success)
            # takes away (seen on Branin with a failing band). Conditioning on a pessimistic value
            # at each failure (the GP's mean plus one std there; penalised imputation, Forrester,
            # Sóbester & Keane 2006) removes that uncertainty without teaching the hyper-parameters
            # made-up values.
            mu, sd = objective.predict(history.X[~ok], return_std=True)
            objective = objective.condition(history.X[~ok], mu + sd)
        self.models = models
        self.objective = _believe(objective, history.pending)
        self.margins = [_believe(m, history.pending) for m in models.margins]
        best = _incumbent(history, _feasible_rows(history), models.objective, settings.incumbent)
        self.best_row = best[1] if best is not None else None
        self.incumbent = best[0] if best is not None else None
        if len(history.pending):
            pending_margins = np.column_stack([m.predict(history.pending) for m in models.margins]) if models.margins \
                else np.zeros((len(history.pending), 0))
            self.incumbent = _believed_best(self.incumbent, np.asarray(models.objective.predict(history.pending)),
                                            pending_margins)

    def log_score(self, X: np.ndarray, std_factor: float) -> np.ndarray:
        # The step's std factor sharpens P(success) as it sharpens EI: otherwise EI ratios grow
        # like exp(z^2 / 2 factor^2) while P(success) stays put, and after convergence a region
        # the model is sure fails outscores every other. P(feasible) keeps the plain std: a
        # constrained optimum lies on a predicted boundary that the search must keep sampling on
        # both sides (sharpening it left sled at 1 % in 5 of 10 seeds instead of 6).
        total = self.models.success.log_predict_proba(X, std_factor=std_factor)
        for m in self.margins:
            mu, sd = m.predict(X, return_std=True)
            total = total + log_probability_of_feasibility(mu, sd)
        if self.incumbent is not None:
            mu, sd = self.objective.predict(X, return_std=True)
            total = total + log_expected_improvement(mu, std_factor * sd, self.incumbent)
        return total

    def improvement(self, X: np.ndarray) -> np.ndarray:
        assert self.incumbent is not None
        return expected_improvement(*self.objective.predict(X, return_std=True), self.incumbent)

    def feasibility(self, X: np.ndarray) -> float:
        return float(np.prod([probability_of_feasibility(*m.predict(X, return_std=True))[0] for m in self.margins]))

    def prediction(self, X: np.ndarray) -> Prediction:
        mu, sd = self.models.objective.predict(X, return_std=True)
        pairs = [m.predict(X, return_std=True) for m in self.models.margins]
        return Prediction(float(mu[0]), float(sd[0]), tuple(float(a[0]) for a, _ in pairs), tuple(float(b[0]) for _, b in pairs))


def propose_infill(history: History, settings: InfillSettings, *, seed: int,
                   warm: Mapping[str, Any] | None = None) -> InfillProposal | None:
    """The next design by constrained, failure-aware expected improvement; None if it cannot be fitted yet.

    With ``history.composite`` each output (a quantity at a condition) has its own GP and the goal
    is composed from their samples (:class:`_CompositeAcquisition`); otherwise the objective and
    each margin are modelled directly (:class:`_DirectAcquisition`). The steps are the same.

    Which step of ``settings.cycle`` is taken follows the number of designs finished and pending,
    so a campaign resumed from its ledger takes the same steps. A local step, or any step right
    after the newest finished design became the best (with ``refine_improvements``), searches the
    box of half-width ``local_radius`` around the best design; if nothing in that box is far
    enough from the designs already run, or the box is exhausted (plain EI there below a
    millionth of the objective's scale), the step is taken globally instead. Failed designs enter
    the objective GP at a pessimistic imputed value, so EI does not keep asking for them.

    BLAS is limited to one thread while fitting: on small machines the solver cases and the
    orchestrator share the cores, and multi-threaded BLAS on n < 1000 matrices only adds contention.
    """
    with threadpool_limits(limits=1, user_api="blas"):
        acq: _DirectAcquisition | _CompositeAcquisition
        if history.composite:
            composite = fit_composite(history, settings, seed, warm, for_infill=True)
            if composite is None:
                return None
            acq = _CompositeAcquisition(composite, history, settings)
            scores, chosen, kernels = composite.scores, composite.chosen, composite.kernels
        else:
            models = fit_models(history, settings, seed, warm, for_infill=True)
            if models is None:
                return None
            acq = _DirectAcquisition(models, history, settings)
            scores, chosen, kernels = models.scores, models.chosen, models.kernels
        ok = history.usable()
        incumbent = acq.incumbent
        step = settings.cycle[(len(history.X) + len(history.pending)) % len(settings.cycle)]
        if settings.refine_improvements and acq.best_row is not None and acq.best_row == len(history.X) - 1:
            step = next((s for s in settings.cycle if s.local), Step(0.05, local=True))
        # A local step trusts the model near the best design. With fewer designs than the smallest
        # sensible initial experiment (2d + 1) it has nothing local to trust: the first proposals of
        # a four-slot campaign are made after three designs, and local steps there crawled along an
        # edge of Branin's space instead of finding its valleys.
        if step.local and (acq.best_row is None or ok.sum() < 2 * history.n_dims + 1):
            step = next((s for s in settings.cycle if not s.local), Step())

        def log_score(X: np.ndarray) -> np.ndarray:
            return acq.log_score(X, step.std)

        exclude = np.vstack([history.X, history.pending]) if len(history.pending) else history.X
        search = {"seed": seed, "n_candidates": settings.candidates, "n_starts": settings.restarts, "exclude": exclude,
                  "min_distance": settings.min_distance}
        local = step.local
        found = None
        scale = max(abs(incumbent), float(np.ptp(history.objective[ok])), 1e-12) if incumbent is not None else 1.0
        if local:
            assert acq.best_row is not None and incumbent is not None
            centre = history.X[acq.best_row]
            lower = np.clip(centre - settings.local_radius, 0.0, 1.0)
            upper = np.clip(centre + settings.local_radius, 0.0, 1.0)
            try:
                found = maximize(log_score, history.n_dims, lower=lower, upper=upper, **search)
            except ValueError:  # the box is full of designs already
                found = None
            # Once the best design is polished, the box has nothing left to give (plain EI below a
            # millionth of the objective's scale, under any solver's repeatability), and local steps
            # only sampled its edge: on Branin every other design after convergence was wasted so.
            if found is not None:
                gain = acq.improvement(found.x[None, :])[0]
                found = found if gain >= _EXHAUSTED * scale else None
            if found is None:
                local, step = False, next((s for s in settings.cycle if not s.local), Step())
        if found is None:
            found = maximize(log_score, history.n_dims, **search)
        x = found.x[None, :]
        ei = float(acq.improvement(x)[0]) if incumbent is not None else 0.0
        pf = acq.feasibility(x)
        ps = float(acq.models.success.predict_proba(x)[0])
        prediction = acq.prediction(x)
    converged = settings.stop_below is not None and incumbent is not None and ei < settings.stop_below * scale
    return InfillProposal(found.x, ei, pf, ps, incumbent, prediction, scores, chosen, converged, kernels, local)


def optimize_surface(history: History, settings: InfillSettings, *, seed: int, n_starts: int = 16,
                     avoid: np.ndarray | None = None, confidence: float = 0.5) -> InfillProposal | None:
    """Minimise the predicted objective subject to predicted margins ≤ 0 (SLSQP): the classic one-shot
    optimum, and the point a confirmation stage runs.

    Multi-start from scrambled Sobol' points and from the best feasible designs already run (so
    the optimum is never worse on the surface than what the campaign has seen), bounds of the
    unit cube; the best feasible local optimum wins (the least-violating one if none is
    feasible). ``confidence`` above 0.5 asks each constraint to hold with that probability under
    the surrogate (mean + z·std ≤ 0, z the normal quantile), so a confirmation run is not a coin
    toss on a constraint boundary; models without a standard deviation use their mean. Points
    within ``settings.min_distance`` of ``avoid`` (earlier confirmations) are skipped.
    """
    z = float(norm.ppf(confidence)) if confidence > 0.5 else 0.0
    if history.composite:
        return _optimize_composite(history, settings, seed=seed, n_starts=n_starts, avoid=avoid, z=z)
    with threadpool_limits(limits=1, user_api="blas"):
        models = fit_models(history, settings, seed)
        if models is None:
            return None
        d = history.n_dims

        def f(x: np.ndarray) -> float:
            return float(models.objective.predict(x[None, :])[0])

        def upper(m: Surrogate, x: np.ndarray) -> float:
            if z == 0.0:
                return float(m.predict(x[None, :])[0])
            mu, sd = m.predict(x[None, :], return_std=True)
            return float(mu[0] + (z * float(sd[0]) if np.isfinite(sd[0]) else 0.0))

        constraints = [{"type": "ineq", "fun": (lambda x, m=m: -upper(m, x))} for m in models.margins]
        starts = qmc.Sobol(d, rng=seed).random(n_starts)
        ok = history.succeeded & np.isfinite(history.objective)
        if history.margins.shape[1]:
            ok &= np.all(np.nan_to_num(history.margins, nan=1.0) <= 0, axis=1)
        if ok.any():
            order = np.argsort(history.objective[ok])[:4]
            starts = np.vstack([history.X[ok][order], starts])
        best: tuple[float, float, np.ndarray] | None = None
        for x0 in starts:
            res = minimize(f, x0, method="SLSQP", bounds=[(0.0, 1.0)] * d, constraints=constraints,
                           options={"maxiter": 200})
            x = np.clip(res.x, 0.0, 1.0)
            if avoid is not None and len(avoid) and np.min(np.linalg.norm(avoid - x, axis=1)) < settings.min_distance:
                continue  # already confirmed: the next-best local optimum is wanted (a later confirmation)
            violation = max([upper(m, x) for m in models.margins] + [0.0])
            key = (violation, f(x))
            if best is None or key < best[:2]:
                best = (*key, x)
        if best is None:
            return None
        x = best[2][None, :]
        mu, sd = models.objective.predict(x, return_std=True)
        means, stds = zip(*[(float(a[0]), float(b[0])) for a, b in (m.predict(x, return_std=True) for m in models.margins)],
                          strict=True) if models.margins else ((), ())
        pf = float(np.prod([probability_of_feasibility(mm, ss) for mm, ss in zip(means, stds, strict=True)])) if means else 1.0
    return InfillProposal(best[2], 0.0, pf, 1.0, None, Prediction(float(mu[0]), float(sd[0]), tuple(means), tuple(stds)),
                          models.scores, models.chosen)


def _optimize_composite(history: History, settings: InfillSettings, *, seed: int, n_starts: int,
                        avoid: np.ndarray | None, z: float) -> InfillProposal | None:
    """:func:`optimize_surface` on the composed goal: minimise the goal of the outputs' predicted means.

    The objective is the goal evaluated at each output's predicted mean (the plug-in optimum, which
    puts a target such as ``abs(p - 2)`` exactly on the predicted crossing); each constraint must hold
    at its sample mean plus ``z`` sample stds under the outputs' joint posterior (fixed base samples,
    so the constraint is a smooth function for SLSQP).
    """
    assert history.composition is not None
    comp = history.composition
    with threadpool_limits(limits=1, user_api="blas"):
        models = fit_composite(history, settings, seed)
        if models is None:
            return None
        Z = normal_base_samples(len(comp.outputs), 64, settings.mc_seed)
        d = history.n_dims
        step = math.sqrt(np.finfo(float).eps)
        memo: dict[bytes, tuple[float, np.ndarray, np.ndarray, np.ndarray]] = {}

        def evaluate(x: np.ndarray) -> tuple[float, np.ndarray, np.ndarray, np.ndarray]:
            """Objective, margins' upper values and both forward-difference gradients, from one prediction
            on x and its d shifted copies (SLSQP asks for values and gradients at the same points)."""
            key = x.tobytes()
            if key not in memo:
                signs = np.where(x + step <= 1.0, 1.0, -1.0)
                stencil = np.vstack([x, x + np.eye(d) * step * signs[:, None]])
                mean, std = models.predict(stencil)
                objective = comp.objective(mean)
                if z == 0.0:
                    margins = comp.margins(mean)
                else:
                    m = comp.margins((mean[:, None, :] + std[:, None, :] * Z[None]).reshape(-1, mean.shape[1]))
                    m = m.reshape(len(stencil), len(Z), -1)
                    margins = m.mean(axis=1) + z * m.std(axis=1)
                memo.clear()
                memo[key] = (float(objective[0]), margins[0], (objective[1:] - objective[0]) / (step * signs),
                             (margins[1:] - margins[0]) / (step * signs)[:, None])
            return memo[key]

        def f(x: np.ndarray) -> float:
            return evaluate(np.clip(x, 0.0, 1.0))[0]

        def upper(x: np.ndarray) -> np.ndarray:
            return evaluate(np.clip(x, 0.0, 1.0))[1]

        constraints = [{"type": "ineq", "fun": (lambda x: -upper(x)),
                        "jac": (lambda x: -evaluate(np.clip(x, 0.0, 1.0))[3].T)}] if comp.goal.constraints else []
        starts = qmc.Sobol(d, rng=seed).random(n_starts)
        feasible = _feasible_rows(history)
        if feasible.any():
            order = np.argsort(history.objective[feasible])[:4]
            starts = np.vstack([history.X[feasible][order], starts])
        best: tuple[float, float, np.ndarray] | None = None
        for x0 in starts:
            res = minimize(f, x0, jac=lambda x: evaluate(np.clip(x, 0.0, 1.0))[2], method="SLSQP", bounds=[(0.0, 1.0)] * d,
                           constraints=constraints, options={"maxiter": 200})
            x = np.clip(res.x, 0.0, 1.0)
            if avoid is not None and len(avoid) and np.min(np.linalg.norm(avoid - x, axis=1)) < settings.min_distance:
                continue
            violation = max([*upper(x), 0.0]) if constraints else 0.0
            key = (violation, f(x))
            if best is None or key < best[:2]:
                best = (*key, x)
        if best is None:
            return None
        x = best[2][None, :]
        prediction = _composite_prediction(models, x, normal_base_samples(len(comp.outputs), settings.mc_samples,
                                                                          settings.mc_seed))
        mean, std = models.predict(x)
        m = comp.margins(mean + std * normal_base_samples(len(comp.outputs), settings.mc_samples, settings.mc_seed))
        pf = float(np.mean(np.all(m <= 0, axis=1))) if m.shape[1] else 1.0
    return InfillProposal(best[2], 0.0, pf, 1.0, None, prediction, models.scores, models.chosen)
