"""The campaign report: one folder with ``index.html`` and its PNG figures, from the ledger alone.

In a design review nobody reads a ledger; they look at how the best design improved with each
solver run, which parameters mattered, whether the surrogate can be trusted, and the forces
against the operating condition for the baseline and the chosen design. :func:`write_report`
draws exactly that, at any moment of a campaign: every section that lacks its data yet (no
finished design, too few for a surrogate, no screening recorded) says so in a sentence instead
of failing, so the same command serves a running campaign and a finished one.

The folder is self-contained (relative image paths, inline CSS, no network), so it can be zipped
and mailed. A small inline script marks ``<body data-images-ok="yes">`` once every image has
loaded; the browser test reads it.
"""

from __future__ import annotations

import html
import itertools
import math
import time
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from jinja2 import Environment
from markupsafe import Markup

from sortie import figures
from sortie.api import ApiError, CampaignSurrogate, CampaignView, Snapshot, open_campaign
from sortie.config import CampaignConfig
from sortie.errors import LedgerError
from sortie.infill import MIN_POINTS
from sortie.ledger import DesignRow, writable_dir
from sortie.runstate import campaign_state, describe_state
from sortie.status import best_design, choice_rule, output_checks

CAUTION = ("Surrogate predictions must be confirmed by the real solver and by test; the design decision and any "
           "structural and safety sign-off follow the organisation's own rules and licensed practice.")
#: Parameters drawn in the one-parameter slices, and among which the two-parameter maps pick pairs.
MAX_SLICES = 8
MAX_CONTOUR_PARAMETERS = 3
MAX_PARITY_PANELS = 6
MAX_QUANTITY_PANELS = 6
TOP_DESIGNS = 10
REPORT_DIR = "report"


@dataclass
class Section:
    """One part of the report: a title, paragraphs (HTML-safe), figures and tables."""

    key: str
    title: str
    blocks: list[Markup] = field(default_factory=list)

    def text(self, sentence: str) -> None:
        self.blocks.append(Markup("<p>{}</p>").format(sentence))

    def note(self, sentence: str) -> None:
        self.blocks.append(Markup('<p class="note">{}</p>').format(sentence))

    def html(self, fragment: str) -> None:
        self.blocks.append(Markup(fragment))

    def image(self, name: str, alt: str, caption: str) -> None:
        self.blocks.append(Markup('<figure><img src="{}" alt="{}"><figcaption>{}</figcaption></figure>')
                           .format(name, alt, caption))

    def table(self, frame: pd.DataFrame, *, cls: str = "", raw: dict[str, Sequence[Any]] | None = None) -> None:
        self.blocks.append(Markup(_table_html(frame, cls=cls, raw=raw)))


@dataclass
class _Context:
    """What every section reads: the view, one snapshot of the ledger, and shared derived data."""

    view: CampaignView
    snap: Snapshot
    out: Path
    config: CampaignConfig = field(init=False)
    done: list[DesignRow] = field(init=False)
    best: DesignRow | None = field(init=False)
    baseline: DesignRow | None = field(init=False)
    images: list[str] = field(default_factory=list)
    surrogates: dict[str, CampaignSurrogate | str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.config = self.view.config
        self.done = [d for d in self.snap.designs if d.status == "done" and d.objective is not None]
        best = best_design(self.snap.designs, self.config.goal.sense)
        self.best = best if best is not None and best.feasible else None
        self.baseline = next((d for d in self.snap.designs if d.stage == "baseline"), None)

    def save(self, fig: Any, name: str) -> str:
        figures.save(fig, self.out / name)
        self.images.append(name)
        return name

    def surrogate(self, target: str, models: tuple[str, ...] | None = None) -> CampaignSurrogate | str:
        """The fitted surrogate of a target, or the sentence saying why there is none (cached)."""
        key = f"{target} {models}"
        if key not in self.surrogates:
            try:
                self.surrogates[key] = self.view.surrogate(target, models=models, snapshot=self.snap)
            except ApiError as err:
                self.surrogates[key] = str(err)
        return self.surrogates[key]

    @property
    def objective_label(self) -> str:
        return f"objective: {self.config.goal.objective().source}"

    @property
    def centre(self) -> DesignRow | None:
        """The design the slices go through: the best feasible one, else the baseline."""
        return self.best or (self.baseline if self.baseline is not None and self.baseline.status == "done" else None)


def write_report(directory: str | Path, out: str | Path | None = None) -> Path:
    """Write the campaign report and return the path of its ``index.html``.

    Parameters
    ----------
    directory : path
        The campaign folder (the one holding ``ledger.sqlite``). It is only read, so the report
        can be written while the campaign runs.
    out : path, optional
        The report folder (default ``<campaign>/report``). PNG files of an earlier report there
        are replaced.
    """
    view = open_campaign(directory)
    target = Path(out) if out is not None else view.directory / REPORT_DIR
    hint = "write it elsewhere with --out FOLDER" if out is None else "choose a writable folder with --out"
    writable_dir(target, what="the report folder", hint=hint)
    for old in target.glob("fig-*.png"):
        old.unlink()
    ctx = _Context(view, view.snapshot(), target)
    builders: list[tuple[str, str, Callable[[_Context, Section], None]]] = [
        ("summary", "Campaign summary", _summary),
        ("convergence", "Convergence", _convergence),
        ("screening", "Screening", _screening),
        ("trust", "Surrogate trust", _trust),
        ("slices", "Slices through the best design", _slices),
        ("quantities", "Quantities against the condition", _quantities),
        ("designs", "Designs", _designs),
    ]
    sections = []
    for key, title, build in builders:
        section = Section(key, title)
        try:
            build(ctx, section)
        except Exception as err:  # one broken section must not cost the reviewer the others
            section.note(f"This section could not be drawn ({type(err).__name__}: {err}).")
            section.html(f"<!-- {html.escape(traceback.format_exc())} -->")
        sections.append(section)
    page = _TEMPLATE.render(config=ctx.config, sections=sections, caution=CAUTION, directory=str(view.directory),
                            written=time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(ctx.snap.taken_at)),
                            status=_status_line(ctx))
    index = target / "index.html"
    try:
        index.write_text(page, encoding="utf-8")
    except OSError as err:  # the disk filled up while the figures were written
        raise LedgerError(f"{index}: the report cannot be written ({err.strerror or err}); {hint}") from None
    return index


