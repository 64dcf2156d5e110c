"""Goal expressions (sortie.goal): what they compute over conditions, and what they refuse.

The numbers are invented rocket-sled aft-body quantities at four Mach numbers; every expected
value below is worked out by hand or by plain numpy beside the test, not taken from outside.
"""

from __future__ import annotations

import ast
import builtins
import random
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from numpy.testing import assert_allclose

from sortie.errors import GoalError
from sortie.goal import FUNCTIONS, RESERVED, Constraint, Expression, Goal

CONDITIONS = [{"mach": 0.6}, {"mach": 0.9}, {"mach": 1.1}, {"mach": 1.3}]
LIFT = np.array([-0.12, -0.05, 0.08, 0.15])
DRAG = np.array([0.31, 0.36, 0.52, 0.47])
VALUES = {"lift": LIFT, "drag": DRAG}
BASE = {"lift": np.array([-0.20, -0.10, 0.10, 0.25]), "drag": np.array([0.30, 0.38, 0.50, 0.47])}

# Two condition names: Mach number and yaw angle, crossed.
CONDITIONS_2D = [{"mach": 0.9, "yaw_deg": 0.0}, {"mach": 0.9, "yaw_deg": 4.0},
                 {"mach": 1.1, "yaw_deg": 0.0}, {"mach": 1.1, "yaw_deg": 4.0}]

WHERE = "goal.minimize"


def value_of(source: str, values: dict[str, np.ndarray] = VALUES, baseline: dict[str, np.ndarray] | None = BASE,
             conditions: list[dict[str, float]] = CONDITIONS) -> Any:
    return Expression.parse(source, where=WHERE).evaluate(values, baseline, conditions)


# --- values over conditions -------------------------------------------------------------------


def test_swing_is_max_minus_min_over_conditions() -> None:
    assert value_of("max(lift) - min(lift)") == pytest.approx(0.15 - -0.12)


@pytest.mark.parametrize(("source", "expected"), [
    ("mean(drag)", (0.31 + 0.36 + 0.52 + 0.47) / 4),
    ("sum(drag)", 0.31 + 0.36 + 0.52 + 0.47),
    ("max(drag)", 0.52),
    ("min(lift)", -0.12),
    ("max(abs(lift))", 0.15),
    ("mean(lift ** 2)", (0.12**2 + 0.05**2 + 0.08**2 + 0.15**2) / 4),
    ("sqrt(mean(lift ** 2))", np.sqrt((0.12**2 + 0.05**2 + 0.08**2 + 0.15**2) / 4)),
])
def test_reducers_turn_a_vector_into_one_float(source: str, expected: float) -> None:
    value = value_of(source)
    assert isinstance(value, float)
    assert value == pytest.approx(expected)


@pytest.mark.parametrize(("source", "expected"), [
    ("lift", LIFT),
    ("-lift", -LIFT),
    ("+lift", LIFT),
    ("abs(lift)", np.abs(LIFT)),
    ("sqrt(drag)", np.sqrt(DRAG)),
    ("drag * 2 - lift", DRAG * 2 - LIFT),
    ("lift / drag", LIFT / DRAG),
    ("lift ** 2", LIFT**2),
    ("drag - baseline.drag", DRAG - BASE["drag"]),
    ("max(lift, 0)", np.maximum(LIFT, 0.0)),
    ("min(lift, drag, 0.1)", np.minimum(np.minimum(LIFT, DRAG), 0.1)),
    ("drag - mean(drag)", DRAG - DRAG.mean()),
])
def test_elementwise_expressions_keep_one_value_per_condition(source: str, expected: np.ndarray) -> None:
    value = value_of(source)
    assert np.shape(value) == (len(CONDITIONS),)
    np.testing.assert_allclose(value, expected, rtol=1e-12)


