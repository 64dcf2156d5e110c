"""What a campaign has done so far, computed from its ledger alone (safe while it runs).

``summary`` feeds ``sortie status`` and the live progress display; ``design_table`` feeds
``sortie export``. Every number here is a count or a copy of ledger rows, so it can be traced.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

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
        "models": ledger.model_choices(),
        "screening": _latest(ledger.analyses("screening")),
        "confirmations": [a["data"] for a in ledger.analyses("confirmation")],
        **_attempt_summary(ledger),
    }


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
