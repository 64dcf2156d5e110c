"""Goal expressions: the objective and constraints, evaluated safely over quantities.

A quantity is a vector over the campaign's conditions (one entry per condition, in config order).
Expressions are parsed with :mod:`ast` and walked by hand: only numbers, quantity names,
``baseline.<quantity>``, selection at one condition (``drag[mach=1.1]``), arithmetic, and the
functions in :data:`FUNCTIONS` are allowed. Nothing is ever passed to ``eval``, and attribute
access, imports, lambdas and the like are rejected when the config is checked.

Examples
--------
>>> conds = [{"mach": 0.6}, {"mach": 1.1}]
>>> e = Expression.parse("max(lift) - min(lift)", where="goal.minimize")
>>> float(e.evaluate({"lift": np.array([-0.2, 0.3])}, None, conds))
0.5
"""

from __future__ import annotations

import ast
import math
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from sortie.errors import GoalError
from sortie.shown import shown

#: Functions an expression may call. One argument reduces a vector over conditions; min/max with
#: several arguments take the elementwise minimum/maximum.
FUNCTIONS: dict[str, Callable[..., Any]] = {
    "min": np.min,
    "max": np.max,
    "mean": np.mean,
    "sum": np.sum,
    "abs": np.abs,
    "sqrt": np.sqrt,
}
REDUCERS = {"min", "max", "mean", "sum"}
BASELINE = "baseline"
RESERVED = frozenset(FUNCTIONS) | {BASELINE}
MAX_LENGTH = 2000

_BINOPS: dict[type, Callable[[Any, Any], Any]] = {
    ast.Add: np.add,
    ast.Sub: np.subtract,
    ast.Mult: np.multiply,
    ast.Div: np.divide,
    ast.Pow: np.power,
}
_COMPARE = {ast.LtE: "<=", ast.Lt: "<", ast.GtE: ">=", ast.Gt: ">"}
# `drag[mach=1.1]` is not Python syntax; rewrite each selector `name=` to `name==` before parsing.
_SELECTOR = re.compile(r"(?<![=!<>])\b([A-Za-z_]\w*)\s*=(?!=)")

Vector = np.ndarray
Scalar = float
Values = Mapping[str, Vector]


@dataclass(frozen=True)
class Expression:
    """A parsed expression over quantities; immutable and safe to evaluate many times."""

    source: str
    where: str
    tree: ast.expr = field(repr=False, compare=False)

    @classmethod
    def parse(cls, source: str, *, where: str) -> Expression:
        """Parse ``source``; ``where`` is the config path used in error messages."""
        tree = _parse(source, where)
        if isinstance(tree, ast.Compare):
            raise GoalError(f"{where}: {shown(source)} is a comparison; an objective must be a number (use subject_to for constraints)")
        return cls(source, where, tree)

    def quantity_names(self) -> set[str]:
        """Quantities the expression reads (directly or through ``baseline.``)."""
        names: set[str] = set()
        for node in ast.walk(self.tree):
            if isinstance(node, ast.Attribute):
                names.add(node.attr)
            elif isinstance(node, ast.Name) and node.id not in RESERVED and not _is_selector_name(self.tree, node):
                names.add(node.id)
        return names

    def uses_baseline(self) -> bool:
        """True when the expression refers to the baseline design's values."""
        return any(isinstance(n, ast.Attribute) for n in ast.walk(self.tree))

    def check(self, quantities: Sequence[str], conditions: Sequence[Mapping[str, float]]) -> None:
        """Evaluate once on dummy data so that unknown names and selectors fail at config time."""
        dummy = {q: np.ones(len(conditions)) for q in quantities}
        self.evaluate(dummy, dummy, conditions)

    def evaluate(self, values: Values, baseline: Values | None, conditions: Sequence[Mapping[str, float]]) -> Scalar | Vector:
        """Evaluate with ``values[q]`` of shape (n_conditions,) for each quantity ``q``."""
        return self._walk(_Evaluator, values, baseline, conditions)

    def evaluate_batch(self, values: Values, baseline: Values | None, conditions: Sequence[Mapping[str, float]]) -> Vector:
        """Evaluate over many samples at once: ``values[q]`` of shape (n_samples, n_conditions).

        Returns shape (n_samples, 1) for an expression reduced to one number per sample, (n_samples,
        n_conditions) for one that is not (a constraint side such as ``drag``), or (1, k) for one
        that reads only constants and baseline values. Row ``i`` equals :meth:`evaluate` on sample ``i``.
        """
        return np.atleast_2d(np.asarray(self._walk(_BatchEvaluator, values, baseline, conditions), dtype=float))

    def _walk(self, evaluator: type[_Evaluator], values: Values, baseline: Values | None,
              conditions: Sequence[Mapping[str, float]]) -> Any:
        with np.errstate(all="ignore"):
            try:
                return evaluator(self, values, baseline, conditions).visit(self.tree)
            except RecursionError:
                raise GoalError(f"{self.where}: the expression is nested too deeply; split it or simplify it") from None