# --------------------------------------------------------------------------- summary


def _status_line(ctx: _Context) -> str:
    """The campaign's state (running, interrupted, finished, failed) and how far its plan is."""
    designs = ctx.snap.designs
    pending = sum(d.status == "pending" for d in designs)
    planned = ctx.config.target_designs()
    with ctx.view.ledger() as ledger:
        state = campaign_state(ctx.view.directory, ledger, plan_done=pending == 0 and len(designs) >= planned)
    running = sum(c.state in ("submitting", "running") for c in ctx.snap.cases)
    return (f"state: {describe_state(state, now=ctx.snap.taken_at)}; {len(designs)} of {planned} planned designs "
            f"recorded, {pending} pending, {running} cases in flight")


def _attempt_seconds(attempts: list[dict[str, Any]], now: float) -> np.ndarray:
    """Wall seconds of each attempt, from its start (submission) to its end, or to now if it runs."""
    return np.array([max(0.0, (a["ended_at"] if a["ended_at"] is not None else now) - a["started_at"])
                     for a in attempts], dtype=float)


def _cores_per_case(config: CampaignConfig) -> tuple[int, str]:
    solver = config.solver
    tasks, cpus = int(solver.get("tasks", 1) or 1), int(solver.get("cpus", 1) or 1)
    if "tasks" in solver or "cpus" in solver:
        return tasks * cpus, f"{tasks} task(s) × {cpus} CPU(s) per case, from the solver section"
    return 1, "one core per case assumed (the solver section names no tasks or cpus)"


def _time_unit(seconds: float) -> tuple[str, float]:
    if seconds < 120:
        return "s", 1.0
    if seconds < 2 * 3600:
        return "min", 60.0
    return "h", 3600.0


def _summary(ctx: _Context, s: Section) -> None:
    cfg, snap = ctx.config, ctx.snap
    goal = cfg.goal
    s.html(Markup("<p><b>{}</b> {}</p>").format(goal.sense, goal.objective().source))
    if goal.subject_to:
        s.html(Markup("<p>subject to: {}</p>").format(Markup("; ").join(
            Markup("<code>{}</code>").format(c) for c in goal.subject_to)))
    designs, cases = snap.designs, snap.cases
    seconds = _attempt_seconds(snap.attempts, snap.taken_at)
    cores, cores_note = _cores_per_case(cfg)
    budget = []
    if cfg.budget.designs is not None:
        budget.append(f"{cfg.budget.designs} designs")
    if cfg.budget.cases is not None:
        budget.append(f"{cfg.budget.cases} cases")
    by_state = {st: sum(c.state == st for c in cases) for st in ("done", "failed", "submitting", "running", "planned")}
    rows = [
        ("designs recorded", f"{len(designs)} of {cfg.target_designs()} planned (budget: {' or '.join(budget)})"),
        ("designs by status", ", ".join(f"{n} {st}" for st in ("done", "failed", "pending")
                                        if (n := sum(d.status == st for d in designs)))),
        ("cases", f"{len(cases)} recorded: " + ", ".join(f"{n} {st}" for st, n in by_state.items() if n)),
        ("solver attempts", f"{len(snap.attempts)} (a retried or restarted case has several)"),
        ("solver time", f"{seconds.sum() / 3600:.3g} h of wall time summed over attempts (submission to end); "
                        f"{seconds.sum() * cores / 3600:.3g} core-hours with {cores_note}"),
    ]
    if ctx.baseline is not None and ctx.baseline.objective is not None:
        rows.append(("baseline", f"design {ctx.baseline.id}: objective {ctx.baseline.objective:.6g}"))
    if ctx.best is not None:
        text = f"design {ctx.best.id} ({ctx.best.stage}): objective {ctx.best.objective:.6g}"
        base = ctx.baseline.objective if ctx.baseline is not None else None
        if base:
            text += f", {100 * (ctx.best.objective - base) / abs(base):+.1f} % against the baseline"  # type: ignore[operator]
        rows.append(("best feasible design", text))
    else:
        rows.append(("best feasible design", "none yet"))
    s.table(pd.DataFrame(rows, columns=["", "value"]), cls="kv")

    stage_seconds: dict[str, float] = {}
    design_stage = {d.id: d.stage for d in designs}
    case_design = {c.id: c.design_id for c in cases}
    for a, sec in zip(snap.attempts, seconds, strict=True):
        stage = design_stage.get(case_design.get(a["case_id"], -1), "?")
        stage_seconds[stage] = stage_seconds.get(stage, 0.0) + float(sec)
    total_s = max(sum(stage_seconds.values()), 1e-12)
    unit_name, unit_s = _time_unit(total_s)
    stages = []
    for stage in dict.fromkeys(d.stage for d in designs):
        n = sum(d.stage == stage for d in designs)
        stages.append({"stage": stage, "designs": n, "share of designs": f"{100 * n / max(len(designs), 1):.0f} %",
                       "cases": sum(design_stage.get(c.design_id) == stage for c in cases),
                       f"solver time [{unit_name}]": f"{stage_seconds.get(stage, 0.0) / unit_s:.3g}",
                       "share of solver time": f"{100 * stage_seconds.get(stage, 0.0) / total_s:.0f} %"})
    if stages:
        s.html("<h3>Stages</h3>")
        s.table(pd.DataFrame(stages))
    failures = _failures(snap)
    s.html("<h3>Failures by class</h3>")
    if failures.empty:
        s.text("No case or attempt has failed.")
    else:
        s.table(failures)