@pytest.mark.parametrize(("source", "expected"), [
    ("1 + 2 * 3", 7.0),
    ("(1 + 2) * 3", 9.0),
    ("2 ** 3 ** 2", 512.0),
    ("-2 ** 2", -4.0),
    ("(-2) ** 2", 4.0),
    ("7 / 2", 3.5),
    ("-(3 - 5)", 2.0),
    ("--3", 3.0),
    ("1e-3 * 2", 0.002),
])
def test_arithmetic_follows_python_precedence(source: str, expected: float) -> None:
    assert value_of(source) == pytest.approx(expected)


def test_division_by_zero_gives_inf_not_an_exception() -> None:
    assert value_of("1 / (mean(drag) - mean(drag))") == np.inf


def test_expression_can_be_evaluated_again_with_other_values() -> None:
    expr = Expression.parse("max(lift) - min(lift)", where=WHERE)
    assert expr.evaluate(VALUES, None, CONDITIONS) == pytest.approx(0.27)
    assert expr.evaluate({"lift": BASE["lift"]}, None, CONDITIONS) == pytest.approx(0.45)
    assert expr.evaluate(VALUES, None, CONDITIONS) == pytest.approx(0.27)


# --- selectors and the baseline ---------------------------------------------------------------


@pytest.mark.parametrize("source", ["drag[mach=1.1]", "drag[ mach = 1.1 ]", "drag[mach=1.10]", "drag[mach=11e-1]"])
def test_selector_picks_the_value_at_one_condition(source: str) -> None:
    assert value_of(source) == pytest.approx(0.52)


def test_selector_of_an_integer_valued_condition_accepts_an_integer() -> None:
    conditions = [{"yaw_deg": 0.0}, {"yaw_deg": 4.0}]
    assert value_of("drag[yaw_deg=4]", {"drag": np.array([0.3, 0.4])}, None, conditions) == pytest.approx(0.4)


@pytest.mark.parametrize("source", ["drag[mach=1.1, yaw_deg=4]", "drag[yaw_deg=4, mach=1.1]", "drag[yaw_deg=4.0,mach=1.1]"])
def test_selector_with_two_condition_names_picks_their_crossing(source: str) -> None:
    assert value_of(source, conditions=CONDITIONS_2D) == pytest.approx(DRAG[3])


def test_selector_that_matches_several_conditions_is_rejected() -> None:
    with pytest.raises(GoalError, match="matches several"):
        value_of("drag[mach=1.1]", conditions=CONDITIONS_2D)


def test_selector_at_an_unlisted_value_is_rejected() -> None:
    with pytest.raises(GoalError, match=r"goal\.minimize: .*mach=2.*not one of the campaign's conditions"):
        value_of("drag[mach=2.0]")


def test_selector_of_an_unknown_condition_name_is_rejected() -> None:
    with pytest.raises(GoalError, match="unknown condition 'speed'; conditions: mach"):
        value_of("drag[speed=1.1]")


def test_baseline_quantity_is_read_from_the_baseline_values() -> None:
    assert value_of("baseline.drag[mach=1.1]") == pytest.approx(0.50)
    assert value_of("drag[mach=1.1] - baseline.drag[mach=1.1]") == pytest.approx(0.02)
    assert value_of("max(baseline.lift) - min(baseline.lift)") == pytest.approx(0.45)


def test_baseline_reference_before_baseline_results_is_an_error() -> None:
    with pytest.raises(GoalError, match="baseline design, whose results are not available yet"):
        value_of("drag - baseline.drag", baseline=None)


def test_quantity_names_lists_quantities_not_conditions_or_functions() -> None:
    expr = Expression.parse("max(lift) - baseline.drag[mach=1.1] + sqrt(drag[mach=0.9])", where=WHERE)
    assert expr.quantity_names() == {"lift", "drag"}


def test_uses_baseline_only_when_baseline_is_mentioned() -> None:
    assert Expression.parse("drag - baseline.drag", where=WHERE).uses_baseline()
    assert not Expression.parse("max(lift) - min(lift)", where=WHERE).uses_baseline()


# --- constraints --------------------------------------------------------------------------------


def margin(source: str, values: dict[str, np.ndarray] = VALUES, conditions: list[dict[str, float]] = CONDITIONS) -> float:
    return Constraint.parse(source, where="goal.subject_to[0]").margin(values, BASE, conditions)