@dataclass(frozen=True)
class Constraint:
    """``lhs OP rhs``; its margin is positive when violated and at most zero when met."""

    source: str
    where: str
    lhs: Expression
    op: str
    rhs: Expression

    @classmethod
    def parse(cls, source: str, *, where: str) -> Constraint:
        tree = _parse(source, where)
        if not (isinstance(tree, ast.Compare) and len(tree.ops) == 1 and type(tree.ops[0]) in _COMPARE):
            raise GoalError(f"{where}: {shown(source)} must be one comparison such as 'drag <= baseline.drag' (allowed: <=, <, >=, >)")
        op = _COMPARE[type(tree.ops[0])]
        return cls(source, where, Expression(source, where, tree.left), op, Expression(source, where, tree.comparators[0]))

    def quantity_names(self) -> set[str]:
        return self.lhs.quantity_names() | self.rhs.quantity_names()

    def uses_baseline(self) -> bool:
        return self.lhs.uses_baseline() or self.rhs.uses_baseline()

    def check(self, quantities: Sequence[str], conditions: Sequence[Mapping[str, float]]) -> None:
        self.lhs.check(quantities, conditions)
        self.rhs.check(quantities, conditions)

    def margin(self, values: Values, baseline: Values | None, conditions: Sequence[Mapping[str, float]]) -> float:
        """Worst margin over conditions: ``lhs - rhs`` for ``<=``, ``rhs - lhs`` for ``>=``."""
        lhs = self.lhs.evaluate(values, baseline, conditions)
        rhs = self.rhs.evaluate(values, baseline, conditions)
        diff = np.asarray(lhs - rhs if self.op in ("<=", "<") else rhs - lhs, dtype=float)
        return float(np.max(diff))

    def margin_batch(self, values: Values, baseline: Values | None, conditions: Sequence[Mapping[str, float]]) -> np.ndarray:
        """:meth:`margin` for many samples: ``values[q]`` of shape (n_samples, n_conditions); shape (n_samples,)."""
        lhs = self.lhs.evaluate_batch(values, baseline, conditions)
        rhs = self.rhs.evaluate_batch(values, baseline, conditions)
        diff = lhs - rhs if self.op in ("<=", "<") else rhs - lhs
        n = max(np.atleast_2d(np.asarray(v)).shape[0] for v in values.values()) if values else diff.shape[0]
        return np.broadcast_to(np.max(diff, axis=-1), (n,)).copy()