def _failures(snap: Snapshot) -> pd.DataFrame:
    """Failed attempts and cases failed for good, per class, with one example reason."""
    classes: dict[str, dict[str, Any]] = {}
    for a in snap.attempts:
        if a["state"] == "failed" and a["failure_class"]:
            entry = classes.setdefault(a["failure_class"], {"failed attempts": 0, "cases failed for good": 0, "example": ""})
            entry["failed attempts"] += 1
            entry["example"] = entry["example"] or (a["reason"] or "")
    for c in snap.cases:
        if c.state == "failed" and c.failure_class:
            entry = classes.setdefault(c.failure_class, {"failed attempts": 0, "cases failed for good": 0, "example": ""})
            entry["cases failed for good"] += 1
            entry["example"] = entry["example"] or (c.failure_reason or "")
    rows = [{"class": k, **v, "example": _short(v["example"], 200)} for k, v in sorted(classes.items())]
    return pd.DataFrame(rows, columns=["class", "failed attempts", "cases failed for good", "example"])


# --------------------------------------------------------------------------- convergence


def _evaluations(ctx: _Context) -> pd.DataFrame:
    """Finished designs in the order they finished, with the best feasible so far and solver time spent."""
    snap, sense = ctx.snap, ctx.config.goal.sense
    ends: dict[int, float] = {}
    for c in snap.cases:
        if c.ended_at is not None:
            ends[c.design_id] = max(ends.get(c.design_id, 0.0), c.ended_at)
    finished = [d for d in snap.designs if d.status in ("done", "failed") and d.id in ends]
    finished.sort(key=lambda d: (ends[d.id], d.id))
    starts = np.array([a["started_at"] for a in snap.attempts], dtype=float)
    stops = np.array([a["ended_at"] if a["ended_at"] is not None else snap.taken_at for a in snap.attempts], dtype=float)
    rows, best = [], math.nan
    for n, d in enumerate(finished, start=1):
        t = ends[d.id]
        if d.status == "done" and d.feasible and d.objective is not None and (
                math.isnan(best) or (d.objective < best if sense == "minimize" else d.objective > best)):
            best = d.objective
        spent = float(np.clip(np.minimum(stops, t) - starts, 0.0, None).sum()) if len(starts) else 0.0
        rows.append({"n": n, "id": d.id, "stage": d.stage, "status": d.status,
                     "objective": d.objective if d.objective is not None else math.nan,
                     "feasible": bool(d.feasible), "best": best, "solver_s": spent})
    return pd.DataFrame(rows, columns=["n", "id", "stage", "status", "objective", "feasible", "best", "solver_s"])


