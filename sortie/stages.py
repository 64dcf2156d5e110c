"""What a stage concludes from the designs it ran: screening effects and selection, confirmation checks.

These are pure functions from ledger rows to JSON-ready documents, which the campaign flow
records with :meth:`sortie.ledger.Ledger.add_analysis` and reports, status and the notebook API
read back. The numbers come from :mod:`sortie.screening`; this module only decides which
outputs are screened and what is recorded.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from sortie.screening import morris_effects, select_parameters, sweep_effects
from sortie.sensitivity import surrogate_screening, surrogate_sobol_indices
from sortie.space import DesignSpace

if TYPE_CHECKING:
    from sortie.config import ScreeningSpec, SelectSpec
    from sortie.goal import Goal
    from sortie.ledger import DesignRow


def goal_outputs(designs: Sequence[DesignRow], goal: Goal) -> tuple[list[str], np.ndarray]:
    """The screened outputs per design: the objective and each constraint margin (NaN where a design failed).

    Screening on the goal's own values (each already taken across the conditions) selects what
    moves the decision, including a parameter that only moves a constraint.
    """
    names = ["objective", *[c.source for c in goal.constraints]]
    rows = []
    for d in designs:
        if d.status != "done" or d.objective is None:
            rows.append([np.nan] * len(names))
        else:
            rows.append([d.objective, *[(d.constraints or {}).get(c.source, np.nan) for c in goal.constraints]])
    return names, np.array(rows, dtype=float).reshape(len(designs), len(names))


def screen(spec: ScreeningSpec, space: DesignSpace, designs: Sequence[DesignRow], goal: Goal, *,
           seed: int = 0) -> dict[str, Any]:
    """Effects of every free parameter on the goal from the screening designs, and the selection.

    Morris effects are computed on the planned grid points recorded as each design's ``unit``;
    one-at-a-time effects on the baseline (design 1) and the sweep; surrogate indices on the
    baseline and the Sobol' points, through Gaussian processes seeded by ``seed``.
    """
    names = [p.name for p in space.free]
    screening = [d for d in designs if d.stage == "screening"]
    if spec.method == "morris":
        outputs, y = goal_outputs(screening, goal)
        result = morris_effects(np.array([d.unit for d in screening], dtype=float), y, names=names, output_names=outputs)
        data: dict[str, Any] = {"method": "morris", "parameters": names, "outputs": outputs, "mu": result.mu,
                                "mu_star": result.mu_star, "sigma": result.sigma, "n_effects": result.n_effects,
                                "n_trajectories": result.n_trajectories, "importance": "mu_star"}
        importance = result.mu_star
    elif spec.method == "surrogate":
        rows = [designs[0], *screening]  # the baseline is a run like any other for the processes
        outputs, y = goal_outputs(rows, goal)
        found = surrogate_screening(np.array([d.unit for d in rows], dtype=float), y, names=names,
                                    output_names=outputs, seed=seed)
        ix = found.indices
        data = {"method": "surrogate", "parameters": names, "outputs": outputs, "root_total": found.importance,
                "first_order": ix.first_order, "total_order": ix.total_order, "total_order_low": ix.total_order_low,
                "total_order_high": ix.total_order_high, "confidence_level": ix.confidence_level,
                "loo_r2": found.loo_r2, "n_points": found.n_points, "importance": "root_total"}
        importance = found.importance
    else:
        rows = [designs[0], *screening]  # the baseline is the centre of every sweep
        outputs, y = goal_outputs(rows, goal)
        sweep = sweep_effects(np.array([d.unit for d in rows], dtype=float), y, names=names, output_names=outputs)
        data = {"method": "one-at-a-time", "parameters": names, "outputs": outputs, "span": sweep.span,
                "slope": sweep.slope, "n_points": sweep.n_points, "importance": "span"}
        importance = sweep.span
    data["n_designs"] = len(screening)
    data["n_failed"] = sum(d.status != "done" for d in screening)
    return reselect(data, spec.select, importance=importance)


# Below this leave-one-out R^2 a surrogate screen's process has not resolved its output.
MIN_SCREEN_R2 = 0.5


def screening_warnings(data: dict[str, Any]) -> list[str]:
    """Sentences about a screening result the user should read before trusting its selection."""
    notes = []
    if data.get("loo_r2") is None:
        return notes  # a method read from the runs themselves, not from a model
    for name, r2 in zip(data["outputs"], np.asarray(data["loo_r2"], dtype=float), strict=True):
        if not np.isfinite(r2) or r2 < MIN_SCREEN_R2:
            shown = "no" if not np.isfinite(r2) else f"only {max(r2, 0.0):.0%} of its"
            notes.append(f"the screening surrogate of {name!r} explains {shown} leave-one-out variance (wanted at least "
                         f"{MIN_SCREEN_R2:.0%}); a weak parameter may have been fixed: check the reasons, or name the "
                         f"parameters with plan.screening.select.keep and resume")
    return notes


# What each method's importance is, as the selection's reasons name it.
MEASURES = {"morris": "μ*", "one-at-a-time": "sweep range", "surrogate": "√(total Sobol' index)"}


def reselect(data: dict[str, Any], select: SelectSpec, *, importance: Any = None) -> dict[str, Any]:
    """Apply a selection rule to recorded screening effects; returns a new document."""
    values = np.asarray(data[data["importance"]] if importance is None else importance, dtype=float)
    measure = MEASURES.get(data["method"], "importance")
    chosen = select_parameters(values, data["parameters"], top=select.top, fraction=select.fraction,
                               keep=select.keep, output_names=data["outputs"], measure=measure)
    return {**data, "selected": list(chosen.selected), "fixed": list(chosen.fixed), "reasons": dict(chosen.reasons),
            "score": chosen.scores, "rule": chosen.rule, "select": select.model_dump()}


def surrogate_indices(objective: Any, margins: Sequence[Any], goal: Goal, names: Sequence[str], *, n_points: int,
                      seed: int) -> dict[str, Any]:
    """Sobol' first-order and total indices of the fitted goal surrogates, with bootstrap intervals.

    A second opinion beside screening, computed on the surrogates rather than the solver (so it
    costs no runs and is only as good as the models' leave-one-out error says).
    """
    models = {"objective": objective, **{c.source: m for c, m in zip(goal.constraints, margins, strict=True)}}
    result = surrogate_sobol_indices(models, len(names), n_base=1024, seed=seed, n_resamples=200, names=list(names))
    return {"parameters": list(result.names), "outputs": list(result.output_names), "first_order": result.first_order,
            "total_order": result.total_order, "first_order_low": result.first_order_low,
            "first_order_high": result.first_order_high, "total_order_low": result.total_order_low,
            "total_order_high": result.total_order_high, "confidence_level": result.confidence_level,
            "n_points": n_points}


def confirmation_check(design: DesignRow, goal: Goal, actual_outputs: dict[str, float | None] | None = None) -> dict[str, Any]:
    """Predicted against actual for a confirmation design: objective, every constraint margin, and (composite
    mode) every quantity at every condition the goal reads.

    A confirmation passes when the real run succeeded and is feasible; the prediction's
    standard deviations are kept beside each number so a reviewer sees how sure the surrogate was.
    ``actual_outputs`` maps ``quantity[condition]`` labels to what the solver returned (None where the
    case failed); the per-output rows appear when the prediction has them.
    """
    pred = design.prediction or {}
    sources = [c.source for c in goal.constraints]
    margins_mean = pred.get("margins_mean") or [None] * len(sources)
    margins_std = pred.get("margins_std") or [None] * len(sources)
    constraints = [{"constraint": s, "predicted": margins_mean[i], "predicted_std": margins_std[i],
                    "actual": (design.constraints or {}).get(s)} for i, s in enumerate(sources)]
    passed = design.status == "done" and bool(design.feasible)
    if design.status != "done":
        verdict = "failed: the solver did not finish every case of this design"
    elif not design.feasible:
        broken = [c["constraint"] for c in constraints if c["actual"] is not None and c["actual"] > 0]
        verdict = f"failed: the real run violates {', '.join(broken)}"
    else:
        verdict = "passed: the real run is feasible"
    outputs = [{"output": label, "predicted": p.get("mean"), "predicted_std": p.get("std"),
                "actual": (actual_outputs or {}).get(label)} for label, p in (pred.get("outputs") or {}).items()]
    return {"design": design.id, "passed": passed, "verdict": verdict,
            "objective": {"predicted": pred.get("objective_mean"), "predicted_std": pred.get("objective_std"),
                          "actual": design.objective},
            "constraints": constraints, "outputs": outputs}
