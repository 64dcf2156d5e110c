"""Campaign configuration: YAML in, validated pydantic models out.

Validation happens once, here, at the edge; the rest of sortie trusts these objects. Every
problem becomes one line ``key.path: what is wrong; what is allowed`` and *all* problems are
reported together, so a user fixes a config in one pass. Unknown keys are errors, with a
"did you mean" when a known key is close.

Hostile or accidental input stays cheap and short: the file is read by :mod:`sortie.yamlsafe`
(1 MB, 50 levels, no aliases, no key given twice), every value quoted in a message goes through
:func:`sortie.shown.shown` (about 80 characters) and every line is capped at 200, designed
experiments are counted (:mod:`sortie.sizes`) before any is drawn, and a YAML boolean where a
number or text is expected is refused rather than turned into 1.0 or 0.0.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import os
import re
import stat
from collections.abc import Callable, Mapping
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from sortie import sizes
from sortie.errors import ConfigError, GoalError
from sortie.goal import RESERVED, Constraint, Expression, Goal, check_evaluable, composition_problem, model_rule
from sortie.shown import clip, one_line, shown
from sortie.space import DesignSpace, Parameter
from sortie.yamlsafe import MAX_BYTES, load_yaml, too_big

NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
SAMPLING_METHODS = ("sobol", "lhs", "full-factorial", "fractional-factorial", "central-composite", "one-at-a-time")
SIZED_METHODS = ("sobol", "lhs")
MAX_NAME = 64
#: Designs a campaign may spend: far beyond any solver campaign, well inside the ledger's integers.
MAX_BUDGET = 1_000_000


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class CampaignSection(_Section):
    """Who the campaign is: a name (used for its default folder) and the one random seed."""

    name: str = Field(min_length=1)
    seed: int = Field(default=0, ge=0, le=2**63 - 1)  # numpy's generators take non-negative seeds; SQLite holds 64 bits
    description: str = ""

    @field_validator("name")
    @classmethod
    def _plain_name(cls, v: str) -> str:
        if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.-]*", v):
            raise ValueError(f"{shown(v)} must be letters, digits, '_', '.' or '-' (it names a folder)")
        return v


class ParameterSpec(_Section):
    """One parameter: ``lower``/``upper`` (with ``integer``) or ``choices``; always a baseline."""

    lower: float | None = None
    upper: float | None = None
    choices: list[float | int | str] | None = None
    integer: bool = False
    baseline: float | int | str
    unit: str = ""
    fixed: bool = False

    @model_validator(mode="after")
    def _consistent(self) -> ParameterSpec:
        if self.choices is not None:
            if self.lower is not None or self.upper is not None or self.integer:
                raise ValueError("give either choices or lower/upper (with integer), not both")
            if len(self.choices) < 2 and not self.fixed:
                raise ValueError(f"choices ({shown(self.choices)}) must list at least two values")
            if len(set(map(str, self.choices))) != len(self.choices):
                raise ValueError(f"choices ({shown(self.choices)}) must not repeat a value")
            if self.baseline not in self.choices:
                raise ValueError(f"baseline ({shown(self.baseline)}) must be one of the choices {shown(self.choices)}")
            return self
        if self.lower is None or self.upper is None:
            raise ValueError("needs lower and upper bounds (or a list of choices)")
        if isinstance(self.baseline, str):
            raise ValueError(f"baseline ({shown(self.baseline)}) must be a number between lower and upper")
        if not np.isfinite([self.lower, self.upper]).all():
            raise ValueError("lower and upper must be finite numbers")
        if self.upper <= self.lower:
            raise ValueError(f"upper ({self.upper:g}) must be greater than lower ({self.lower:g})")
        if not self.lower <= self.baseline <= self.upper:
            raise ValueError(f"baseline ({self.baseline:g}) must lie between lower ({self.lower:g}) and upper ({self.upper:g})")
        if self.integer and not all(float(v).is_integer() for v in (self.lower, self.upper, self.baseline)):
            raise ValueError("an integer parameter needs whole-number lower, upper and baseline")
        return self

    def to_parameter(self, name: str) -> Parameter:
        if self.choices is not None:
            return Parameter(name, "choice", self.baseline, choices=tuple(self.choices), unit=self.unit, fixed=self.fixed)
        if self.integer:
            return Parameter(name, "integer", int(self.baseline), lower=float(self.lower), upper=float(self.upper),
                             unit=self.unit, fixed=self.fixed)
        return Parameter(name, "continuous", float(self.baseline), lower=self.lower, upper=self.upper,
                         unit=self.unit, fixed=self.fixed)


def case_relative_problem(name: str) -> str | None:
    """Why ``name`` cannot name a file inside a case folder, or None if it can.

    Quantities are read from the case folder only: an absolute path or a ``..`` would let a
    config (or a template) read any file the user can, such as ``/etc/passwd``.
    """
    if not name.strip():
        return "is empty; give a file name relative to the case folder"
    if "\0" in name:
        return "contains a NUL character; give a file name relative to the case folder"
    if name.startswith("~"):
        return "starts at a home folder ('~'); allowed: a path relative to the case folder, such as result.out"
    if PurePosixPath(name).is_absolute() or PureWindowsPath(name).drive:
        return "is an absolute path; allowed: a path relative to the case folder, such as result.out"
    if ".." in PurePosixPath(name.replace("\\", "/")).parts:
        return "contains '..'; allowed: a path inside the case folder, such as output/result.out"
    return None


class QuantitySpec(_Section):
    """Where a quantity is read: ``file`` plus exactly one rule, or nothing for in-process solvers."""

    file: str | None = None
    pattern: str | None = None
    key: str | None = None
    column: str | None = None
    json_path: str | None = None
    unit: str = ""

    @model_validator(mode="after")
    def _one_rule(self) -> QuantitySpec:
        rules = [r for r in ("pattern", "key", "column", "json_path") if getattr(self, r) is not None]
        if len(rules) > 1:
            raise ValueError(f"give one reading rule, not {len(rules)} ({', '.join(rules)}); allowed: pattern, key, column, json_path")
        if rules and self.file is None:
            raise ValueError(f"rule {rules[0]!r} needs the output file it reads (key 'file')")
        if self.file is not None and not rules:
            raise ValueError("needs a reading rule with 'file': one of pattern, key, column, json_path")
        if self.pattern is not None:
            try:
                compiled = re.compile(self.pattern)
            except re.error as err:
                raise ValueError(f"pattern {shown(self.pattern)} is not a valid regular expression ({clip(str(err))})") from None
            except (RecursionError, OverflowError, MemoryError):
                raise ValueError(f"pattern {shown(self.pattern)} is too complex to compile; simplify it") from None
            if "value" not in compiled.groupindex:
                raise ValueError(f"pattern {shown(self.pattern)} needs a named group (?P<value>...) around the number")
        return self

    @field_validator("file")
    @classmethod
    def _inside_case_folder(cls, v: str | None) -> str | None:
        if v is not None:
            problem = case_relative_problem(v)
            if problem:
                raise ValueError(f"file {shown(v)} {problem}")
        return v

    @property
    def rule(self) -> str | None:
        return next((r for r in ("pattern", "key", "column", "json_path") if getattr(self, r) is not None), None)


class GoalSection(_Section):
    """The objective (``minimize`` or ``maximize``) and constraints over quantities."""

    minimize: str | None = None
    maximize: str | None = None
    subject_to: list[str] = Field(default_factory=list)

    @model_validator(mode="after")
    def _one_direction(self) -> GoalSection:
        if (self.minimize is None) == (self.maximize is None):
            raise ValueError("give exactly one of minimize or maximize")
        return self

    @property
    def sense(self) -> Literal["minimize", "maximize"]:
        return "minimize" if self.minimize is not None else "maximize"

    def objective(self) -> Expression:
        return Expression.parse(self.minimize or self.maximize or "", where=f"goal.{self.sense}")

    def constraints(self) -> list[Constraint]:
        return [Constraint.parse(s, where=f"goal.subject_to[{i}]") for i, s in enumerate(self.subject_to)]

    def build(self) -> Goal:
        """The parsed goal, ready to score designs."""
        return Goal(self.sense, self.objective(), tuple(self.constraints()))


class StageSpec(_Section):
    """A designed experiment: method, size (for Latin hypercube and Sobol') and method options."""

    method: Literal["sobol", "lhs", "full-factorial", "fractional-factorial", "central-composite", "one-at-a-time"]
    designs: int | None = Field(default=None, gt=0)
    levels: int | None = Field(default=None, ge=2, le=11)
    variant: Literal["circumscribed", "face", "inscribed"] = "circumscribed"
    center_points: int = Field(default=1, ge=0, le=20)
    optimization: Literal["random-cd", "lloyd"] | None = None

    @model_validator(mode="after")
    def _size(self) -> StageSpec:
        if self.method in SIZED_METHODS and self.designs is None:
            raise ValueError(f"method {self.method!r} needs the number of designs (key 'designs')")
        if self.method not in SIZED_METHODS and self.designs is not None:
            raise ValueError(f"method {self.method!r} sets its own number of designs; remove 'designs' (allowed only for sobol and lhs)")
        if self.levels is not None and self.method not in ("full-factorial", "one-at-a-time"):
            raise ValueError(f"'levels' applies to full-factorial and one-at-a-time, not {self.method!r}")
        if self.optimization is not None and self.method != "lhs":
            raise ValueError(f"'optimization' applies to lhs only, not {self.method!r}")
        return self


ModelName = Literal["gp", "quadratic", "rbf"]


class InfillSpec(_Section):
    """Adaptive infill after the initial experiment: expected improvement until the budget is spent."""

    designs: int | None = Field(default=None, gt=0)
    models: list[ModelName] = Field(default_factory=lambda: ["gp", "quadratic", "rbf"], min_length=1)
    candidates: int = Field(default=2048, ge=64, le=1 << 20)
    restarts: int = Field(default=8, ge=1, le=100)
    min_distance: float = Field(default=0.001, gt=0, lt=0.5)
    stop_below: float | None = Field(default=None, gt=0, lt=1)
    incumbent: Literal["best-observed", "best-predicted"] = "best-observed"
    # composite: one model per quantity per condition, the goal composed from their samples; direct: one
    # model of the objective and of each margin. None: composite when the goal reads a quantity at more
    # than one condition or uses abs/max/min (CampaignConfig.surrogate_mode).
    model: Literal["composite", "direct"] | None = None


class ClassicSpec(_Section):
    """One-shot path: fit a surface to the initial experiment, optimise it, confirm the optimum once."""

    models: list[ModelName] = Field(default_factory=lambda: ["quadratic"], min_length=1)


class SelectSpec(_Section):
    """Which parameters stay free after screening: one rule. The others are fixed at their baseline."""

    top: int | None = Field(default=None, ge=1)
    fraction: float | None = Field(default=None, gt=0, le=1)
    keep: list[str] | None = Field(default=None, min_length=1)

    @model_validator(mode="after")
    def _one_rule(self) -> SelectSpec:
        given = [k for k in ("top", "fraction", "keep") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError(f"give exactly one rule: top (the k most important), fraction (of the largest importance) "
                             f"or keep (a list of names); got {', '.join(given) or 'none'}")
        return self


class ScreeningSpec(_Section):
    """A screening stage over every free parameter, then a selection carried into later stages.

    ``morris``: ``trajectories`` (r) elementary-effect paths on a ``levels``-level grid, r(k+1)
    designs. ``one-at-a-time``: a sweep of each parameter through ``levels`` values around the
    baseline, k(levels-1) designs; cheaper, but blind to interactions. ``surrogate``: ``designs``
    scrambled Sobol' points over all k parameters, a Gaussian process per goal output, and the
    total Sobol' indices of those processes (interactions included). Its designs fill the space,
    so unlike Morris grid points they remain a good experiment for the selected parameters and
    are not spent on screening alone; the price is that its numbers are only as good as the
    processes' leave-one-out error, which is recorded beside them.
    """

    method: Literal["morris", "one-at-a-time", "surrogate"] = "morris"
    trajectories: int = Field(default=6, ge=2, le=100)
    levels: int = Field(default=4, ge=2, le=20)
    designs: int | None = Field(default=None, ge=4, le=4096)
    select: SelectSpec = Field(default_factory=lambda: SelectSpec(fraction=0.1))

    @model_validator(mode="after")
    def _options_fit_method(self) -> ScreeningSpec:
        given = self.model_fields_set
        if self.method == "surrogate":
            wrong = [k for k in ("trajectories", "levels") if k in given]
            if wrong:
                raise ValueError(f"{' and '.join(repr(k) for k in wrong)} apply to morris and one-at-a-time; "
                                 f"method 'surrogate' takes 'designs' (Sobol' points over every free parameter)")
            return self
        if self.designs is not None:
            raise ValueError(f"'designs' applies to method 'surrogate'; {self.method} sets its size by "
                             f"{'trajectories and levels' if self.method == 'morris' else 'levels'}")
        if self.method == "one-at-a-time" and "trajectories" in given:
            raise ValueError("'trajectories' applies to morris, not one-at-a-time")
        if self.method == "morris" and self.levels % 2:
            raise ValueError(f"levels ({self.levels}) must be even for morris, so that every step is the same size")
        if self.method == "one-at-a-time" and self.levels < 3:
            raise ValueError(f"levels ({self.levels}) must be at least 3 for one-at-a-time, to see more than a slope")
        return self

    def n_designs(self, n_free: int) -> int:
        """Designs the stage runs over ``n_free`` parameters (the baseline not counted)."""
        if self.method == "morris":
            return self.trajectories * (n_free + 1)
        if self.method == "one-at-a-time":
            return n_free * (self.levels - 1)
        return self.designs if self.designs is not None else default_surrogate_designs(n_free)


def default_surrogate_designs(n_free: int) -> int:
    """The smallest power of two of at least 3k points (a power of two keeps the Sobol' balance).

    On the 20-parameter sled (6 active, ``fraction: 0.25``), 64 points kept exactly the active set
    in 10 of 10 seeds with a wide gap (root total index at least 0.35 against at most 0.21), while
    32 did so in 16 of 20 (3 kept inert parameters, 1 fixed an active one); 3k is the safe rule of
    thumb, and fewer points are a deliberate trade for infill budget.
    """
    return 1 << max(3 * n_free - 1, 1).bit_length()


class ConfirmationSpec(_Section):
    """Re-run the surrogate's predicted optimum at every condition, and compare prediction with result.

    ``designs`` confirmations are run, each at the predicted best point away from those already
    confirmed; one that turns out infeasible is marked, and another is tried while the budget allows.
    ``confidence``: the probability, under the surrogates, with which every constraint must hold
    at the point chosen (0.5 trusts the mean and lands on the constraint boundary).
    """

    designs: int = Field(default=1, ge=1, le=20)
    models: list[ModelName] | None = None
    confidence: float = Field(default=0.9, ge=0.5, lt=1)


class PlanSection(_Section):
    """The stages of the campaign, run in this order: screening, initial, infill or classic, confirmation.

    Only ``initial`` is required; each stage present runs once, and its ``designs`` is its share
    of the budget (infill without ``designs`` takes what the others leave).
    """

    screening: ScreeningSpec | None = None
    initial: StageSpec
    infill: InfillSpec | None = None
    classic: ClassicSpec | None = None
    confirmation: ConfirmationSpec | None = None

    @model_validator(mode="after")
    def _one_follow_up(self) -> PlanSection:
        if self.infill is not None and self.classic is not None:
            raise ValueError("give infill or classic after the initial experiment, not both")
        if self.classic is not None and self.confirmation is not None:
            raise ValueError("classic already confirms its optimum once; remove confirmation, or use infill before it")
        if self.screening is not None and self.initial.method not in SIZED_METHODS:
            raise ValueError(f"after screening the number of free parameters is known only at run time, so "
                             f"plan.initial.method must be sobol or lhs with 'designs' (got {self.initial.method!r})")
        return self

    def n_confirmations(self) -> int:
        """Designs reserved at the end of the plan for confirmation runs."""
        if self.classic is not None:
            return 1
        return self.confirmation.designs if self.confirmation is not None else 0


class BudgetSection(_Section):
    """What the campaign may spend: designs (the baseline counted) and/or cases; the tighter wins."""

    designs: int | None = Field(default=None, gt=0, le=MAX_BUDGET)
    cases: int | None = Field(default=None, gt=0, le=MAX_BUDGET * 100)

    @model_validator(mode="after")
    def _something(self) -> BudgetSection:
        if self.designs is None and self.cases is None:
            raise ValueError("give designs, cases or both (every design costs one case per condition)")
        return self

    def max_designs(self, n_conditions: int) -> int:
        """Designs the budget allows: each design costs one case per condition."""
        limits = [v for v in (self.designs, None if self.cases is None else self.cases // n_conditions) if v is not None]
        return min(limits)


class RetrySection(_Section):
    """How often a failed case is tried again, per failure class, and how long to wait between tries.

    Transient failures (a node lost, a job pre-empted or vanished) say nothing about the design,
    so they are retried by default. Solver and output failures usually repeat on the same input
    and are not, so they feed the failure-aware infill instead. Waits grow as
    ``backoff_s * 2**(k-1)`` for the k-th retry, up to ``backoff_max_s``.
    """

    transient: int = Field(default=3, ge=0, le=100)
    timeout: int = Field(default=0, ge=0, le=100)
    solver: int = Field(default=0, ge=0, le=100)
    output: int = Field(default=0, ge=0, le=100)
    backoff_s: float = Field(default=30.0, ge=0)
    backoff_max_s: float = Field(default=900.0, ge=0)

    def allowed(self, failure_class: str) -> int:
        """Retries allowed for a failure class (cancelled cases are never retried)."""
        return int(getattr(self, failure_class, 0)) if failure_class in ("transient", "timeout", "solver", "output") else 0

    def wait_s(self, retry: int) -> float:
        """Seconds to wait before the ``retry``-th retry (1-based)."""
        return min(self.backoff_max_s, self.backoff_s * 2.0 ** max(retry - 1, 0))


class CampaignConfig(_Section):
    """A whole campaign config; build it with :func:`load_config`."""

    campaign: CampaignSection
    parameters: dict[str, ParameterSpec] = Field(min_length=1)
    conditions: dict[str, list[float]] = Field(min_length=1)
    solver: dict[str, Any]
    quantities: dict[str, QuantitySpec] = Field(min_length=1)
    goal: GoalSection
    plan: PlanSection
    budget: BudgetSection
    slots: int = Field(default=1, gt=0, le=10000)
    retries: RetrySection = Field(default_factory=RetrySection)

    @field_validator("solver")
    @classmethod
    def _adapter_named(cls, v: dict[str, Any]) -> dict[str, Any]:
        if not isinstance(v.get("adapter"), str):
            raise ValueError("needs 'adapter', the name of an installed solver adapter (for example command or python)")
        return v

    @field_validator("conditions")
    @classmethod
    def _conditions(cls, v: dict[str, list[float]]) -> dict[str, list[float]]:
        lengths = {k: len(vals) for k, vals in v.items()}
        if any(n == 0 for n in lengths.values()):
            raise ValueError("every condition needs at least one value")
        if len(set(lengths.values())) > 1:
            shown = ", ".join(f"{k} has {n}" for k, n in lengths.items())
            raise ValueError(f"lists must have the same length ({shown}); position i of every list is condition i")
        points = list(zip(*v.values(), strict=True))
        if len(set(points)) != len(points):
            raise ValueError("a condition is listed twice")
        if not np.isfinite(np.asarray(points, dtype=float)).all():
            raise ValueError("condition values must be finite numbers")
        return v

    @model_validator(mode="after")
    def _cross_checks(self) -> CampaignConfig:
        problems: list[str] = []
        names = {"parameters": list(self.parameters), "conditions": list(self.conditions), "quantities": list(self.quantities)}
        seen: dict[str, str] = {}
        for section, keys in names.items():
            for key in keys:
                where = f"{section}.{clip(key, 40)}"
                if not NAME.match(key):
                    problems.append(f"{where}: names must be letters, digits and '_' and not start with a digit (they are used in templates and goal expressions)")
                elif len(key) > MAX_NAME:
                    problems.append(f"{where}: the name is {len(key)} characters long; allowed: at most {MAX_NAME}")
                elif key in RESERVED:
                    problems.append(f"{where}: {key!r} is reserved for goal expressions; choose another name")
                elif key in seen:
                    problems.append(f"{where}: the name is already used in {seen[key]}; names must be unique across parameters, conditions and quantities")
                seen.setdefault(key, section)
        if all(p.fixed for p in self.parameters.values()):
            problems.append("parameters: every parameter is fixed; at least one must be free")
        problems.extend(goal_problems(self.goal, list(self.quantities), self.condition_list()))
        if not problems and self.plan.infill is not None and self.plan.infill.model == "composite":
            problems.extend(filter(None, [composition_problem(self.goal.build(), list(self.quantities), self.condition_list())]))
        initial = self.plan.initial
        n_free = sum(not p.fixed for p in self.parameters.values())
        if initial.method == "fractional-factorial" and n_free < 3:
            problems.append(f"plan.initial.method: fractional-factorial needs at least 3 free parameters, the config has {n_free}")
        if initial.method == "central-composite" and n_free < 2:
            problems.append(f"plan.initial.method: central-composite needs at least 2 free parameters, the config has {n_free}")
        keep = self.plan.screening.select.keep if self.plan.screening is not None else None
        free = [n for n, p in self.parameters.items() if not p.fixed]
        for name in keep or []:
            if name not in free:
                problems.append(f"plan.screening.select.keep: {shown(name)} is not a free parameter; allowed: {', '.join(free)}")
        screening = self.plan.screening
        if screening is not None and screening.method == "surrogate" and screening.designs is not None \
                and screening.designs < n_free + 2:
            problems.append(f"plan.screening.designs: {screening.designs} Sobol' points cannot separate the effects of "
                            f"{n_free} free parameters; allowed: at least {n_free + 2} "
                            f"(default {default_surrogate_designs(n_free)})")
        if not problems:
            problems.extend(self._size_problems())
        if not problems:
            n_initial = sizes.initial_size(self.plan.initial, self.space())
            n_screen = self.designs_before_infill() - 1 - n_initial
            needed = 1 + n_screen + n_initial + self.plan.n_confirmations()
            what = f"the {sizes.count(n_screen)} designs of plan.screening, " if n_screen else ""
            what = f"the baseline plus {what}the {sizes.count(n_initial)} designs of plan.initial ({self.plan.initial.method})"
            if self.plan.classic is not None:
                what += " and the confirmation design of plan.classic"
            elif self.plan.confirmation is not None:
                what += f" and the {self.plan.confirmation.designs} design(s) of plan.confirmation"
            n_cond = len(self.condition_list())
            if self.budget.designs is not None and needed > self.budget.designs:
                problems.append(f"budget.designs: {self.budget.designs} cannot hold {what}; allowed: at least {sizes.count(needed)}")
            if self.budget.cases is not None and needed * n_cond > self.budget.cases:
                problems.append(f"budget.cases: {self.budget.cases} cannot hold {what} at {n_cond} conditions each; "
                                f"allowed: at least {sizes.count(needed * n_cond)}")
        if problems:
            raise _Problems(problems)
        return self

    def _size_problems(self) -> list[str]:
        """Designed experiments too large to make (memory, Sobol' dimensions), found before allocating."""
        space = self.space()
        initial = self.plan.initial
        n_initial = sizes.initial_size(initial, space)
        found = [sizes.stage_problem("plan.initial", initial.method, n_initial, sizes.allocated_points(initial, n_initial),
                                     space.n_dims)]
        if self.plan.screening is not None:
            screening = self.plan.screening
            n_screen = screening.n_designs(space.n_dims)
            found.append(sizes.stage_problem("plan.screening", screening.method, n_screen, n_screen, space.n_dims))
        return [p for p in found if p]

    def designs_before_infill(self) -> int:
        """The baseline, the screening designs and the initial experiment (their sizes are fixed).

        Counted, not drawn, so a huge plan is refused by the budget check before any array exists.
        """
        n_screen = self.plan.screening.n_designs(self.space().n_dims) if self.plan.screening is not None else 0
        return 1 + n_screen + sizes.initial_size(self.plan.initial, self.space())

    def target_designs(self) -> int:
        """How many designs the campaign records in all: the budget, or less if the plan says so."""
        fixed = self.designs_before_infill()
        budget = self.budget.max_designs(len(self.condition_list()))
        confirm = self.plan.n_confirmations()
        if self.plan.infill is None:
            return min(budget, fixed + confirm)
        if self.plan.infill.designs is None:
            return budget
        return min(budget, fixed + self.plan.infill.designs + confirm)

    def surrogate_mode(self) -> tuple[Literal["composite", "direct"], str]:
        """Whether infill and the fitted surfaces model each quantity at each condition or the goal, and why."""
        chosen = self.plan.infill.model if self.plan.infill is not None else None
        if chosen is not None:
            return chosen, "set by plan.infill.model"
        goal, quantities, conditions = self.goal.build(), list(self.quantities), self.condition_list()
        mode, why = model_rule(goal, quantities, conditions)
        problem = composition_problem(goal, quantities, conditions) if mode == "composite" else None
        return ("direct", problem) if problem else (mode, why)  # type: ignore[return-value]

    def condition_list(self) -> list[dict[str, float]]:
        """The conditions as one mapping per operating point, in config order."""
        return [dict(zip(self.conditions, point, strict=True)) for point in zip(*self.conditions.values(), strict=True)]

    def space(self) -> DesignSpace:
        return DesignSpace(tuple(spec.to_parameter(name) for name, spec in self.parameters.items()))


def goal_problems(goal: GoalSection, quantities: list[str], conditions: list[dict[str, float]]) -> list[str]:
    """Problems with the goal's expressions against the quantities and conditions."""
    problems: list[str] = []
    try:
        objective = goal.objective()
        objective.check(quantities, conditions)
        ramp = {q: np.arange(1.0, len(conditions) + 1) for q in quantities}
        value = objective.evaluate(ramp, ramp, conditions)
        if np.ndim(value) and np.size(value) > 1:
            problems.append(f"goal.{goal.sense}: {shown(objective.source)} gives one value per condition; reduce it to one number with max(), min(), mean() or a selector such as [{next(iter(conditions[0]))}=...]")
        else:
            check_evaluable(objective, quantities, conditions)
    except GoalError as err:
        problems.append(str(err))
    for i, source in enumerate(goal.subject_to):
        try:
            constraint = Constraint.parse(source, where=f"goal.subject_to[{i}]")
            constraint.check(quantities, conditions)
            check_evaluable(constraint.lhs, quantities, conditions)
            check_evaluable(constraint.rhs, quantities, conditions)
        except GoalError as err:
            problems.append(str(err))
    return problems


def _goal_problems_from_raw(raw: dict[str, Any], failed_sections: set[str]) -> list[str]:
    """Goal problems when the whole config did not validate but the sections the goal needs did.

    Pydantic skips model validators once a field has failed; this keeps "every problem in one
    pass" true for goal expressions, the most common thing to get wrong.
    """
    if failed_sections & {"goal", "quantities", "conditions"}:
        return []
    try:
        goal = GoalSection.model_validate(raw.get("goal"))
        conditions = CampaignConfig._conditions(dict(raw.get("conditions") or {}))
        quantities = list(raw.get("quantities") or {})
    except (ValidationError, ValueError, TypeError):
        return []
    if not conditions or not quantities:
        return []
    points = [dict(zip(conditions, p, strict=True)) for p in zip(*conditions.values(), strict=True)]
    return goal_problems(goal, quantities, points)


class _Problems(ValueError):
    """Carries several already-formatted lines out of a model validator."""

    def __init__(self, lines: list[str]) -> None:
        self.lines = lines
        super().__init__("\n".join(lines))


SolverCheck = Callable[[Mapping[str, Any], Path, Mapping[str, Any]], list[str]]


def load_config(path: Path, *, check_solver: SolverCheck | None = None) -> CampaignConfig:
    """Read and validate a campaign config file.

    Parameters
    ----------
    path : Path
        The YAML file. Relative paths inside it are relative to its folder.
    check_solver : callable, optional
        ``check_solver(solver_section, base_dir, quantities_section) -> problems``, supplied by the adapter registry so
        that adapter options are checked in the same pass (core does not import adapters).

    Raises
    ------
    ConfigError
        With one line per problem.
    """
    path = Path(path)
    text = read_config_text(path)
    return parse_config(text, base_dir=path.resolve().parent, source=clip(str(path)), check_solver=check_solver)


def read_config_text(path: Path) -> str:
    """The text of a config file, or one ConfigError line saying why it cannot be had.

    The file is looked at before it is opened (opening a FIFO would wait for a writer) and read
    up to one byte past the size cap, so a huge file or a device (``/dev/zero``) costs nothing
    before it is refused.
    """
    where = clip(str(path))
    try:
        info = os.stat(path)
        if stat.S_ISDIR(info.st_mode):
            raise ConfigError([f"{where}: is a folder; give the campaign's YAML file"])
        if not stat.S_ISREG(info.st_mode):
            raise ConfigError([f"{where}: is not a regular file (a device, pipe or socket); give the campaign's YAML file"])
        if info.st_size > MAX_BYTES:
            raise ConfigError([too_big(where, info.st_size)])
        with open(path, "rb") as handle:
            data = handle.read(MAX_BYTES + 1)
    except FileNotFoundError:
        raise ConfigError([f"{where}: no such config file"]) from None
    except PermissionError:
        raise ConfigError([f"{where}: cannot be read (permission denied); allow reading it or copy it"]) from None
    except OSError as err:
        raise ConfigError([f"{where}: cannot be read ({clip(err.strerror or str(err))})"]) from None
    if len(data) > MAX_BYTES:
        raise ConfigError([too_big(where, len(data))])
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as err:
        line = data[: err.start].count(b"\n") + 1
        raise ConfigError([f"{where} line {line}: is not UTF-8 text (byte 0x{data[err.start]:02x}); save the config as UTF-8"]) from None


def parse_config(text: str, *, base_dir: Path, source: str = "config", check_solver: SolverCheck | None = None) -> CampaignConfig:
    """Validate config text; see :func:`load_config`."""
    raw = load_yaml(text, source)
    if raw is None:
        raise ConfigError([f"{source}: is empty; a config is a mapping of sections (campaign, parameters, conditions, solver, quantities, goal, plan, budget)"])
    if not isinstance(raw, dict):
        raise ConfigError([f"{source}: the top level must be a mapping of sections (campaign, parameters, conditions, solver, quantities, goal, plan, budget, slots), got {type(raw).__name__}"])
    problems: list[str] = []
    config: CampaignConfig | None = None
    try:
        config = CampaignConfig.model_validate(_mark_booleans(raw))
    except ValidationError as err:
        problems.extend(format_validation_errors(err, CampaignConfig))
        failed = {str(e["loc"][0]) for e in err.errors() if e["loc"]}
        problems.extend(_goal_problems_from_raw(raw, failed))
    if check_solver is not None and isinstance(raw.get("solver"), dict) and isinstance(raw["solver"].get("adapter"), str):
        problems.extend(check_solver(raw["solver"], base_dir, raw.get("quantities") if isinstance(raw.get("quantities"), dict) else {}))
    if problems:
        raise ConfigError([one_line(p) for p in dict.fromkeys(problems)])
    assert config is not None
    return config


class YamlBoolean:
    """A YAML boolean where the config wants a number or text; no type accepts it, so pydantic
    reports it at its own key path and :func:`format_validation_errors` adds the quoting hint.
    (``choices: [yes, no]`` must never become ``[1.0, 0.0]``.)"""

    def __init__(self, value: bool) -> None:
        self.value = value

    def __repr__(self) -> str:
        return "true" if self.value else "false"


def _bool_fields() -> frozenset[str]:
    """Config keys whose values are booleans (``fixed: yes`` is fine)."""
    models = [CampaignSection, ParameterSpec, QuantitySpec, GoalSection, StageSpec, InfillSpec, ClassicSpec, SelectSpec,
              ScreeningSpec, ConfirmationSpec, PlanSection, BudgetSection, RetrySection, CampaignConfig]
    return frozenset(name for m in models for name, f in m.model_fields.items() if f.annotation is bool)


_BOOL_FIELDS = _bool_fields()


def _mark_booleans(raw: Any, key: Any = None) -> Any:
    """``raw`` with every boolean outside a boolean key wrapped in :class:`YamlBoolean`.

    The solver section is left alone: adapters validate their own options.
    """
    if isinstance(raw, bool):
        return raw if key in _BOOL_FIELDS else YamlBoolean(raw)
    if isinstance(raw, dict):
        return {k: v if (key is None and k == "solver") else _mark_booleans(v, k) for k, v in raw.items()}
    if isinstance(raw, list):
        return [_mark_booleans(v, key) for v in raw]
    return raw


def config_hash(text: str) -> str:
    """Hash of the config's meaning (parsed YAML, keys sorted), blind to comments and layout."""
    canonical = json.dumps(load_yaml(text, "config"), sort_keys=True, default=str)
    return hashlib.sha256(canonical.encode()).hexdigest()[:16]


def format_validation_errors(err: ValidationError, model: type[BaseModel], prefix: str = "") -> list[str]:
    """One line per pydantic error: ``key.path: message (got value)``, with "did you mean"."""
    lines: list[str] = []
    typed: set[str] = set()
    for e in err.errors(include_url=False):
        ctx = e.get("ctx") or {}
        if isinstance(ctx.get("error"), _Problems):
            lines.extend(ctx["error"].lines)
            continue
        loc = [p for p in e["loc"] if not (isinstance(p, str) and p in _TYPE_TAGS)]
        path = prefix + ".".join(clip(str(p), 40) for p in loc) if loc else (prefix.rstrip(".") or "config")
        kind = e["type"]
        boolean = isinstance(e.get("input"), YamlBoolean)
        if boolean:  # one line per key, not one per list item
            while loc and isinstance(loc[-1], int):
                loc.pop()
            path = prefix + ".".join(clip(str(p), 40) for p in loc) if loc else (prefix.rstrip(".") or "config")
        if (kind in _TYPE_ERRORS or boolean) and path in typed:
            continue  # one line per key when a value fits none of the types of a union
        if kind in _TYPE_ERRORS or boolean:
            typed.add(path)
        if boolean:
            lines.append(f"{path}: holds {e['input']!r}, a YAML boolean (unquoted yes, no, on, off, true, false); "
                         f"quote it ('yes') to mean text, or give a number")
        elif kind == "extra_forbidden":
            *parent, key = e["loc"]
            allowed = _allowed_keys(model, parent)
            hint = difflib.get_close_matches(str(key)[:100], allowed, n=1, cutoff=0.6)
            did = f"; did you mean {hint[0]!r}?" if hint else ""
            lines.append(f"{path}: unknown key{did} (allowed here: {', '.join(allowed)})")
        elif kind == "missing":
            lines.append(f"{path}: required key is missing")
        else:
            msg = e["msg"].removeprefix("Value error, ").removeprefix("Assertion failed, ")
            msg = _INSTANCE_OF.sub("a mapping of keys", msg)
            given = e.get("input")
            value = "" if kind == "value_error" or isinstance(given, dict) else f" (got {shown(given)})"
            lines.append(f"{path}: {clip(msg, 160)}{value}")
    return lines


_INSTANCE_OF = re.compile(r"a valid dictionary or instance of \w+")
_TYPE_TAGS = {"float", "int", "str", "bool", "list[union[float,int,str]]"}
_TYPE_ERRORS = {"float_type", "float_parsing", "int_type", "int_parsing", "string_type", "bool_type", "bool_parsing",
                "int_from_float", "list_type", "dict_type"}


def _allowed_keys(model: type[BaseModel], parent: list[Any]) -> list[str]:
    """Walk the model tree along ``parent`` (skipping dict keys) to list the allowed keys."""
    current: Any = model
    for part in parent:
        fields = getattr(current, "model_fields", None)
        if fields is None:
            break
        if part in fields:
            current = _inner_model(fields[part].annotation)
        # a dict key (parameter name and the like) keeps the same model
    fields = getattr(current, "model_fields", None) or {}
    return list(fields)


def _inner_model(annotation: Any) -> Any:
    args = getattr(annotation, "__args__", ())
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for a in reversed(args):
        if isinstance(a, type) and issubclass(a, BaseModel):
            return a
    return annotation