def _convergence(ctx: _Context, s: Section) -> None:
    evals = _evaluations(ctx)
    if evals.empty:
        s.text("No design has finished yet; the convergence plot appears with the first finished design.")
        return
    base = ctx.baseline.objective if ctx.baseline is not None and ctx.baseline.status == "done" else None
    unit = _time_unit(float(evals["solver_s"].max()))
    fig = figures.convergence_figure(evals, sense=ctx.config.goal.sense, baseline=base, time_unit=unit,
                                     objective_label=ctx.objective_label)
    name = ctx.save(fig, "fig-convergence.png")
    s.image(name, "best feasible objective against designs evaluated and solver time",
            "The blue step line is the best feasible objective found so far; points are the designs in the order "
            "they finished (colour: stage; red cross: infeasible). The dashed grey line is the baseline, dotted "
            "verticals mark where a stage began. Right: the same against the solver time spent (wall time of all "
            "attempts, summed).")
    if ctx.best is not None:
        reached = int(evals.loc[evals["id"] == ctx.best.id, "n"].iloc[0]) if (evals["id"] == ctx.best.id).any() else None
        sentence = f"Best feasible objective {ctx.best.objective:.6g} (design {ctx.best.id}, {ctx.best.stage})"
        if reached is not None:
            sentence += f", found at design {reached} of {len(evals)} evaluated"
        if base:
            sentence += f"; the baseline has {base:.6g} ({100 * (ctx.best.objective - base) / abs(base):+.1f} %)"  # type: ignore[operator]
        s.text(sentence + ".")
    else:
        s.text("No feasible design yet.")


# --------------------------------------------------------------------------- screening


def _param_labels(config: CampaignConfig) -> dict[str, str]:
    return {name: figures.label(name, spec.unit) for name, spec in config.parameters.items()}


def _screening(ctx: _Context, s: Section) -> None:
    screening = [a for a in ctx.snap.analyses if a["kind"] == "screening"]
    sobol = [a for a in ctx.snap.analyses if a["kind"] == "sobol"]
    if not screening and not sobol:
        s.text("No screening analysis is recorded in the ledger: this campaign kept every parameter free and ran "
               "no screening stage.")
        return
    if screening:
        data = screening[-1]["data"]
        outputs = list(data.get("outputs") or [])
        fig = figures.screening_figure(data, _param_labels(ctx.config))
        name = ctx.save(fig, "fig-screening.png")
        extra = f" Only the first 4 of {len(outputs)} outputs have a panel; the score combines all." if len(outputs) > 4 else ""
        method = data.get("method", "morris")
        if method == "morris":
            alt, what = ("Morris mu-star against sigma per parameter",
                         "Morris screening: μ* (mean absolute elementary effect, how much a parameter moves an output) "
                         "against σ (how much its effect changes across the space: interactions or curvature).")
        elif method == "surrogate":
            r2 = ", ".join(f"{o}: {'-' if v is None else f'{v:.2f}'}" for o, v in zip(outputs, data.get("loo_r2") or [], strict=False))
            alt, what = ("Total Sobol indices of the screening surrogates per parameter",
                         "Surrogate screening: total Sobol' index of each parameter (its share of the output's variance, "
                         "interactions included) computed on a Gaussian process fitted to the screening designs. The "
                         f"processes' leave-one-out R² ({r2}) says how far the indices can be trusted.")
        else:
            alt, what = ("One-at-a-time sweep ranges per parameter",
                         "One-at-a-time screening: the range each output covers as one parameter sweeps through its "
                         "levels around the baseline (blind to interactions).")
        s.image(name, alt, what + " Blue: parameters kept free; grey: fixed at their baseline. Right: the combined "
                "importance the selection rule used." + extra)
        reasons = data.get("reasons") or {}
        if reasons:
            selected = set(data.get("selected") or [])
            s.table(pd.DataFrame([{"parameter": k, "decision": "kept free" if k in selected else "fixed", "why": v}
                                  for k, v in reasons.items()]))
    if sobol:
        data = sobol[-1]["data"]
        fig = figures.sobol_figure(data)
        name = ctx.save(fig, "fig-sobol.png")
        n = len(data.get("parameters") or [])
        extra = f" The 12 parameters with the largest total index of {n} are shown." if n > 12 else ""
        s.image(name, "Sobol indices with intervals",
                f"Sobol' indices of the surrogate (n = {data.get('n_points', '?')} points): first order is the share "
                "of the output variance a parameter explains alone, total adds its interactions. They describe the "
                "surrogate, so they are as good as its leave-one-out error below." + extra)


# --------------------------------------------------------------------------- surrogate trust