def _parse(source: str, where: str) -> ast.expr:
    if not isinstance(source, str) or not source.strip():
        raise GoalError(f"{where}: an expression is required, got {shown(source)}")
    if len(source) > MAX_LENGTH:
        raise GoalError(f"{where}: the expression is {len(source)} characters long; at most {MAX_LENGTH} are allowed")
    rewritten = _SELECTOR.sub(r"\1==", source)
    try:
        return ast.parse(rewritten.strip(), mode="eval").body
    except (RecursionError, MemoryError):
        raise GoalError(f"{where}: the expression is nested too deeply; split it or simplify it") from None
    except ValueError as err:  # e.g. an integer literal past Python's digit limit
        raise GoalError(f"{where}: {shown(source)} cannot be read ({shown(str(err), 60)[1:-1]})") from None
    except SyntaxError as err:
        raise GoalError(f"{where}: {shown(source)} is not a valid expression ({err.msg}); allowed: numbers, quantities, baseline.<quantity>, quantity[condition=value], + - * / **, {', '.join(FUNCTIONS)}") from None


def _is_selector_name(root: ast.expr, name: ast.Name) -> bool:
    for node in ast.walk(root):
        if isinstance(node, ast.Subscript):
            for cmp in _selectors(node.slice):
                if cmp.left is name:
                    return True
    return False


def _selectors(node: ast.expr) -> list[ast.Compare]:
    items = node.elts if isinstance(node, ast.Tuple) else [node]
    return [i for i in items if isinstance(i, ast.Compare)]


def _selector_number(node: ast.expr) -> float | None:
    """The number of a selector value: a numeric constant, possibly signed; else None."""
    sign = 1.0
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub | ast.UAdd):
        sign = -1.0 if isinstance(node.op, ast.USub) else 1.0
        node = node.operand
    if isinstance(node, ast.Constant) and isinstance(node.value, int | float) and not isinstance(node.value, bool):
        return sign * float(node.value)
    return None