def test_le_margin_is_worst_lhs_minus_rhs_over_conditions() -> None:
    # drag - baseline.drag = [0.01, -0.02, 0.02, 0.00]: violated at Mach 0.6 and 1.1, worst at 1.1.
    assert margin("drag <= baseline.drag") == pytest.approx(0.02)


def test_ge_margin_is_worst_rhs_minus_lhs_over_conditions() -> None:
    # 0.35 - drag = [0.04, -0.01, -0.17, -0.12]: violated at Mach 0.6 only.
    assert margin("drag >= 0.35") == pytest.approx(0.04)


def test_met_constraint_has_a_negative_margin_equal_to_the_tightest_slack() -> None:
    assert margin("drag <= 0.6") == pytest.approx(0.52 - 0.6)
    assert margin("drag >= 0.3") == pytest.approx(0.3 - 0.31)


def test_strict_comparisons_use_the_same_margins_as_non_strict() -> None:
    assert margin("drag < 0.5") == pytest.approx(margin("drag <= 0.5"))
    assert margin("drag > 0.5") == pytest.approx(margin("drag >= 0.5"))


def test_mirrored_constraints_have_equal_margins() -> None:
    rng = np.random.default_rng(11)
    for _ in range(50):
        values = {"lift": rng.normal(size=4), "drag": rng.normal(size=4)}
        assert margin("lift <= drag", values) == pytest.approx(margin("drag >= lift", values))
        assert (margin("lift <= drag", values) <= 0) == bool(np.all(values["lift"] <= values["drag"]))


def test_constraint_at_one_condition_ignores_the_others() -> None:
    assert margin("drag[mach=0.9] <= baseline.drag[mach=0.9]") == pytest.approx(0.36 - 0.38)


def test_constraint_parts_and_names() -> None:
    c = Constraint.parse("drag[mach=1.1] <= 1.05 * baseline.drag[mach=1.1]", where="goal.subject_to[1]")
    assert c.op == "<="
    assert c.quantity_names() == {"drag"}
    assert c.uses_baseline()
    assert not Constraint.parse("max(drag) <= 0.6", where="goal.subject_to[1]").uses_baseline()


@pytest.mark.parametrize("source", [
    "drag - baseline.drag", "max(drag)", "0.3 <= drag <= 0.6", "drag == 0.4", "drag != 0.4", "drag = 0.4",
    "drag in lift", "drag is lift",
])
def test_constraint_must_be_one_ordering_comparison(source: str) -> None:
    with pytest.raises(GoalError, match=r"^goal\.subject_to\[4\]: "):
        Constraint.parse(source, where="goal.subject_to[4]")


# --- goals and scores ---------------------------------------------------------------------------


def make_goal(sense: str = "minimize", objective: str = "max(lift) - min(lift)", *constraints: str) -> Goal:
    return Goal(sense, Expression.parse(objective, where=f"goal.{sense}"),
                tuple(Constraint.parse(s, where=f"goal.subject_to[{i}]") for i, s in enumerate(constraints)))


def test_score_is_feasible_when_every_margin_is_at_most_zero() -> None:
    goal = make_goal("minimize", "max(lift) - min(lift)", "drag <= 0.6", "max(drag) <= 0.52")
    score = goal.score(VALUES, BASE, CONDITIONS)
    assert score.objective == pytest.approx(0.27)
    assert score.constraints == {"drag <= 0.6": pytest.approx(-0.08), "max(drag) <= 0.52": pytest.approx(0.0)}
    assert score.feasible is True


def test_score_is_infeasible_when_one_condition_violates_a_constraint() -> None:
    goal = make_goal("minimize", "max(lift) - min(lift)", "drag <= 0.6", "drag <= baseline.drag")
    score = goal.score(VALUES, BASE, CONDITIONS)
    assert score.constraints["drag <= baseline.drag"] == pytest.approx(0.02)
    assert score.feasible is False


def test_score_without_constraints_is_feasible() -> None:
    assert make_goal().score(VALUES, None, CONDITIONS).feasible is True