def _trust(ctx: _Context, s: Section) -> None:
    cfg = ctx.config
    targets = ["objective", *cfg.goal.subject_to][:MAX_PARITY_PANELS]
    panels, lines = [], []
    for target in targets:
        model = ctx.surrogate(target)
        if isinstance(model, str):
            lines.append(f"{target}: {model}.")
            continue
        score = model.score
        tried = ", ".join(f"{sc.name} {sc.loo_rmse:.3g}" for sc in model.scores if math.isfinite(sc.loo_rmse))
        r2 = f", R² {score.loo_r2:.3f}" if math.isfinite(score.loo_r2) else ""
        title = f"{_short(target, 40)}\n{model.name}: LOO RMSE {score.loo_rmse:.3g}{r2}, {len(model.y)} designs"
        highlight = {}
        if ctx.baseline is not None:
            highlight[ctx.baseline.id] = (figures.BASELINE, "baseline")
        if ctx.best is not None:
            highlight[ctx.best.id] = (figures.BEST, "best design")
        axis = ctx.config.goal.objective().source if target == "objective" else "margin (> 0: violated)"
        panels.append(figures.ParityPanel(title, model.loo(), axis, highlight))
        lines.append(f"{target}: {model.name}, the lowest leave-one-out error among {tried} (RMSE, in the target's units) "
                     f"and so the model of this panel; the campaign's rule for it: {choice_rule(target)}.")
    if not panels:
        done = len(ctx.done)
        s.text(f"Surrogates need at least {MIN_POINTS} finished designs; {done} so far. This section fills in as the "
               "campaign goes on.")
    else:
        name = ctx.save(figures.parity_figure(panels), "fig-parity.png")
        s.image(name, "leave-one-out predicted against actual",
                "Each point is a design: the solver's value against what the surrogate predicts there when fitted "
                "without that design (closed-form leave-one-out), with ±2σ where the model gives one. Points on the "
                "diagonal mean the surrogate would have predicted the design; the spread is the error to expect at "
                "a new design. Models are refitted here on every finished design, as the campaign chooses them.")
        for line in lines:
            s.note(line)
    choices = ctx.snap.models
    if choices:
        rows = []
        for target, entry in choices.items():
            for sc in entry["scores"]:
                rmse = sc.get("loo_rmse")
                rows.append({"target": target, "model": sc.get("name"),
                             "chosen": "✓" if sc.get("name") == entry["chosen"] else "",
                             "LOO RMSE": "skipped" if rmse is None else f"{rmse:.4g}",
                             "LOO R²": "" if sc.get("loo_r2") is None else f"{sc['loo_r2']:.3f}",
                             "designs": entry["n_points"], "note": _short(sc.get("note") or "", 120)})
        s.html("<h3>The campaign's last model choice per target</h3>")
        s.table(pd.DataFrame(rows))
    else:
        s.note("The campaign has not chosen a surrogate yet (it does so when it proposes its first infill design).")


# --------------------------------------------------------------------------- slices


def _predictor(model: CampaignSurrogate) -> figures.Predict:
    return model.predict_unit


def _slices(ctx: _Context, s: Section) -> None:
    cfg = ctx.config
    model = ctx.surrogate("objective")
    centre = ctx.centre
    if isinstance(model, str) or centre is None:
        s.text("Slices need a fitted objective surrogate and a finished design to centre on; "
               + (model if isinstance(model, str) else "none has finished yet") + ".")
        return
    space = model.space
    constraints = [m for t in cfg.goal.subject_to if not isinstance(m := ctx.surrogate(t), str)]
    missing = [t for t in cfg.goal.subject_to if isinstance(ctx.surrogate(t), str)]
    u0 = space.to_unit([centre.values])[0]
    screened_out = [p.name for p in space.parameters if p.fixed and not cfg.parameters[p.name].fixed]
    slices = figures.compute_slices(space, u0, _predictor(model), [_predictor(m) for m in constraints])
    ranked = sorted(slices, key=lambda sl: -sl.span)
    shown = ranked[:MAX_SLICES]
    left = ranked[MAX_SLICES:]
    designs = pd.DataFrame([{**d.values, "objective": d.objective, "feasible": d.feasible} for d in ctx.done])
    who = "the best feasible design" if centre is ctx.best else "the baseline (no feasible design yet)"
    best_label = f"design {centre.id} ({'best' if centre is ctx.best else 'baseline'})"
    fig = figures.slices_figure(shown, centre_values=centre.values, designs=designs, objective_label=ctx.objective_label,
                                best_label=best_label)
    name = ctx.save(fig, "fig-slices.png")
    s.image(name, "one-parameter slices of the objective surrogate",
            f"The {model.name} surrogate of the objective along one parameter at a time, every other parameter held "
            f"at {who} (design {centre.id}, dashed line), with ±2σ. Shaded: where a constraint's surrogate predicts "
            "a violation (mean margin above 0). Grey dots are all evaluated designs; their other parameters differ, "
            "so they scatter about the curve.")
    order = ", ".join(f"{sl.parameter.name} {sl.span:.3g}" for sl in ranked)
    s.note(f"Parameters ranked by how far each moves the predicted objective along its slice: {order}.")
    if left:
        s.note(f"Left out of the plots ({len(left)} parameters with the smallest effect): "
               + ", ".join(sl.parameter.name for sl in left) + ".")
    if screened_out:
        s.note(f"Not modelled: {len(screened_out)} parameters that screening fixed at their baseline ("
               + ", ".join(screened_out) + "); the campaign's surrogates leave them out as well.")
    if missing:
        s.note("No shading for " + "; ".join(missing) + ": too few finished designs for its surrogate.")
    top = [sl.parameter.name for sl in ranked[:MAX_CONTOUR_PARAMETERS]]
    index = {p.name: i for i, p in enumerate(space.free)}
    if len(top) >= 2:
        maps = [figures.compute_contour(space, u0, index[a], index[b], _predictor(model),
                                        [_predictor(m) for m in constraints])
                for a, b in itertools.combinations(top, 2)]
        fig = figures.contour_figure(maps, centre_values=centre.values, designs=designs,
                                     objective_label=ctx.objective_label, best_label=best_label)
        name = ctx.save(fig, "fig-contours.png")
        s.image(name, "two-parameter maps of the objective surrogate",
                f"The predicted objective over pairs of the {len(top)} most influential parameters, the others at "
                f"design {centre.id} (star). Hatched red: a constraint predicted violated (its 0-margin line drawn). "
                "Circles and crosses are evaluated designs projected onto the plane; they differ in the other "
                "parameters, so they need not agree with the colours.")


