"""What changed between a campaign's recorded config and the one a user runs it with now.

A campaign's designs, cases and scores only mean something under the parameters, conditions,
quantities and goal they were made with, so changes there are refused. Settings about how the
work is carried out (slots, timeouts, retries, resources, surrogate knobs, the screening selection rule), how much of
it (a budget raised, or lowered to no less than what is already recorded), and stages added at
the end (infill, confirmation) are accepted and logged.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sortie.config import CampaignConfig

# Dotted-key prefixes whose change would make the recorded designs mean something else.
BREAKING = ("parameters", "conditions", "quantities", "goal", "plan.initial", "plan.screening.method",
            "plan.screening.trajectories", "plan.screening.levels", "campaign.seed",
            "solver.adapter", "solver.template", "solver.command", "solver.function", "solver.render")


@dataclass(frozen=True)
class Change:
    key: str
    old: Any
    new: Any

    def __str__(self) -> str:
        return f"{self.key} {_show(self.old)} -> {_show(self.new)}"


def compare(old: CampaignConfig, new: CampaignConfig) -> list[Change]:
    """Every key whose value differs (defaults filled in), in a stable order; a plan stage that
    appears or disappears is one change ``plan.<stage> absent -> present``, not one per key."""
    a, b = _flatten(old.model_dump(mode="json")), _flatten(new.model_dump(mode="json"))
    found = []
    for stage in type(old.plan).model_fields:
        had, has = getattr(old.plan, stage) is not None, getattr(new.plan, stage) is not None
        if had != has:
            found.append(Change(f"plan.{stage}", "present" if had else "absent", "present" if has else "absent"))
            for flat in (a, b):
                for key in [k for k in flat if k == f"plan.{stage}" or k.startswith(f"plan.{stage}.")]:
                    del flat[key]
    found += [Change(k, a.get(k), b.get(k)) for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)]
    return sorted(found, key=lambda c: c.key)


def breaking(changes: list[Change]) -> list[Change]:
    """The changes a running campaign cannot take."""
    return [c for c in changes if any(c.key == p or c.key.startswith(p + ".") for p in BREAKING)
            or (c.key.count(".") == 1 and c.key.startswith("plan.") and c.old == "present")  # a stage removed
            or c.key in ("plan.screening", "plan.classic")]  # added before stages that have run


def budget_problems(new: CampaignConfig, n_designs: int) -> list[str]:
    """A budget lowered below what the campaign has already recorded cannot be honoured."""
    target = new.target_designs()
    if target < n_designs:
        return [f"the new budget allows {target} designs but the campaign has already recorded {n_designs}; "
                f"allowed: a budget of at least {n_designs} designs"]
    return []


def _flatten(value: Any, prefix: str = "") -> dict[str, Any]:
    if isinstance(value, dict):
        if not value and prefix:
            return {prefix: value}
        out: dict[str, Any] = {}
        for k, v in value.items():
            out.update(_flatten(v, f"{prefix}.{k}" if prefix else str(k)))
        return out
    return {prefix: value}


def _show(v: Any) -> str:
    return "(unset)" if v is None else repr(v) if isinstance(v, str) else str(v)
