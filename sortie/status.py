"""What a campaign has done so far, computed from its ledger alone (safe while it runs).

``summary`` feeds ``sortie status`` and the live progress display; ``design_table`` feeds
``sortie export``. Every number here is a count or a copy of ledger rows, so it can be traced.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import TYPE_CHECKING, Any

import numpy as np

from sortie.config import CampaignConfig
from sortie.ledger import DESIGN_STATES, DesignRow, Ledger
from sortie.runstate import campaign_state

if TYPE_CHECKING:  # pandas costs a quarter of a second to import; `sortie status` does not need it
    import pandas as pd


def best_design(designs: list[DesignRow], sense: str) -> DesignRow | None:
    """Best feasible design; if none is feasible, the one that violates its constraints least."""
    scored = [d for d in designs if d.status == "done" and d.objective is not None]
    feasible = [d for d in scored if d.feasible]
    if feasible:
        key = (lambda d: d.objective) if sense == "minimize" else (lambda d: -d.objective)  # type: ignore[operator]
        return min(feasible, key=key)
    if scored:
        return min(scored, key=lambda d: max((d.constraints or {}).values(), default=0.0))
    return None


def summary(ledger: Ledger, config: CampaignConfig) -> dict[str, Any]:
    """The campaign's state, counts of designs and cases by state, the budget, and the best design so far.

    Every figure is an aggregate query on indexed columns (or a short list: the cases in flight,
    the analyses, the run records), so the cost of a summary does not grow with the number of cases.
    """
    designs = {**dict.fromkeys(DESIGN_STATES, 0), **ledger.tally("designs", "status")}
    cases = ledger.count_cases()
    best = ledger.best_design(config.goal.sense)
    plan_done = sum(designs.values()) >= config.target_designs() and not designs["pending"]
    return {
        "campaign": config.campaign.name,
        "state": campaign_state(ledger.path.parent, ledger, plan_done=plan_done),
        "budget_designs": config.budget.designs,
        "budget_cases": config.budget.cases,
        "designs_planned": config.target_designs(),
        "n_conditions": len(config.condition_list()),
        "designs_total": sum(designs.values()),
        "designs_done": designs["done"],
        "designs_failed": designs["failed"],
        "designs_pending": designs["pending"],
        "cases_total": sum(cases.values()),
        "cases_done": cases["done"],
        "cases_failed": cases["failed"],
        "cases_running": cases["submitting"] + cases["running"],
        "cases_planned": cases["planned"],
        "failures_by_class": ledger.tally("cases", "failure_class", where="state = 'failed' AND failure_class IS NOT NULL"
                                          " AND failure_class != ''"),
        "goal": {"sense": config.goal.sense, "objective": config.goal.objective().source,
                 "constraints": list(config.goal.subject_to)},
        "best": None if best is None else {
            "design": best.id, "stage": best.stage, "objective": best.objective, "feasible": best.feasible,
            "values": best.values, "constraints": best.constraints, "prediction": best.prediction,
        },
        "baseline": _baseline(ledger.first_design("baseline")),
        "stages": ledger.tally("designs", "stage"),
        "models": {target: {**choice, "rule": choice_rule(target)} for target, choice in ledger.model_choices().items()},
        "screening": _latest(ledger.analyses("screening")),
        "confirmations": [a["data"] for a in ledger.analyses("confirmation")],
        **_attempt_summary(ledger),
    }


def ledger_output_checks(ledger: Ledger, config: CampaignConfig) -> list[dict[str, Any]]:
    """:func:`output_checks` read from the ledger, for a one-off ``sortie status``: the case rows are
    streamed, not held. Never part of :func:`summary`, which the live watcher recomputes per event."""
    return output_checks(list(ledger.iter_designs()), ledger.iter_cases(states=("done",)), config, ledger.model_choices())


def output_checks(designs: list[DesignRow], cases: Iterable[Any], config: CampaignConfig,
                  models: dict[str, dict[str, Any]] | None = None) -> list[dict[str, Any]]:
    """Predicted against actual for each quantity at each condition, over the designs proposed in composite mode.

    One row per output: how many proposed designs returned it, the mean of the predicted std, the
    root-mean-square error of the prediction and the share of designs within two predicted stds
    (about 95 % when the models are calibrated; far fewer means they are over-confident); the
    noise std its GP estimated (from ``models``, the ledger's latest model choices) beside the
    pooled std of designs run more than once with the same values (None without repeats).
    """
    conditions = config.condition_list()
    actual: dict[tuple[int, str], float] = {}
    for c in cases:
        if c.state == "done" and c.quantities:
            label = ",".join(f"{k}={v:g}" for k, v in conditions[c.condition_index].items())
            for q, value in c.quantities.items():
                actual[(c.design_id, f"{q}[{label}]")] = value
    seen: dict[str, list[tuple[float, float, float]]] = {}
    for d in designs:
        for label, pred in ((d.prediction or {}).get("outputs") or {}).items():
            if (d.id, label) in actual and pred.get("mean") is not None and pred.get("std") is not None:
                seen.setdefault(label, []).append((pred["mean"], pred["std"], actual[(d.id, label)]))
    repeats: dict[str, list[int]] = {}
    for d in designs:
        repeats.setdefault(repr(sorted(d.values.items())), []).append(d.id)
    rows = []
    for label, triples in seen.items():
        err = np.array([a - m for m, _, a in triples])
        std = np.array([sd for _, sd, _ in triples])
        groups = [[actual[(i, label)] for i in ids if (i, label) in actual] for ids in repeats.values()]
        groups = [g for g in groups if len(g) > 1]
        dof = sum(len(g) - 1 for g in groups)
        spread = float(np.sqrt(sum(float(np.sum((np.array(g) - np.mean(g)) ** 2)) for g in groups) / dof)) if dof else None
        gp = next((sc for sc in ((models or {}).get(label) or {}).get("scores", []) if sc.get("name") == "gp"), {})
        rows.append({"output": label, "designs": len(triples), "mean_predicted_std": float(std.mean()),
                     "rms_error": float(np.sqrt(np.mean(err**2))),
                     "within_2_std": float(np.mean(np.abs(err) <= 2 * std)),
                     "noise_std": gp.get("noise_std"), "repeat_spread": spread})
    return rows


def _latest(analyses: list[dict[str, Any]]) -> dict[str, Any] | None:
    return analyses[-1]["data"] if analyses else None


def _attempt_summary(ledger: Ledger) -> dict[str, Any]:
    """Attempts and how they ended: retries, restarts, failure classes with sample reasons, live jobs."""
    stats = ledger.attempt_stats()
    ended = ledger.tally("attempts", "state")
    return {
        "mean_case_s": stats["mean_case_s"],
        "solver_hours": stats["solver_s"] / 3600.0,
        "attempts_total": stats["attempts_total"],
        "attempts_by_end": ended,
        "retries": stats["retries"],
        "restarts": ended.get("lost", 0) + ended.get("interrupted", 0),
        "attempt_failures": stats["attempt_failures"],
        "running": [{"case": c.name, "job_id": c.job_id, "state": c.state, "since": c.started_at}
                    for c in ledger.iter_cases(states=("submitting", "running"))],
    }


def _baseline(base: DesignRow | None) -> dict[str, Any] | None:
    if base is None:
        return None
    return {"design": base.id, "objective": base.objective, "feasible": base.feasible, "status": base.status}


def design_table(ledger: Ledger, config: CampaignConfig) -> pd.DataFrame:
    """One row per design: id, stage, parameters, objective, constraint margins, feasible, status."""
    import pandas as pd

    rows = []
    for d in ledger.iter_designs():  # one row object at a time; only the table's cells are kept
        row: dict[str, Any] = {"id": d.id, "stage": d.stage}
        row.update({name: d.values.get(name) for name in config.parameters})
        row["objective"] = d.objective
        for source in config.goal.subject_to:
            row[source] = (d.constraints or {}).get(source)
        row["feasible"] = d.feasible
        row["status"] = d.status
        rows.append(row)
    columns = ["id", "stage", *config.parameters, "objective", *config.goal.subject_to, "feasible", "status"]
    return pd.DataFrame(rows, columns=columns)


def choice_rule(target: str) -> str:
    """How sortie picks the model of ``target`` (as recorded in the ledger), in words for reports and status.

    The objective's rule is not the leave-one-out ranking during infill (see :func:`sortie.infill.fit_models`), and
    the reports must not say it is. A composite output's label (``lift[mach=0.6]``) has no comparison
    operator, a constraint's source always has one.
    """
    if target == "objective":
        return ("a GP during infill whatever the leave-one-out ranking (EI needs a std that vanishes at the designs "
                "run); the lowest leave-one-out error among models with a std for the confirmation and classic surfaces")
    if not any(op in target for op in ("<", ">")):
        return ("a GP for each quantity at each condition during composite infill; the lowest leave-one-out error "
                "among models with a std for the confirmation and classic surfaces")
    return "the lowest leave-one-out error among models with a std"