# --------------------------------------------------------------------------- quantities against the condition


def _quantities(ctx: _Context, s: Section) -> None:
    cfg = ctx.config
    conditions = cfg.condition_list()
    keys = list(cfg.conditions)
    shown: list[tuple[DesignRow, str, str, str]] = []
    if ctx.baseline is not None:
        shown.append((ctx.baseline, f"baseline (design {ctx.baseline.id})", figures.BASELINE, "s"))
    if ctx.best is not None and (ctx.baseline is None or ctx.best.id != ctx.baseline.id):
        shown.append((ctx.best, f"best (design {ctx.best.id}, {ctx.best.stage})", figures.BEST, "o"))
    for d in ctx.snap.designs:
        if d.stage == "confirmation" and all(d.id != row.id for row, *_ in shown):
            shown.append((d, f"confirmation (design {d.id})", figures.CONFIRM, "D"))
    values: dict[int, dict[str, np.ndarray]] = {}
    for d, *_ in shown:
        per = {q: np.full(len(conditions), np.nan) for q in cfg.quantities}
        for c in ctx.snap.cases:
            if c.design_id == d.id and c.state == "done" and c.quantities:
                for q in cfg.quantities:
                    per[q][c.condition_index] = c.quantities.get(q, np.nan)
        values[d.id] = per
    shown = [row for row in shown if any(np.isfinite(v).any() for v in values[row[0].id].values())]
    if not shown:
        s.text("No case of the baseline or of a feasible design has finished yet.")
        return
    if len(keys) == 1:
        x = np.array([c[keys[0]] for c in conditions], dtype=float)
        xlabel, ticks = keys[0], None
    else:
        x = np.arange(len(conditions), dtype=float)
        xlabel, ticks = "condition", ["\n".join(f"{k}={c[k]:g}" for k in keys) for c in conditions]
    band_for = ctx.best.id if ctx.best is not None else None
    panels, banded = [], False
    for q, spec in list(cfg.quantities.items())[:MAX_QUANTITY_PANELS]:
        lines = []
        for d, name, colour, marker in shown:
            band = _loo_band(ctx, q, d.id, len(conditions)) if d.id == band_for else None
            banded = banded or band is not None
            lines.append(figures.QuantityLine(name, values[d.id][q], colour, marker, band))
        panels.append((figures.label(q, spec.unit), lines))
    fig = figures.quantities_figure(x, xlabel, ticks, panels)
    name = ctx.save(fig, "fig-quantities.png")
    caption = "Each quantity as the solver computed it at every condition, for the baseline and the best design"
    caption += " and the confirmation run." if any(d.stage == "confirmation" for d, *_ in shown) else "."
    if banded:
        caption += (" The blue band is what a Gaussian-process surrogate of that quantity at that condition predicts for the best "
                    "design when fitted without it (leave-one-out, ±2σ, dotted: its mean): where the solver line lies "
                    "inside, the surrogate had this design's forces right.")
    s.image(name, "quantities against the condition", caption)
    if len(cfg.quantities) > MAX_QUANTITY_PANELS:
        s.note(f"Only the first {MAX_QUANTITY_PANELS} of {len(cfg.quantities)} quantities are drawn.")


def _loo_band(ctx: _Context, quantity: str, design_id: int,
              n_conditions: int) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Leave-one-out mean and ±2σ of a design's quantity at every condition, or None if any is missing."""
    mean, std = np.full(n_conditions, np.nan), np.full(n_conditions, np.nan)
    for i, cond in enumerate(ctx.config.condition_list()):
        model = ctx.surrogate(_target(quantity, cond), models=("gp",))
        if isinstance(model, str):
            return None
        loo = model.loo()
        row = loo[loo["design"] == design_id]
        if row.empty:
            return None
        mean[i], std[i] = float(row["predicted"].iloc[0]), float(row["predicted_std"].iloc[0])
    if not (np.isfinite(mean).all() and np.isfinite(std).all()):
        return None
    return mean, mean - 2 * std, mean + 2 * std


def _target(quantity: str, condition: dict[str, float]) -> str:
    return f"{quantity}[{', '.join(f'{k}={float(v):g}' for k, v in condition.items())}]"


# --------------------------------------------------------------------------- tables