class _Evaluator:
    """Walks an expression tree; every node type not handled here is an error."""

    def __init__(self, expr: Expression, values: Values, baseline: Values | None, conditions: Sequence[Mapping[str, float]]):
        self.expr, self.values, self.baseline, self.conditions = expr, values, baseline, conditions

    def fail(self, what: str) -> GoalError:
        return GoalError(f"{self.expr.where}: {shown(self.expr.source)} {what}")

    def visit(self, node: ast.expr) -> Any:
        if isinstance(node, ast.Constant) and isinstance(node.value, int | float) and not isinstance(node.value, bool):
            try:
                return float(node.value)
            except OverflowError:
                raise self.fail(f"has a number too large for a float ({len(str(node.value))} digits)") from None
        if isinstance(node, ast.Name):
            return self.quantity(node.id, self.values)
        if isinstance(node, ast.Attribute):
            if not (isinstance(node.value, ast.Name) and node.value.id == BASELINE):
                raise self.fail("uses attribute access; only baseline.<quantity> is allowed")
            if self.baseline is None:
                raise self.fail("refers to the baseline design, whose results are not available yet")
            return self.quantity(node.attr, self.baseline)
        if isinstance(node, ast.Subscript):
            return self.select(node)
        if isinstance(node, ast.BinOp) and type(node.op) in _BINOPS:
            return _BINOPS[type(node.op)](self.visit(node.left), self.visit(node.right))
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub | ast.UAdd):
            value = self.visit(node.operand)
            return -value if isinstance(node.op, ast.USub) else value
        if isinstance(node, ast.Call):
            return self.call(node)
        if isinstance(node, ast.Compare):
            raise self.fail("has a comparison where a number is expected")
        raise self.fail(f"uses {type(node).__name__.lower()} syntax, which is not allowed; allowed: numbers, quantities, baseline.<quantity>, quantity[condition=value], + - * / **, {', '.join(FUNCTIONS)}")

    def quantity(self, name: str, source: Values) -> Vector:
        if name in RESERVED:
            raise self.fail(f"uses {name!r} as a value; {name!r} is reserved")
        if name not in source:
            known = ", ".join(sorted(source)) or "none"
            raise self.fail(f"refers to unknown quantity {name!r}; known quantities: {known}")
        return np.asarray(source[name], dtype=float)

    def select(self, node: ast.Subscript) -> float:
        vector = self.visit(node.value)
        if np.ndim(vector) != 1:
            raise self.fail("selects a condition from something that is not a quantity")
        return float(vector[self.condition_index(node)])

    def condition_index(self, node: ast.Subscript) -> int:
        """The position in the campaign's conditions that a selector such as ``[mach=1.1]`` names."""
        wanted: dict[str, float] = {}
        items = node.slice.elts if isinstance(node.slice, ast.Tuple) else [node.slice]
        for item in items:
            number = _selector_number(item.comparators[0]) if isinstance(item, ast.Compare) and len(item.ops) == 1 else None
            if not (isinstance(item, ast.Compare) and isinstance(item.left, ast.Name) and isinstance(item.ops[0], ast.Eq)
                    and number is not None):
                raise self.fail("has a condition selector that is not of the form name=number")
            wanted[item.left.id] = number
        names = set(self.conditions[0]) if self.conditions else set()
        unknown = set(wanted) - names
        if unknown:
            raise self.fail(f"selects unknown condition {sorted(unknown)[0]!r}; conditions: {', '.join(sorted(names))}")
        hits = [i for i, c in enumerate(self.conditions)
                if all(math.isclose(float(c[k]), v, rel_tol=1e-9, abs_tol=1e-12) for k, v in wanted.items())]
        if len(hits) != 1:
            shown = ", ".join(f"{k}={v:g}" for k, v in wanted.items())
            raise self.fail(f"selects {shown}, which {'is not one of' if not hits else 'matches several of'} the campaign's conditions")
        return hits[0]

    def call(self, node: ast.Call) -> Any:
        if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
            name = node.func.id if isinstance(node.func, ast.Name) else ast.unparse(node.func)
            raise self.fail(f"calls {name!r}, which is not allowed; allowed functions: {', '.join(FUNCTIONS)}")
        if node.keywords or not node.args:
            raise self.fail(f"calls {node.func.id}() with keywords or no arguments; give it positional values")
        args = [self.visit(a) for a in node.args]
        name = node.func.id
        if name in REDUCERS and len(args) == 1:
            return float(FUNCTIONS[name](args[0]))
        if name in ("min", "max") and len(args) > 1:
            reduce = np.minimum if name == "min" else np.maximum
            out = args[0]
            for a in args[1:]:
                out = reduce(out, a)
            return out
        if len(args) != 1:
            raise self.fail(f"calls {name}() with {len(args)} arguments; it takes one")
        return FUNCTIONS[name](args[0])


#: Scales of the random quantity values :func:`check_evaluable` tries (each with both signs); a
#: goal that is NaN or infinite at every one of them is refused.
CHECK_SCALES = (1e-3, 1.0, 1e3, 1e6)


def check_evaluable(expr: Expression, quantities: Sequence[str], conditions: Sequence[Mapping[str, float]],
                    rng: np.random.Generator | None = None) -> None:
    """Refuse, at ``check``, an expression that can never give a finite number.

    Two rules. A part that uses no quantity (``0``, ``10 ** 10 ** 10``, ``sqrt(-1)``) must be
    finite, and no division may be by a constant zero: these are wrong whatever the solver
    returns. Then the whole expression is evaluated on draws of finite quantity values (uniform
    in [0.5, 2] times each of :data:`CHECK_SCALES`, positive and negative, the baseline drawn
    separately); if every result is NaN or infinite the expression is refused, naming the first part that went wrong
    (``max(lift) / (max(lift) - max(lift))``). An expression finite for some values passes:
    its value at run time is the solver's business.
    """
    for node in ast.walk(expr.tree):
        if not _uses_quantity(node):
            _require_finite(expr, node, {}, conditions)
        if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Div) and not _uses_quantity(node.right) \
                and _value(expr, node.right, {}, conditions) == 0:
            raise GoalError(f"{expr.where}: {shown(expr.source)} divides by zero in {shown(ast.unparse(node), 40)}; "
                            f"the divisor must not be a constant zero")
    rng = rng if rng is not None else np.random.default_rng(0)
    scales = [sign * scale for scale in CHECK_SCALES for sign in (1.0, -1.0)]
    pairs = [tuple({q: s * rng.uniform(0.5, 2.0, len(conditions)) for q in quantities} for _ in range(2)) for s in scales]
    if any(_finite(expr.evaluate(values, base, conditions)) for values, base in pairs):
        return
    values, base = pairs[0]
    culprit = next((n for n in _post_order(expr.tree) if not _finite(_value(expr, n, values, conditions, base))), expr.tree)
    raise GoalError(f"{expr.where}: {shown(expr.source)} is never a finite number ({_why(culprit)} in "
                    f"{shown(ast.unparse(culprit), 40)} for every value tried); rewrite it")


