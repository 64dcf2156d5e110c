"""Config changes on resume: which are refused (and named), which are accepted."""

from __future__ import annotations

import copy
from pathlib import Path

from sortie.changes import breaking, budget_problems, compare
from sortie.config import parse_config
from tests.conftest import branin_config


def _parse(raw: dict) -> object:
    import yaml

    return parse_config(yaml.safe_dump(raw), base_dir=Path("."), source="test.yaml")


def _changed(**edits: object) -> tuple[list, list]:
    old = branin_config()
    new = copy.deepcopy(old)
    for path, value in edits.items():
        node = new
        keys = path.split("__")
        for key in keys[:-1]:
            node = node.setdefault(key, {})
        node[keys[-1]] = value
    found = compare(_parse(old), _parse(new))
    return found, breaking(found)


def test_the_same_config_has_no_changes() -> None:
    found, bad = _changed()
    assert found == [] and bad == []


def test_slots_budget_retries_and_infill_knobs_are_accepted() -> None:
    found, bad = _changed(slots=8, budget__designs=20, retries__transient=5, solver__timeout_s=50.0)
    assert {c.key for c in found} >= {"slots", "budget.designs", "retries.transient"}
    assert bad == []


def test_a_changed_parameter_bound_is_refused_and_named() -> None:
    _, bad = _changed(parameters__x1__upper=12.0)
    assert [c.key for c in bad] == ["parameters.x1.upper"]
    assert str(bad[0]) == "parameters.x1.upper 10.0 -> 12.0"


def test_conditions_goal_and_initial_plan_changes_are_refused() -> None:
    for edit in ({"conditions": {"scale": [1.0, 3.0]}}, {"goal__minimize": "max(f)"},
                 {"plan__initial": {"method": "sobol", "designs": 8}}, {"campaign__seed": 4}):
        _, bad = _changed(**edit)
        assert bad, edit


def test_a_new_parameter_is_refused() -> None:
    _, bad = _changed(parameters__x3={"lower": 0.0, "upper": 1.0, "baseline": 0.5})
    assert any(c.key.startswith("parameters.x3") for c in bad)


def test_a_budget_below_what_is_recorded_is_refused() -> None:
    config = _parse(branin_config(budget={"designs": 9}))
    assert budget_problems(config, 9) == []
    problems = budget_problems(config, 10)
    assert len(problems) == 1 and "at least 10 designs" in problems[0]


def test_adding_infill_is_accepted_and_removing_it_refused() -> None:
    old = _parse(branin_config())
    new = _parse(branin_config(plan={"initial": {"method": "lhs", "designs": 8}, "infill": {}}, budget={"designs": 12}))
    added = compare(old, new)
    assert "plan.infill 'absent' -> 'present'" in [str(c) for c in added]
    assert breaking(added) == []
    assert [str(c) for c in breaking(compare(new, old))] == ["plan.infill 'present' -> 'absent'"]


def test_the_screening_selection_rule_may_change_but_not_its_design() -> None:
    base = {"initial": {"method": "lhs", "designs": 8}, "screening": {"trajectories": 3, "select": {"top": 1}}}
    old = _parse(branin_config(plan=base, budget={"designs": 30}))
    rule = _parse(branin_config(plan={**base, "screening": {"trajectories": 3, "select": {"top": 2}}}, budget={"designs": 30}))
    design = _parse(branin_config(plan={**base, "screening": {"trajectories": 4, "select": {"top": 1}}}, budget={"designs": 30}))
    assert breaking(compare(old, rule)) == []
    assert [c.key for c in breaking(compare(old, design))] == ["plan.screening.trajectories"]
