"""A read-only Python API for notebooks: a campaign's designs, cases, best design, surrogates and analyses.

A design review happens in a notebook as often as in a report, so everything the report shows
is reachable here as plain pandas objects, computed from the ledger alone. The ledger is opened
read-only for each call and closed again, so a view is safe beside a campaign that is still
running (WAL mode lets readers in while the orchestrator writes) and every call sees the latest
committed state.

Examples
--------
>>> from sortie.api import open_campaign
>>> camp = open_campaign("campaigns/demo-sled-aftbody")                # doctest: +SKIP
>>> camp.designs().sort_values("objective").head()                    # doctest: +SKIP
>>> best = camp.best()                                                # doctest: +SKIP
>>> model = camp.surrogate("objective")                               # doctest: +SKIP
>>> mean, std = model.predict({**best[list(camp.config.parameters)].to_dict(), "ramp_angle": 5.0})  # doctest: +SKIP
>>> lift = camp.surrogate("lift[mach=1.1]").predict(camp.designs())   # doctest: +SKIP
"""

from __future__ import annotations

import json
import math
import re
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from threadpoolctl import threadpool_limits

from sortie import campaign as campaign_folder
from sortie.config import CampaignConfig
from sortie.errors import SortieError
from sortie.infill import MIN_POINTS, History, InfillSettings, fit_models
from sortie.ledger import CaseRow, DesignRow, Ledger, ledger_path
from sortie.models import ModelScore, Surrogate
from sortie.space import DesignSpace
from sortie.status import best_design, design_table

__all__ = ["ApiError", "CampaignSurrogate", "CampaignView", "Snapshot", "case_table", "open_campaign"]

# Physical values may carry a little round-off from the unit-cube map (or a CSV round-trip).
_BOUND_TOL = 1e-9
_TARGET_AT = re.compile(r"^\s*([A-Za-z_]\w*)\s*\[(.*)\]\s*$")


class ApiError(SortieError, ValueError):
    """A request the campaign cannot answer (unknown target, values outside the space, too few designs)."""


def case_table(ledger: Ledger, config: CampaignConfig) -> pd.DataFrame:
    """One row per case: id, design, condition, state, attempts, job id, quantities, failure, times.

    Columns are ``id, design, condition_index``, one column per condition variable, ``state,
    attempts, job_id``, one column per quantity (NaN until the case is done), ``failure_class,
    failure_reason, started_at, ended_at`` (seconds since the epoch, as the ledger keeps them, so
    that a CSV round-trip is exact). The order is the ledger's: by case id.
    """
    conditions = list(config.conditions)
    quantities = list(config.quantities)
    rows = []
    for c in ledger.iter_cases():  # one row object at a time; only the table's cells are kept
        row: dict[str, Any] = {"id": c.id, "design": c.design_id, "condition_index": c.condition_index}
        row.update({k: c.condition.get(k) for k in conditions})
        row.update({"state": c.state, "attempts": c.attempts, "job_id": c.job_id})
        row.update({q: (c.quantities or {}).get(q, math.nan) for q in quantities})
        row.update({"failure_class": c.failure_class, "failure_reason": c.failure_reason,
                    "started_at": c.started_at, "ended_at": c.ended_at})
        rows.append(row)
    columns = ["id", "design", "condition_index", *conditions, "state", "attempts", "job_id", *quantities,
               "failure_class", "failure_reason", "started_at", "ended_at"]
    table = pd.DataFrame(rows, columns=columns)
    for q in quantities:  # a column of NaN only (nothing done yet) must still be numeric
        table[q] = pd.to_numeric(table[q])
    return table


@dataclass(frozen=True)
class Snapshot:
    """The ledger's rows at one moment (see :meth:`CampaignView.snapshot`)."""

    designs: list[DesignRow]
    cases: list[CaseRow]
    attempts: list[dict[str, Any]]
    models: dict[str, dict[str, Any]]
    analyses: list[dict[str, Any]]
    events: list[dict[str, Any]]
    taken_at: float