@pytest.mark.parametrize(("objective", "values"), [
    ("lift", VALUES),  # still one value per condition
    ("mean(sqrt(lift))", VALUES),  # sqrt of a negative lift
    ("max(lift)", {"lift": np.array([0.1, np.nan, 0.2, 0.3]), "drag": DRAG}),
])
def test_score_with_non_finite_or_vector_objective_is_infeasible(objective: str, values: dict[str, np.ndarray]) -> None:
    score = make_goal("minimize", objective).score(values, None, CONDITIONS)
    assert not np.isfinite(score.objective)
    assert score.feasible is False


def test_score_with_nan_margin_is_infeasible() -> None:
    values = {"lift": LIFT, "drag": np.array([0.3, np.nan, 0.3, 0.3])}
    score = make_goal("minimize", "mean(lift)", "drag <= 0.6").score(values, None, CONDITIONS)
    assert score.feasible is False


def test_better_follows_the_sense() -> None:
    assert make_goal("minimize").better(0.1, 0.2)
    assert not make_goal("minimize").better(0.2, 0.1)
    assert make_goal("maximize").better(0.2, 0.1)
    assert not make_goal("maximize").better(0.1, 0.1)


def test_goal_uses_baseline_through_objective_or_constraints() -> None:
    assert not make_goal().uses_baseline()
    assert make_goal("minimize", "mean(drag)", "drag <= baseline.drag").uses_baseline()
    assert make_goal("minimize", "mean(drag - baseline.drag)").uses_baseline()


# --- refusals -----------------------------------------------------------------------------------

REFUSED = {
    "attribute access": ["lift.real", "drag.__class__", "baseline.drag.real", "lift.__class__.__bases__", "np.pi"],
    "call outside the whitelist": ["__import__('os')", "eval('1')", "open('case.in')", "exec('x = 1')",
                                   "getattr(lift, 'real')", "np.max(lift)", "lift()", "round(mean(lift))",
                                   "__import__('os').system('true')", "max(lift)(1)"],
    "lambda": ["lambda: 1", "(lambda: 1)()", "(lambda x: x)(lift)", "max(lambda: lift)"],
    "non-constant selector": ["drag[0]", "drag[-1]", "drag[mach=lift]", "drag[mach]", "drag[1:2]", "drag[mach=1.1, 0]",
                              "drag[mach=0.6 + 0.5]", "drag[mach=mean(drag)]", "drag[mach=1.1][mach=1.1]",
                              "drag[mach<1.1]", "mean(drag)[mach=1.1]"],
    "keyword argument": ["max(lift, initial=0)", "max(**lift)", "mean(lift, axis=0)"],
    "comparison in an objective": ["drag <= 0.5", "max(drag <= 0.5)", "(drag < 1) * 2", "mean(drag) > 0"],
    "unknown quantity": ["lyft", "max(lyft) - min(lyft)", "baseline.lyft", "drag + yaw_moment"],
    "string": ["'drag'", "max('drag')", "drag + 'x'", "f'{drag}'", "b'drag'"],
    "reserved name as a value": ["max", "baseline", "sqrt + 1"],
    "other syntax": ["[1, 2]", "{1: 2}", "{lift}", "(x := 1)", "1 if lift else 2", "lift and drag", "not lift",
                     "~lift", "lift & drag", "lift // 2", "lift % 2", "lift @ drag", "True", "None", "1j", "...",
                     "max(x for x in lift)", "[x for x in lift]", "*lift", "max(*lift)", "max()", "sqrt(lift, drag)",
                     "abs()"],
    "not an expression": ["", "   ", "max(lift", "drag[mach=1.1", "import os", "lift; drag", "lift\ndrag",
                          "def f(): pass", "x = 1"],
}
REFUSED_PARAMS = [pytest.param(kind, source, id=f"{kind}: {source!r}") for kind, sources in REFUSED.items()
                  for source in sources]
CONFIG_PATH = "goal.subject_to[3].lhs"


def parse_and_evaluate(source: str, where: str = CONFIG_PATH) -> Any:
    expr = Expression.parse(source, where=where)
    return expr.evaluate(VALUES, BASE, CONDITIONS)