def _uses_quantity(node: ast.AST) -> bool:
    return any(isinstance(n, ast.Name | ast.Attribute) and not _is_function_name(n, node) for n in ast.walk(node))


def _is_function_name(name: ast.AST, root: ast.AST) -> bool:
    return any(isinstance(n, ast.Call) and n.func is name for n in ast.walk(root))


def _post_order(node: ast.expr) -> list[ast.expr]:
    """Sub-expressions children first, so the first non-finite one is where things went wrong."""
    if isinstance(node, ast.Call):
        children: list[ast.expr] = list(node.args)
    elif isinstance(node, ast.Subscript):
        children = [node.value]
    else:
        children = [c for c in ast.iter_child_nodes(node) if isinstance(c, ast.expr)]
    return [n for child in children for n in _post_order(child)] + [node]


def _value(expr: Expression, node: ast.expr, values: Values, conditions: Sequence[Mapping[str, float]],
           baseline: Values | None = None) -> Any:
    with np.errstate(all="ignore"):
        return _Evaluator(expr, values, baseline if baseline is not None else values, conditions).visit(node)


def _finite(value: Any) -> bool:
    return bool(np.all(np.isfinite(np.asarray(value, dtype=float))))


def _require_finite(expr: Expression, node: ast.expr, values: Values, conditions: Sequence[Mapping[str, float]]) -> None:
    if not isinstance(node, ast.expr) or _finite(_value(expr, node, values, conditions)):
        return
    culprit = next(n for n in _post_order(node) if not _finite(_value(expr, n, values, conditions)))
    raise GoalError(f"{expr.where}: {shown(expr.source)} has a constant part that is not a finite number "
                    f"({_why(culprit)} in {shown(ast.unparse(culprit), 40)}); rewrite it")


def _why(node: ast.AST) -> str:
    """What most likely made ``node`` NaN or infinite."""
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Div):
        return "a division by zero"
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Pow | ast.Mult | ast.Add | ast.Sub):
        return "an overflow"
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "sqrt":
        return "the square root of a negative number"
    return "a value out of range"


class _BatchEvaluator(_Evaluator):
    """Walks the same tree over many samples at once: every value is an array of shape (n_samples, k).

    A quantity is (n_samples, n_conditions), a baseline quantity (1, n_conditions), anything reduced
    over the conditions (n_samples, 1), so ``lift - mean(lift)`` broadcasts as it does for one design.
    Reductions (``max(lift)``) act along the last axis, a selector (``lift[mach=1.1]``) takes one column.
    Only expressions the scalar evaluator has accepted are evaluated here (the config check runs first),
    so this class adds no error messages of its own.
    """

    def quantity(self, name: str, source: Values) -> Vector:
        return np.atleast_2d(super().quantity(name, source))

    def select(self, node: ast.Subscript) -> Vector:  # type: ignore[override]
        column = self.condition_index(node)
        return self.visit(node.value)[:, column : column + 1]

    def call(self, node: ast.Call) -> Any:
        name = node.func.id if isinstance(node.func, ast.Name) else ""
        if name in REDUCERS and len(node.args) == 1 and not node.keywords:
            return FUNCTIONS[name](self.visit(node.args[0]), axis=-1, keepdims=True)
        return super().call(node)