@dataclass
class CampaignSurrogate:
    """A surrogate of one target fitted on a campaign's finished designs, in physical units.

    Attributes
    ----------
    target : str
        ``"objective"``, a constraint's source text (its margin: positive = violated), or a
        quantity at one condition, written ``"lift[mach=1.1]"``.
    model : Surrogate
        The fitted model on the unit cube over the free parameters (see :mod:`sortie.models`).
    scores : tuple of ModelScore
        Leave-one-out score of every candidate tried, the chosen one included.
    space : DesignSpace
        Maps physical values to the unit cube.
    design_ids : tuple of int
        The designs the model was fitted on, in the row order of ``X`` and ``y``.
    X : ndarray of shape (n_points, n_dims)
        Unit-cube inputs.
    y : ndarray of shape (n_points,)
        Observed values of the target.
    unit : str
        Unit of the target (the quantity's unit from the config; empty for the objective and margins).
    """

    target: str
    model: Surrogate
    scores: tuple[ModelScore, ...]
    space: DesignSpace
    design_ids: tuple[int, ...]
    X: np.ndarray
    y: np.ndarray
    unit: str = ""
    _loo: pd.DataFrame | None = field(default=None, repr=False)

    @property
    def name(self) -> str:
        """The chosen model's name (``gp``, ``quadratic`` or ``rbf``)."""
        return self.model.name

    @property
    def score(self) -> ModelScore:
        """The chosen model's leave-one-out score."""
        return next(s for s in self.scores if s.name == self.model.name)

    def predict(self, values: Mapping[str, Any] | Sequence[Mapping[str, Any]] | pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
        """Mean and standard deviation of the target at designs given in physical units.

        Parameters
        ----------
        values : mapping, sequence of mappings, or DataFrame
            One design as ``{parameter: value}`` (values may also be equal-length lists), several
            as a list of such mappings, or a DataFrame with one column per free parameter (extra
            columns, such as those of :meth:`CampaignView.designs`, are ignored).

        Returns
        -------
        mean, std : ndarray of shape (n_points,)
            In the target's units. ``std`` is NaN for a model without one (``rbf``).

        Raises
        ------
        ApiError
            A free parameter is missing, or a value lies outside its bounds or choices: the model
            knows nothing there.
        """
        return self.predict_unit(self.to_unit(values))

    def predict_unit(self, U: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Mean and std at unit-cube points of shape (n_points, n_dims) (the plots' fast path)."""
        mean, std = self.model.predict(np.atleast_2d(np.asarray(U, dtype=float)), return_std=True)
        return np.asarray(mean, dtype=float), np.asarray(std, dtype=float)

    def to_unit(self, values: Mapping[str, Any] | Sequence[Mapping[str, Any]] | pd.DataFrame) -> np.ndarray:
        """Physical designs to unit-cube points, shape (n_points, n_dims), checking every value."""
        frame = _as_frame(values)
        columns = []
        for p in self.space.free:
            if p.name not in frame.columns:
                raise ApiError(f"parameter {p.name!r} is missing; give every free parameter "
                               f"({', '.join(q.name for q in self.space.free)})")
            column = []
            for v in frame[p.name]:
                if p.kind == "choice":
                    hit = [c for c in p.choices if c == v or str(c) == str(v)]
                    if not hit:
                        raise ApiError(f"parameter {p.name!r}: {v!r} is not one of its choices {list(p.choices)}")
                    column.append(p.to_unit(hit[0]))
                    continue
                try:
                    x = float(v)
                except (TypeError, ValueError):
                    raise ApiError(f"parameter {p.name!r}: {v!r} is not a number") from None
                span = float(p.upper) - float(p.lower)  # type: ignore[arg-type]
                if not (p.lower - _BOUND_TOL * span <= x <= p.upper + _BOUND_TOL * span):  # type: ignore[operator]
                    raise ApiError(f"parameter {p.name!r}: {x:g} is outside its bounds [{p.lower:g}, {p.upper:g}]; "
                                   "the surrogate is fitted inside the design space only")
                if p.kind == "integer":
                    if not float(x).is_integer():
                        raise ApiError(f"parameter {p.name!r}: {x:g} is not a whole number")
                    column.append(p.to_unit(int(x)))
                else:
                    column.append(min(max(p.to_unit(x), 0.0), 1.0))
            columns.append(column)
        return np.array(columns, dtype=float).T.reshape(len(frame), self.space.n_dims)

    def loo(self) -> pd.DataFrame:
        """Leave-one-out check: design, actual, predicted (by the model fitted without it), residual.

        The residuals come from the model's closed form (no refits); for a GP its std without the
        point (``loo_std``) is added when available.
        """
        if self._loo is None:
            residuals = np.asarray(self.model.loo_residuals(), dtype=float)
            table = pd.DataFrame({"design": list(self.design_ids), "actual": self.y,
                                  "predicted": self.y - residuals, "residual": residuals})
            loo_std = getattr(self.model, "loo_std", None)
            table["predicted_std"] = np.asarray(loo_std(), dtype=float) if callable(loo_std) else np.nan
            self._loo = table
        return self._loo.copy()


class CampaignView:
    """A campaign folder opened read-only; build it with :func:`open_campaign`.

    Every method reads the ledger afresh, so calling it again while the campaign runs shows the
    new designs. ``config`` is the config recorded in the ledger when the view was opened.
    """

    def __init__(self, directory: Path) -> None:
        self.directory = Path(directory)
        self.path = ledger_path(self.directory)
        self.config: CampaignConfig
        self.config, self.base_dir = campaign_folder.load(self.directory)
        self._fits: dict[tuple[Any, ...], CampaignSurrogate] = {}

    def __repr__(self) -> str:
        return f"CampaignView({str(self.directory)!r}, campaign={self.config.campaign.name!r})"

    def ledger(self) -> Ledger:
        """A read-only ledger connection (close it, or use it in a ``with`` block)."""
        return Ledger.open(self.path, readonly=True)

    @property
    def space(self) -> DesignSpace:
        return self.config.space()

    # -- tables ----------------------------------------------------------------------------
    def designs(self) -> pd.DataFrame:
        """One row per design, the same table as ``sortie export`` (:func:`sortie.status.design_table`)."""
        with self.ledger() as ledger:
            return design_table(ledger, self.config)

    def cases(self) -> pd.DataFrame:
        """One row per case (:func:`case_table`)."""
        with self.ledger() as ledger:
            return case_table(ledger, self.config)

    def attempts(self) -> pd.DataFrame:
        """One row per start of a case: case, number, state, job id, times, failure class and reason."""
        with self.ledger() as ledger:
            rows = ledger.attempts()
        columns = ["id", "case_id", "number", "state", "job_id", "pgid", "started_at", "ended_at", "failure_class", "reason"]
        return pd.DataFrame(rows, columns=columns).rename(columns={"case_id": "case"})

    def events(self) -> pd.DataFrame:
        """The ledger's event log: id, at (seconds since the epoch), kind, message, data (parsed JSON)."""
        with self.ledger() as ledger:
            rows = ledger.events()
        for r in rows:
            r["data"] = json.loads(r.pop("data_json")) if r.get("data_json") else None
        return pd.DataFrame(rows, columns=["id", "at", "kind", "message", "data"])

    def design_rows(self) -> list[DesignRow]:
        """The designs as recorded (with the prediction made when each was proposed)."""
        with self.ledger() as ledger:
            return ledger.designs()

    def model_choices(self) -> pd.DataFrame:
        """The campaign's latest surrogate choice per target, one row per candidate with its LOO score."""
        with self.ledger() as ledger:
            choices = ledger.model_choices()
        rows = []
        for target, entry in choices.items():
            for s in entry["scores"]:
                rmse = s.get("loo_rmse")
                rows.append({"target": target, "model": s.get("name"), "chosen": s.get("name") == entry["chosen"],
                             "n_points": entry["n_points"], "loo_rmse": math.inf if rmse is None else rmse,
                             "loo_r2": s.get("loo_r2"), "note": s.get("note", "")})
        return pd.DataFrame(rows, columns=["target", "model", "chosen", "n_points", "loo_rmse", "loo_r2", "note"])

    # -- answers ---------------------------------------------------------------------------
    def best(self) -> pd.Series | None:
        """The best feasible design as a row of :meth:`designs`, or None while no design is feasible.

        Best means lowest objective for ``minimize`` and highest for ``maximize``, as in
        ``sortie status``; the prediction made when it was proposed is added as ``predicted``
        (NaN for designs of the initial experiment).
        """
        rows = self.design_rows()
        best = best_design(rows, self.config.goal.sense)
        if best is None or not best.feasible:
            return None
        table = self.designs().set_index("id", drop=False)
        row = table.loc[best.id].copy()
        row["predicted"] = (best.prediction or {}).get("objective_mean", math.nan)
        row.name = best.id
        return row

    def baseline(self) -> pd.Series | None:
        """The baseline design's row of :meth:`designs`, or None before it is recorded."""
        table = self.designs()
        hits = table[table["stage"] == "baseline"]
        return None if hits.empty else hits.iloc[0]

    def screening(self) -> dict[str, Any] | None:
        """The latest screening analysis (``{"id", "at", "kind", "data"}``), or None if none was recorded."""
        return self._latest("screening")

    def sobol(self) -> dict[str, Any] | None:
        """The latest Sobol' indices analysis, or None if none was recorded."""
        return self._latest("sobol")

    def analyses(self, kind: str | None = None) -> list[dict[str, Any]]:
        """Every recorded analysis of ``kind`` (all kinds if None), oldest first."""
        with self.ledger() as ledger:
            return ledger.analyses(kind)

    def _latest(self, kind: str) -> dict[str, Any] | None:
        found = self.analyses(kind)
        return found[-1] if found else None

    def targets(self) -> list[str]:
        """The targets a surrogate can be asked for: the objective, each constraint, each quantity at each condition."""
        out = ["objective", *self.config.goal.subject_to]
        for q in self.config.quantities:
            out.extend(_quantity_target(q, c) for c in self.config.condition_list())
        return out

    def snapshot(self) -> Snapshot:
        """Everything the ledger holds, read in one go, for several answers from the same state."""
        with self.ledger() as ledger:
            return Snapshot(designs=ledger.designs(), cases=ledger.cases(), attempts=ledger.attempts(),
                            models=ledger.model_choices(), analyses=ledger.analyses(), events=ledger.events(),
                            taken_at=time.time())

    def surrogate(self, target: str = "objective", *, condition: Mapping[str, float] | int | None = None,
                  models: Sequence[str] | None = None, snapshot: Snapshot | None = None) -> CampaignSurrogate:
        """A surrogate of ``target`` fitted on every finished design, predicting in physical units.

        The model is chosen as the campaign chooses its own (:func:`sortie.infill.fit_models`:
        the candidates of the config's infill or classic stage, ranked by leave-one-out error,
        preferring those that give a standard deviation), so it matches what the infill used,
        refitted on everything finished now.

        After a screening stage the model spans only the parameters screening kept free
        (:meth:`active_space`); ``predict`` then needs only those.

        Parameters
        ----------
        target : str
            ``"objective"``; a constraint exactly as written in ``goal.subject_to`` (its margin,
            positive = violated); or a quantity at one condition, ``"lift[mach=1.1]"`` or
            ``"lift"`` with ``condition``.
        condition : mapping or int, optional
            The condition of a quantity target, as ``{"mach": 1.1}`` or its index in the config;
            not needed when the campaign has a single condition.
        models : sequence of str, optional
            Candidate models (default: the config's).
        snapshot : Snapshot, optional
            Fit on this state of the ledger instead of reading it again (the report does, so that
            every figure shows the same moment).

        Raises
        ------
        ApiError
            For an unknown target or condition, or fewer finished designs than a model needs.
        """
        cfg = self.config
        if snapshot is None:
            snapshot = self.snapshot()
        rows, cases = snapshot.designs, snapshot.cases
        space = self.active_space(snapshot)
        unit = ""
        name, index = self._resolve(target, condition)
        if name == "objective":
            label = "objective"
            data = [(d.id, d.values, d.objective) for d in rows if d.status == "done"]
        elif name in cfg.goal.subject_to:
            label = name
            data = [(d.id, d.values, (d.constraints or {}).get(name)) for d in rows if d.status == "done"]
        else:
            assert index is not None
            label = _quantity_target(name, cfg.condition_list()[index])
            unit = cfg.quantities[name].unit
            values = {d.id: d.values for d in rows}
            data = [(c.design_id, values[c.design_id], (c.quantities or {}).get(name)) for c in cases
                    if c.state == "done" and c.condition_index == index and c.design_id in values]
        data = [(i, v, float(y)) for i, v, y in data if y is not None and math.isfinite(float(y))]
        if len(data) < MIN_POINTS:
            raise ApiError(f"target {label!r}: {len(data)} finished designs so far; a surrogate needs at least {MIN_POINTS}")
        ids = tuple(i for i, _, _ in data)
        # from the values, in the space still free, as the campaign's own history does
        X = space.to_unit([v for _, v, _ in data])
        y = np.array([v for _, _, v in data], dtype=float)
        candidates = tuple(models) if models else self._candidates()
        key = (label, candidates, ids, y.tobytes())
        if key in self._fits:
            return self._fits[key]
        history = History(X=X, objective=y, margins=np.empty((len(y), 0)), succeeded=np.ones(len(y), bool),
                          pending=np.empty((0, space.n_dims)))
        try:
            # one BLAS thread, as the campaign's own fits: on small machines threaded BLAS on
            # matrices this size is ten times slower, not faster
            with threadpool_limits(limits=1, user_api="blas"):
                fitted = fit_models(history, InfillSettings(models=candidates), cfg.campaign.seed)
        except ValueError as err:
            raise ApiError(f"target {label!r}: no surrogate could be fitted ({err})") from None
        assert fitted is not None  # at least MIN_POINTS usable points
        result = CampaignSurrogate(label, fitted.objective, tuple(fitted.scores["objective"]), space, ids, X, y, unit)
        self._fits[key] = result
        return result

    def active_space(self, snapshot: Snapshot | None = None) -> DesignSpace:
        """The space the campaign's surrogates work in: after a screening stage, only the parameters it kept free.

        Parameters screening fixed stay at their baseline in every later design, so a model over
        them would only learn from the screening runs; the campaign leaves them out, and so does
        this view.
        """
        analyses = (snapshot.analyses if snapshot is not None else self.analyses())
        screening = [a for a in analyses if a["kind"] == "screening"]
        space = self.config.space()
        if screening and screening[-1]["data"].get("selected"):
            selected = [n for n in screening[-1]["data"]["selected"] if n in {p.name for p in space.free}]
            if selected:
                return space.keep_free(selected)
        return space

    def _candidates(self) -> tuple[str, ...]:
        plan = self.config.plan
        if plan.infill is not None:
            return tuple(plan.infill.models)
        if plan.classic is not None:
            return tuple(plan.classic.models)
        return InfillSettings().models

    def _resolve(self, target: str, condition: Mapping[str, float] | int | None) -> tuple[str, int | None]:
        """``(name, condition index)`` of a target; the index is None for the objective and constraints."""
        cfg = self.config
        if target == "objective" or target in cfg.goal.subject_to:
            if condition is not None:
                raise ApiError(f"target {target!r} is one number per design; condition applies to quantities only")
            return target, None
        name, selector = target, None
        match = _TARGET_AT.match(target)
        if match:
            name, selector = match.group(1), match.group(2)
        if name not in cfg.quantities:
            allowed = ", ".join(repr(t) for t in ["objective", *cfg.goal.subject_to, *cfg.quantities])
            raise ApiError(f"target {target!r} is unknown; allowed: {allowed} (a quantity with [condition=value])")
        points = cfg.condition_list()
        if selector is not None:
            if condition is not None:
                raise ApiError(f"target {target!r} already names its condition; drop condition=")
            condition = _parse_selector(selector, target)
        if condition is None:
            if len(points) == 1:
                return name, 0
            shown = ", ".join(_quantity_target(name, c) for c in points)
            raise ApiError(f"target {target!r} is a quantity over {len(points)} conditions; pick one: {shown}")
        if isinstance(condition, int | np.integer) and not isinstance(condition, bool):
            if not 0 <= int(condition) < len(points):
                raise ApiError(f"condition index {condition} is out of range; the campaign has {len(points)} conditions")
            return name, int(condition)
        wanted = dict(condition)  # type: ignore[arg-type]
        hits = [i for i, c in enumerate(points)
                if set(wanted) <= set(c) and all(math.isclose(float(c[k]), float(v), rel_tol=1e-9, abs_tol=1e-12)
                                                 for k, v in wanted.items())]
        if len(hits) != 1:
            shown = ", ".join(", ".join(f"{k}={v:g}" for k, v in c.items()) for c in points)
            raise ApiError(f"condition {wanted} {'matches none' if not hits else 'matches several'} of the campaign's "
                           f"conditions ({shown})")
        return name, hits[0]


def open_campaign(directory: str | Path) -> CampaignView:
    """Open a campaign folder read-only (safe while the campaign runs).

    Raises
    ------
    LedgerError
        When the folder holds no sortie ledger.
    """
    return CampaignView(Path(directory))


def _quantity_target(name: str, condition: Mapping[str, float]) -> str:
    return f"{name}[{', '.join(f'{k}={float(v):g}' for k, v in condition.items())}]"


def _parse_selector(text: str, target: str) -> dict[str, float]:
    out: dict[str, float] = {}
    for part in text.split(","):
        key, sep, value = part.partition("=")
        try:
            out[key.strip()] = float(value)
        except ValueError:
            sep = ""
        if not sep or not key.strip():
            raise ApiError(f"target {target!r}: the condition must read name=number (e.g. lift[mach=1.1])")
    return out


def _as_frame(values: Mapping[str, Any] | Sequence[Mapping[str, Any]] | pd.DataFrame) -> pd.DataFrame:
    if isinstance(values, pd.DataFrame):
        return values
    if isinstance(values, pd.Series):
        return values.to_frame().T
    if isinstance(values, Mapping):
        if all(np.ndim(v) == 0 for v in values.values()):
            return pd.DataFrame([dict(values)])
        return pd.DataFrame(dict(values))
    return pd.DataFrame(list(values))