@pytest.mark.parametrize(("kind", "source"), REFUSED_PARAMS)
def test_refused_expression_raises_goal_error_naming_the_config_path(kind: str, source: str) -> None:
    with pytest.raises(GoalError) as info:
        parse_and_evaluate(source)
    message = str(info.value)
    assert message.startswith(f"{CONFIG_PATH}: "), message
    assert "\n" not in message.removeprefix(f"{CONFIG_PATH}: ").replace(repr(source), ""), message


@pytest.mark.parametrize("source", ["lift.real", "drag.__class__", "baseline.drag.real"])
def test_attribute_access_other_than_baseline_names_the_rule(source: str) -> None:
    with pytest.raises(GoalError, match=r"attribute access; only baseline\.<quantity> is allowed"):
        parse_and_evaluate(source)


@pytest.mark.parametrize(("source", "name"), [("__import__('os')", "__import__"), ("eval('1')", "eval"),
                                              ("open('case.in')", "open"), ("round(mean(lift))", "round")])
def test_forbidden_call_names_the_function_and_the_whitelist(source: str, name: str) -> None:
    with pytest.raises(GoalError, match=rf"calls '{name}', which is not allowed; allowed functions: min, max, mean"):
        parse_and_evaluate(source)


def test_unknown_quantity_lists_the_known_ones() -> None:
    with pytest.raises(GoalError, match="unknown quantity 'lyft'; known quantities: drag, lift"):
        parse_and_evaluate("max(lyft)")


def test_objective_that_is_a_comparison_is_refused_at_parse_time() -> None:
    with pytest.raises(GoalError, match="is a comparison; an objective must be a number"):
        Expression.parse("drag <= baseline.drag", where=WHERE)


def test_check_finds_unknown_names_with_dummy_values() -> None:
    Expression.parse("max(lift) - drag[mach=1.3]", where=WHERE).check(["lift", "drag"], CONDITIONS)
    with pytest.raises(GoalError, match="unknown quantity 'drag'"):
        Expression.parse("max(lift) - drag[mach=1.3]", where=WHERE).check(["lift"], CONDITIONS)
    with pytest.raises(GoalError, match="not one of the campaign's conditions"):
        Constraint.parse("drag[mach=2] <= 1", where="goal.subject_to[0]").check(["drag"], CONDITIONS)


def test_refused_call_never_runs_the_code(tmp_path: Path) -> None:
    marker = tmp_path / "ran"
    with pytest.raises(GoalError):
        parse_and_evaluate(f"__import__('os').system('touch {marker}')")
    with pytest.raises(GoalError):
        parse_and_evaluate(f"open('{marker}', 'w')")
    assert not marker.exists()




@pytest.mark.parametrize("source", ["drag[mach='fast']", "drag[mach=None]", "drag[mach=1j]"])
def test_selector_value_that_is_not_a_number_raises_goal_error(source: str) -> None:
    with pytest.raises(GoalError, match="not of the form name=number"):
        parse_and_evaluate(source)


def test_selector_at_a_negative_condition_value() -> None:
    conditions = [{"yaw_deg": -4.0}, {"yaw_deg": 0.0}, {"yaw_deg": 4.0}]
    assert value_of("drag[yaw_deg=-4]", {"drag": np.array([0.5, 0.3, 0.4])}, None, conditions) == pytest.approx(0.5)


def test_very_long_expression_is_refused_with_goal_error_not_recursion_error() -> None:
    with pytest.raises(GoalError):
        parse_and_evaluate(" + ".join(["lift"] * 3000))


# --- the evaluator never hands text to Python ----------------------------------------------------


# The oracle's own functions, written out with numpy here rather than taken from the module under
# test (sortie.goal.FUNCTIONS): an oracle built from FUNCTIONS agrees with any change to it.
_NUMPY_REDUCERS: dict[str, Callable[[Any], Any]] = {"min": np.min, "max": np.max, "mean": np.mean, "sum": np.sum}
_NUMPY_ELEMENTWISE: dict[str, Callable[[Any], Any]] = {"abs": np.abs, "sqrt": np.sqrt}