def top_designs(designs: Sequence[DesignRow], config: CampaignConfig, n: int = TOP_DESIGNS) -> list[DesignRow]:
    """Finished designs, feasible first by objective, then infeasible by their worst margin; the first ``n``."""
    sign = 1.0 if config.goal.sense == "minimize" else -1.0
    done = [d for d in designs if d.status == "done" and d.objective is not None]
    feasible = sorted((d for d in done if d.feasible), key=lambda d: (sign * d.objective, d.id))  # type: ignore[operator]
    infeasible = sorted((d for d in done if not d.feasible),
                        key=lambda d: (max((d.constraints or {}).values(), default=math.inf), d.id))
    return (feasible + infeasible)[:n]


def _designs(ctx: _Context, s: Section) -> None:
    cfg = ctx.config
    params = list(cfg.parameters)
    top = top_designs(ctx.snap.designs, cfg)
    extra = [ctx.baseline] if ctx.baseline is not None and ctx.baseline.status == "done" and ctx.baseline not in top else []
    s.html("<h3>Top designs</h3>")
    if not top:
        s.text("No design has been scored yet.")
    else:
        rows, raw = [], {}
        for rank, d in enumerate(top + extra, start=1):
            pred = d.prediction or {}
            row = {"rank": rank if d in top else "ref.", "design": d.id, "stage": d.stage,
                   **{p: d.values.get(p) for p in params}, "objective": d.objective,
                   **{c: (d.constraints or {}).get(c) for c in cfg.goal.subject_to},
                   "feasible": "yes" if d.feasible else "no",
                   "predicted when proposed": _pm(pred.get("objective_mean"), pred.get("objective_std"))}
            rows.append(row)
        frame = pd.DataFrame(rows)
        raw = {col: frame[col].tolist() for col in ["design", *params, "objective", *cfg.goal.subject_to]}
        s.table(frame, cls="designs", raw=raw)
        s.note("Constraint columns are margins: positive means violated, at most 0 means met. 'Predicted when "
               "proposed' is the surrogate's objective (±2σ) recorded before the solver ran the design; designs of "
               "the baseline, screening and initial experiment have none."
               + (" The last row is the baseline, for reference." if extra else ""))
    confirmations = [a["data"] for a in ctx.snap.analyses if a["kind"] == "confirmation"]
    if confirmations:
        s.html("<h3>Confirmation runs: predicted against the solver</h3>")
        rows = []
        for check in confirmations:
            obj = check.get("objective") or {}
            row = {"design": check.get("design"), "verdict": check.get("verdict"),
                   "objective predicted (±2σ)": _pm(obj.get("predicted"), obj.get("predicted_std")),
                   "objective actual": obj.get("actual")}
            for c in check.get("constraints") or []:
                row[f"{c['constraint']}: predicted"] = _pm(c.get("predicted"), c.get("predicted_std"))
                row[f"{c['constraint']}: actual"] = c.get("actual")
            rows.append(row)
        s.table(pd.DataFrame(rows))
    per_output = [{"design": c.get("design"), "quantity at condition": o["output"],
                   "predicted (±2σ)": _pm(o.get("predicted"), o.get("predicted_std")), "actual": o.get("actual")}
                  for c in confirmations for o in c.get("outputs") or []]
    if per_output:
        s.table(pd.DataFrame(per_output))
    checked = output_checks(ctx.snap.designs, ctx.snap.cases, cfg, ctx.snap.models)
    if checked:
        s.html("<h3>Predicted against actual, each quantity at each condition</h3>")
        s.table(pd.DataFrame([{"quantity at condition": r["output"], "designs": r["designs"],
                               "mean predicted σ": f"{r['mean_predicted_std']:.3g}", "RMS error": f"{r['rms_error']:.3g}",
                               "within ±2σ": f"{r['within_2_std']:.0%}",
                               "estimated noise σ": "—" if r["noise_std"] is None else f"{r['noise_std']:.3g}",
                               "spread of repeated designs": "no repeats" if r["repeat_spread"] is None
                               else f"{r['repeat_spread']:.3g}"} for r in checked]))
        s.note("Over the designs proposed in composite mode: what each quantity's model predicted before the solver "
               "ran the design, against what the solver returned. About 95 % within ±2σ means the models know "
               "their error; far fewer means they are over-confident. The estimated noise is the white-noise level "
               "each quantity's process fitted (when it is above about 3 % of the quantity's spread, infill measures "
               "improvement from the best predicted feasible design, not the best observed one); the spread of "
               "repeated designs is what the solver really scattered by, where a design was run twice.")
    pending = [d for d in ctx.snap.designs if d.status == "pending"]
    if pending:
        s.html("<h3>Designs in progress</h3>")
        s.table(pd.DataFrame([{"design": d.id, "stage": d.stage, "why proposed": _short(d.reason, 160),
                               "predicted objective": (f"{d.prediction['objective_mean']:.4g}"
                                                       if d.prediction and d.prediction.get("objective_mean") is not None
                                                       else "—")} for d in pending]))
    failed = [d for d in ctx.snap.designs if d.status == "failed"]
    s.html("<h3>Failed designs</h3>")
    if not failed:
        s.text("No design has failed.")
        return
    rows = []
    for d in failed:
        bad = [c for c in ctx.snap.cases if c.design_id == d.id and c.state == "failed"]
        why = "; ".join(f"{_cond(c.condition)}: {c.failure_class}: {_short(c.failure_reason or '', 160)}" for c in bad)
        rows.append({"design": d.id, "stage": d.stage, **{p: d.values.get(p) for p in params}, "failed cases": why})
    s.table(pd.DataFrame(rows), cls="designs")