def _condition_label(condition: Mapping[str, float]) -> str:
    return ",".join(f"{k}={v:g}" for k, v in condition.items())


@dataclass(frozen=True)
class Composition:
    """The goal as a function of the solver's outputs, each quantity at each condition, vectorised over samples.

    Composite infill models what the solver returns (each quantity at each condition, a smooth
    function of the design) and computes the objective and the constraints by pushing samples of
    those models through the goal itself (Astudillo & Frazier 2019). ``outputs`` lists the
    (quantity, condition index) pairs the goal reads, in config order; quantities at conditions the
    goal never reads are not modelled. ``Y`` arrays have one column per output.
    """

    goal: Goal
    quantities: tuple[str, ...]
    conditions: tuple[Mapping[str, float], ...]
    baseline: Values | None
    outputs: tuple[tuple[str, int], ...]

    @property
    def labels(self) -> list[str]:
        """``quantity[condition]`` for each output, as the report and the ledger show it."""
        return [self.label(q, c) for q, c in self.outputs]

    def label(self, quantity: str, condition: int) -> str:
        """``lift[mach=0.6]``: a quantity at the condition of that index."""
        return f"{quantity}[{_condition_label(self.conditions[condition])}]"

    def values(self, Y: np.ndarray) -> dict[str, np.ndarray]:
        """Quantities of shape (n_samples, n_conditions) from output samples of shape (n_samples, n_outputs)."""
        Y = np.atleast_2d(np.asarray(Y, dtype=float))
        out = {q: np.zeros((Y.shape[0], len(self.conditions))) for q in self.quantities}
        for k, (q, c) in enumerate(self.outputs):
            out[q][:, c] = Y[:, k]
        return out

    def objective(self, Y: np.ndarray) -> np.ndarray:
        """The objective to *minimise* (negated for a maximised goal), shape (n_samples,)."""
        raw = self.goal.objective.evaluate_batch(self.values(Y), self.baseline, self.conditions)
        sign = 1.0 if self.goal.sense == "minimize" else -1.0
        return sign * np.broadcast_to(raw, (np.atleast_2d(Y).shape[0], 1))[:, 0]

    def margins(self, Y: np.ndarray) -> np.ndarray:
        """Each constraint's worst margin over conditions (positive = violated), shape (n_samples, n_constraints)."""
        values = self.values(Y)
        n = np.atleast_2d(Y).shape[0]
        columns = [c.margin_batch(values, self.baseline, self.conditions) for c in self.goal.constraints]
        return np.stack(columns, axis=1) if columns else np.zeros((n, 0))


def read_outputs(goal: Goal, quantities: Sequence[str], conditions: Sequence[Mapping[str, float]]) -> tuple[tuple[str, int], ...]:
    """The (quantity, condition index) pairs the objective or a constraint depends on, in config order.

    Found by poisoning one output at a time with NaN, which every allowed operation propagates
    (reductions, selectors, arithmetic), rather than by a second reading of the syntax tree.
    """
    n = len(conditions)
    ones = {q: np.ones((1, n)) for q in quantities}
    used = []
    for q in quantities:
        for c in range(n):
            poisoned = {**ones, q: ones[q].copy()}
            poisoned[q][0, c] = np.nan
            hit = np.isnan(goal.objective.evaluate_batch(poisoned, {k: v[0] for k, v in ones.items()}, conditions)).any()
            hit = hit or any(np.isnan(con.margin_batch(poisoned, {k: v[0] for k, v in ones.items()}, conditions)).any()
                             for con in goal.constraints)
            if hit:
                used.append((q, c))
    return tuple(used)