def test_the_oracle_covers_every_allowed_function() -> None:
    assert set(_NUMPY_REDUCERS) | set(_NUMPY_ELEMENTWISE) == set(FUNCTIONS)


def _random_expression(rng: random.Random, depth: int) -> tuple[str, Any]:
    """A random allowed expression and its value computed with plain numpy (the reference)."""
    quantities = {"lift": LIFT, "drag": DRAG}
    if depth == 0 or rng.random() < 0.25:
        pick = rng.randrange(4)
        if pick == 0:
            number = rng.choice([0.5, 1.0, 2.0, 3.0, 0.25])
            return repr(number), number
        name = rng.choice(sorted(quantities))
        if pick == 1:
            return name, quantities[name]
        if pick == 2:
            return f"baseline.{name}", BASE[name]
        i = rng.randrange(len(CONDITIONS))
        return f"{name}[mach={CONDITIONS[i]['mach']}]", float(quantities[name][i])
    pick = rng.randrange(6)
    a_src, a = _random_expression(rng, depth - 1)
    if pick == 0:
        b_src, b = _random_expression(rng, depth - 1)
        op, fn = rng.choice([("+", np.add), ("-", np.subtract), ("*", np.multiply), ("/", np.divide)])
        return f"({a_src} {op} {b_src})", fn(a, b)
    if pick == 1:
        return f"(-{a_src})", -a
    if pick == 2:
        exponent = rng.choice([2, 3])
        return f"({a_src}) ** {exponent}", np.power(a, float(exponent))
    if pick == 3:
        name = rng.choice(sorted(_NUMPY_REDUCERS))
        return f"{name}({a_src})", float(_NUMPY_REDUCERS[name](a))
    if pick == 4:
        name = rng.choice(sorted(_NUMPY_ELEMENTWISE))
        return f"{name}({a_src})", _NUMPY_ELEMENTWISE[name](a)
    b_src, b = _random_expression(rng, depth - 1)
    name, fn = rng.choice([("min", np.minimum), ("max", np.maximum)])
    return f"{name}({a_src}, {b_src})", fn(a, b)


def _forbid(name: str) -> Callable[..., Any]:
    def refuse(*args: Any, **kwargs: Any) -> Any:
        raise AssertionError(f"the goal evaluator called {name}")

    return refuse


def test_evaluator_matches_numpy_on_random_expressions_without_eval_exec_or_compile(
        monkeypatch: pytest.MonkeyPatch) -> None:
    real_compile = builtins.compile

    def ast_only_compile(source: Any, filename: Any, mode: str, flags: int = 0, *args: Any, **kwargs: Any) -> Any:
        assert flags & ast.PyCF_ONLY_AST, "the goal evaluator compiled code to bytecode"
        return real_compile(source, filename, mode, flags, *args, **kwargs)

    # numpy.testing is imported at the top of this file: numpy loads it lazily on first use, and a
    # first import without a cached .pyc (a fresh venv, PYTHONDONTWRITEBYTECODE) compiles it here.
    monkeypatch.setattr(builtins, "eval", _forbid("eval"))
    monkeypatch.setattr(builtins, "exec", _forbid("exec"))
    monkeypatch.setattr(builtins, "compile", ast_only_compile)
    rng = random.Random(20240611)
    with np.errstate(all="ignore"):
        for _ in range(400):
            source, expected = _random_expression(rng, depth=4)
            got = Expression.parse(source, where=WHERE).evaluate(VALUES, BASE, CONDITIONS)
            assert_allclose(got, expected, rtol=1e-12, equal_nan=True, err_msg=source)
    for _kind, source in ((p.values[0], p.values[1]) for p in REFUSED_PARAMS):
        with pytest.raises(GoalError):
            parse_and_evaluate(str(source))


def test_reserved_names_are_the_functions_and_baseline() -> None:
    assert frozenset({"min", "max", "mean", "sum", "abs", "sqrt", "baseline"}) == RESERVED