def _pm(mean: float | None, std: float | None) -> str:
    if mean is None:
        return "—"
    return f"{mean:.4g}" + (f" ± {2 * std:.2g}" if std is not None and math.isfinite(std) else "")


def _cond(condition: dict[str, float]) -> str:
    return ", ".join(f"{k}={v:g}" for k, v in condition.items())


# --------------------------------------------------------------------------- HTML


def _short(text: str, n: int) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= n else text[: n - 1] + "…"


def _fmt(value: Any) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    if isinstance(value, float | np.floating):
        return f"{float(value):.4g}"
    return str(value)


def _table_html(frame: pd.DataFrame, *, cls: str = "", raw: dict[str, Sequence[Any]] | None = None) -> str:
    """A plain HTML table; cells of ``raw`` columns carry the full-precision value in ``data-value``."""
    esc = html.escape
    head = "".join(f"<th>{esc(str(c))}</th>" for c in frame.columns)
    body = []
    for i, (_, row) in enumerate(frame.iterrows()):
        cells = []
        for col in frame.columns:
            value = row[col]
            attr = ""
            if raw is not None and col in raw:
                full = raw[col][i]
                attr = f' data-col="{esc(str(col))}" data-value="{esc(repr(full) if isinstance(full, float) else str(full))}"'
            cells.append(f"<td{attr}>{esc(_fmt(value))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return (f'<div class="scroll"><table class="{esc(cls)}"><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(body)}</tbody></table></div>")


_TEMPLATE = Environment(autoescape=True).from_string("""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>sortie report: {{ config.campaign.name }}</title>
<style>
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 0 auto; max-width: 1180px;
       padding: 1.5em 2em 4em; color: #222; line-height: 1.45; }
h1 { margin-bottom: 0.1em; } h2 { border-bottom: 1px solid #ddd; padding-bottom: 0.2em; margin-top: 2em; }
.sub { color: #666; margin-top: 0; }
nav a { margin-right: 1em; }
figure { margin: 1em 0; } figure img { max-width: 100%; height: auto; border: 1px solid #eee; }
figcaption { color: #444; font-size: 0.92em; max-width: 60em; }
.note { color: #555; font-size: 0.92em; }
.scroll { overflow-x: auto; }
table { border-collapse: collapse; font-size: 0.88em; margin: 0.5em 0 1em; }
th, td { border: 1px solid #ddd; padding: 0.25em 0.55em; text-align: left; vertical-align: top; }
th { background: #f4f6f8; } table.designs td { white-space: nowrap; } table.kv td:first-child { font-weight: 600; }
.caution { border-left: 5px solid #c0392b; background: #fdf3f2; padding: 0.8em 1.2em; margin: 1.5em 0; }
code { background: #f4f4f4; padding: 0 0.25em; }
</style>
</head>
<body data-images-ok="pending">
<h1>{{ config.campaign.name }}</h1>
<p class="sub">{{ config.campaign.description }}</p>
<p class="sub">Campaign folder <code>{{ directory }}</code>; ledger read at {{ written }}; {{ status }}.</p>
<div class="caution"><b>Caution.</b> {{ caution }} sortie ranks designs; it does not certify them.</div>
<nav>{% for s in sections %}<a href="#{{ s.key }}">{{ s.title }}</a>{% endfor %}</nav>
{% for s in sections %}
<section id="{{ s.key }}">
<h2>{{ s.title }}</h2>
{% for b in s.blocks %}{{ b }}
{% endfor %}
</section>
{% endfor %}
<div class="caution"><b>Caution.</b> {{ caution }}</div>
<p class="note">Made by sortie from the campaign's ledger alone. The same numbers are in
<code>sortie export</code> (designs and cases) and in <code>sortie.api.open_campaign()</code>.</p>
<script>
window.onerror = function () {
  var n = Number(document.body.getAttribute("data-script-errors") || 0) + 1;
  document.body.setAttribute("data-script-errors", String(n));
};
window.addEventListener("load", function () {
  var broken = [];
  for (var i = 0; i < document.images.length; i++) {
    var img = document.images[i];
    if (!img.complete || img.naturalWidth === 0) { broken.push(img.getAttribute("src")); }
  }
  document.body.setAttribute("data-images", String(document.images.length));
  document.body.setAttribute("data-broken-images", broken.join(" "));
  document.body.setAttribute("data-images-ok", broken.length === 0 ? "yes" : "no");
});
</script>
</body>
</html>
""")