def model_rule(goal: Goal, quantities: Sequence[str], conditions: Sequence[Mapping[str, float]]) -> tuple[str, str]:
    """The default surrogate mode, ``"composite"`` or ``"direct"``, and why, in a few words.

    Composite when the goal reads a quantity at more than one condition or uses ``abs``, ``max``
    or ``min``: those put kinks into the objective (or a constraint) whose parts are smooth, and a
    model of the parts composes them exactly. Otherwise each quantity enters once and smoothly, and
    one model of the objective is as good and cheaper.
    """
    per_quantity: dict[str, int] = {}
    for q, _ in read_outputs(goal, quantities, conditions):
        per_quantity[q] = per_quantity.get(q, 0) + 1
    several = [f"{q} at {k} conditions" for q, k in per_quantity.items() if k > 1]
    trees = [goal.objective.tree] + [t for c in goal.constraints for t in (c.lhs.tree, c.rhs.tree)]
    kinks = sorted({n.func.id for t in trees for n in ast.walk(t)
                    if isinstance(n, ast.Call) and isinstance(n.func, ast.Name) and n.func.id in ("abs", "max", "min")})
    if several or kinks:
        why = "; ".join([*(["the goal reads " + ", ".join(several)] if several else []),
                         *(["it uses " + "/".join(kinks)] if kinks else [])])
        return "composite", why
    return "direct", "the goal reads each quantity at one condition, without abs/max/min"


def composition_problem(goal: Goal, quantities: Sequence[str], conditions: Sequence[Mapping[str, float]]) -> str | None:
    """A sentence saying why the goal cannot be computed from per-quantity models, or None if it can.

    The vectorised evaluation must reproduce the scalar one (what scores every design) on random
    values, and the goal must read at least one quantity the solver returns.
    """
    if not read_outputs(goal, quantities, conditions):
        return "plan.infill.model: composite needs a goal that reads at least one quantity; use model: direct"
    rng = np.random.default_rng(0)
    n = len(conditions)
    samples = {q: rng.uniform(0.5, 2.0, (4, n)) for q in quantities}
    base = {q: rng.uniform(0.5, 2.0, n) for q in quantities}
    for i in range(4):
        one = {q: v[i] for q, v in samples.items()}
        scalar = goal.score(one, base, conditions)
        batch_obj = np.broadcast_to(goal.objective.evaluate_batch(samples, base, conditions), (4, 1))[i, 0]
        batch_margins = [c.margin_batch(samples, base, conditions)[i] for c in goal.constraints]
        expected = [scalar.objective, *scalar.constraints.values()]
        if not np.allclose([batch_obj, *batch_margins], expected, rtol=1e-9, atol=1e-12, equal_nan=True):
            return ("plan.infill.model: the goal cannot be computed from models of each quantity at each condition "
                    "(its sample-wise evaluation disagrees with the design-wise one); use model: direct")
    return None


@dataclass(frozen=True)
class Score:
    """A design's goal values: the objective, each constraint's worst margin, and feasibility."""

    objective: float
    constraints: dict[str, float]
    feasible: bool


@dataclass(frozen=True)
class Goal:
    """The objective and constraints of a campaign, ready to score designs."""

    sense: str
    objective: Expression
    constraints: tuple[Constraint, ...]

    def uses_baseline(self) -> bool:
        return self.objective.uses_baseline() or any(c.uses_baseline() for c in self.constraints)

    def score(self, values: Values, baseline: Values | None, conditions: Sequence[Mapping[str, float]]) -> Score:
        """Score one design from its quantities, each of shape (n_conditions,)."""
        raw = self.objective.evaluate(values, baseline, conditions)
        objective = float(np.asarray(raw, dtype=float).reshape(-1)[0]) if np.size(raw) == 1 else float("nan")
        margins = {c.source: c.margin(values, baseline, conditions) for c in self.constraints}
        feasible = all(m <= 0.0 for m in margins.values()) and np.isfinite(objective)
        return Score(objective, margins, bool(feasible))

    def better(self, a: float, b: float) -> bool:
        """True when objective ``a`` is better than ``b``."""
        return a < b if self.sense == "minimize" else a > b
