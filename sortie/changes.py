"""What changed between a campaign's recorded config and the one a user runs it with now.

A campaign's designs, cases and scores only mean something under the parameters, conditions,
quantities and goal they were made with, so changes there are refused. Settings about how the
work is carried out (slots, timeouts, retries, resources, surrogate knobs) or how much of it
(a budget raised, or lowered to no less than what is already recorded) are accepted and logged.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sortie.config import CampaignConfig

# Dotted-key prefixes whose change would make the recorded designs mean something else.
BREAKING = ("parameters", "conditions", "quantities", "goal", "plan.initial", "campaign.seed",
            "solver.adapter", "solver.template", "solver.command", "solver.function", "solver.render")


@dataclass(frozen=True)
class Change:
    key: str
    old: Any
    new: Any

    def __str__(self) -> str:
        return f"{self.key} {_show(self.old)} -> {_show(self.new)}"


def compare(old: CampaignConfig, new: CampaignConfig) -> list[Change]:
    """Every key whose value differs (defaults filled in), in a stable order."""
    a, b = _flatten(old.model_dump(mode="json")), _flatten(new.model_dump(mode="json"))
    return [Change(k, a.get(k), b.get(k)) for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)]


def breaking(changes: list[Change]) -> list[Change]:
    """The changes a running campaign cannot take."""
    return [c for c in changes if any(c.key == p or c.key.startswith(p + ".") for p in BREAKING)
            or (c.key.startswith("plan.") and c.key.split(".")[1] in ("infill", "classic") and (c.old is None or c.new is None))]


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
