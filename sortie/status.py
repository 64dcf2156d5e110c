"""What a campaign has done so far, computed from its ledger alone (safe while it runs).

``summary`` feeds ``sortie status`` and the live progress display; ``design_table`` feeds
``sortie export``. Every number here is a count or a copy of ledger rows, so it can be traced.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from sortie.config import CampaignConfig
from sortie.ledger import DesignRow, Ledger


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
    """Counts of designs and cases by state, the budget, and the best design so far."""
    designs = ledger.designs()
    cases = ledger.cases()
    best = best_design(designs, config.goal.sense)
    by_class: dict[str, int] = {}
    for c in cases:
        if c.state == "failed" and c.failure_class:
            by_class[c.failure_class] = by_class.get(c.failure_class, 0) + 1
    return {
        "campaign": config.campaign.name,
        "budget_designs": config.budget.designs,
        "budget_cases": config.budget.cases,
        "designs_planned": config.target_designs(),
        "n_conditions": len(config.condition_list()),
        "designs_total": len(designs),
        "designs_done": sum(d.status == "done" for d in designs),
        "designs_failed": sum(d.status == "failed" for d in designs),
        "designs_pending": sum(d.status == "pending" for d in designs),
        "cases_total": len(cases),
        "cases_done": sum(c.state == "done" for c in cases),
        "cases_failed": sum(c.state == "failed" for c in cases),
        "cases_running": sum(c.state in ("submitting", "running") for c in cases),
        "cases_planned": sum(c.state == "planned" for c in cases),
        "failures_by_class": by_class,
        "goal": {"sense": config.goal.sense, "objective": config.goal.objective().source,
                 "constraints": list(config.goal.subject_to)},
        "best": None if best is None else {
            "design": best.id, "stage": best.stage, "objective": best.objective, "feasible": best.feasible,
            "values": best.values, "constraints": best.constraints, "prediction": best.prediction,
        },
        "baseline": _baseline(designs),
        "stages": {stage: sum(d.stage == stage for d in designs) for stage in dict.fromkeys(d.stage for d in designs)},
        "models": {target: {**choice, "rule": choice_rule(target)} for target, choice in ledger.model_choices().items()},
        "screening": _latest(ledger.analyses("screening")),
        "confirmations": [a["data"] for a in ledger.analyses("confirmation")],
        "outputs_checked": output_checks(designs, cases, config, ledger.model_choices()),
        **_attempt_summary(ledger),
    }


def output_checks(designs: list[DesignRow], cases: list[Any], config: CampaignConfig,
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
    attempts = ledger.attempts()
    last = {}
    for a in attempts:
        last[a["case_id"]] = max(last.get(a["case_id"], 0), a["number"])
    failed: dict[str, dict[str, Any]] = {}
    for a in attempts:
        if a["state"] == "failed" and a["failure_class"]:
            entry = failed.setdefault(a["failure_class"], {"attempts": 0, "reasons": []})
            entry["attempts"] += 1
            if a["reason"] and a["reason"] not in entry["reasons"] and len(entry["reasons"]) < 3:
                entry["reasons"].append(a["reason"])
    ended: dict[str, int] = {}
    for a in attempts:
        ended[a["state"]] = ended.get(a["state"], 0) + 1
    took = [a["ended_at"] - a["started_at"] for a in attempts if a["state"] == "done" and a["ended_at"]]
    return {
        "mean_case_s": sum(took) / len(took) if took else None,
        "solver_hours": sum(a["ended_at"] - a["started_at"] for a in attempts if a["ended_at"]) / 3600.0,
        "attempts_total": len(attempts),
        "attempts_by_end": ended,
        "retries": sum(a["state"] == "failed" and a["number"] < last[a["case_id"]] for a in attempts),
        "restarts": sum(a["state"] in ("lost", "interrupted") for a in attempts),
        "attempt_failures": failed,
        "running": [{"case": c.name, "job_id": c.job_id, "state": c.state, "since": c.started_at}
                    for c in ledger.cases(states=("submitting", "running"))],
    }


def _baseline(designs: list[DesignRow]) -> dict[str, Any] | None:
    base = next((d for d in designs if d.stage == "baseline"), None)
    if base is None:
        return None
    return {"design": base.id, "objective": base.objective, "feasible": base.feasible, "status": base.status}


def design_table(ledger: Ledger, config: CampaignConfig) -> pd.DataFrame:
    """One row per design: id, stage, parameters, objective, constraint margins, feasible, status."""
    rows = []
    for d in ledger.designs():
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
