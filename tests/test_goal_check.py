"""``check_evaluable``: goals that can never give a finite number are refused at ``check``."""

from __future__ import annotations

import pytest

from sortie.errors import GoalError
from sortie.goal import Constraint, Expression, check_evaluable

CONDITIONS = [{"mach": 0.6}, {"mach": 0.9}, {"mach": 1.1}, {"mach": 1.3}]
QUANTITIES = ["lift", "drag"]


@pytest.mark.parametrize(("source", "fragment"), [
    ("max(lift) / 0", "divides by zero in 'max(lift) / 0'"),
    ("max(lift) / (3 - 3)", "divides by zero"),
    ("max(lift) ** 10 ** 10 ** 10", "an overflow in '10 ** 10 ** 10'"),
    ("sqrt(-1)", "the square root of a negative number in 'sqrt(-1)'"),
    ("max(lift) + sqrt(-4) * 0", "the square root of a negative number"),
    ("max(lift) / (max(lift) - max(lift))", "is never a finite number (a division by zero"),
    ("sqrt(-abs(mean(drag)) - 1)", "is never a finite number (the square root of a negative number"),
    ("max(lift) * 1" + "0" * 400, "a number too large for a float (401 digits)"),
])
def test_goals_that_are_never_finite_are_refused_in_one_line(source, fragment):
    with pytest.raises(GoalError) as info:  # before the fix all passed check, then ended the run
        check_evaluable(Expression.parse(source, where="goal.minimize"), QUANTITIES, CONDITIONS)
    message = str(info.value)
    assert message.startswith("goal.minimize: ")
    assert fragment in message
    assert len(message) <= 200 and "\n" not in message


@pytest.mark.parametrize("source", [
    "max(lift) - min(lift)", "mean(drag) / baseline.drag[mach=0.9]", "sqrt(max(lift))", "max(lift) ** 1000",
    "1 / (max(lift) - min(lift))", "sqrt(min(lift) - 3)", "10 ** 300 * mean(drag)", "drag[mach=1.1] / 2",
])
def test_goals_finite_for_some_values_pass(source):
    check_evaluable(Expression.parse(source, where="goal.minimize"), QUANTITIES, CONDITIONS)


def test_a_constraint_side_is_checked_like_an_objective():
    constraint = Constraint.parse("drag / (2 - 2) <= 1", where="goal.subject_to[0]")
    check_evaluable(constraint.rhs, QUANTITIES, CONDITIONS)
    with pytest.raises(GoalError, match=r"goal.subject_to\[0\]: 'drag / \(2 - 2\) <= 1' divides by zero"):
        check_evaluable(constraint.lhs, QUANTITIES, CONDITIONS)


def test_a_long_expression_is_clipped_in_the_message():
    source = " + ".join(["max(lift)"] * 100) + " + sqrt(-1)"
    with pytest.raises(GoalError) as info:
        check_evaluable(Expression.parse(source, where="goal.minimize"), QUANTITIES, CONDITIONS)
    assert len(str(info.value)) <= 200
