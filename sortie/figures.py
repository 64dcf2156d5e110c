"""The report's figures, drawn with matplotlib from plain tables and fitted surrogates.

Every function takes data that :mod:`sortie.report` has already read from the ledger (or that a
notebook user builds from :mod:`sortie.api`) and returns a :class:`matplotlib.figure.Figure`. The
figures are made with ``Figure`` directly rather than through ``pyplot``: no global backend or
figure registry is touched, so the report can be written from a notebook, a thread or a test
without side effects, and the PNG is rendered by Agg.

The choices below serve a design review. The baseline is always grey and the best design always
blue, in every figure. Axis labels carry units from the config. Plots that would grow with the
number of parameters show the most important ones and the caller says what was left out.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from matplotlib import rc_context
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from sortie.space import DesignSpace, Parameter

BASELINE = "#6b6b6b"
BEST = "#1f5fa8"
CONFIRM = "#a0522d"
INFEASIBLE = "#c0392b"
FAILED = "#7d3c98"
STAGE_COLOURS = {"baseline": BASELINE, "screening": "#17a2b8", "initial": "#e0a030", "infill": "#2e8b57",
                 "confirmation": CONFIRM}
SHADE = "#f2c4be"
DPI = 100
#: Slices and contours hold the other parameters at the best design and evaluate this many points per axis.
SLICE_POINTS = 61
CONTOUR_POINTS = 41


def save(fig: Figure, path: Path) -> Path:
    """Write a figure as PNG (Agg) and return the path."""
    fig.savefig(path, dpi=DPI, format="png", facecolor="white", pil_kwargs={"compress_level": 4})
    return path


def label(name: str, unit: str = "") -> str:
    """An axis label with its unit in brackets, the way engineers read them."""
    return f"{name} [{unit}]" if unit else name


def _stage_colour(stage: str) -> str:
    return STAGE_COLOURS.get(stage, "#8c8c8c")


# --------------------------------------------------------------------------- convergence


def convergence_figure(evals: pd.DataFrame, *, sense: str, baseline: float | None, time_unit: tuple[str, float],
                       objective_label: str) -> Figure:
    """Best feasible objective so far against designs evaluated and against solver time.

    Parameters
    ----------
    evals : DataFrame
        One row per finished design in the order it finished: ``n`` (1, 2, ...), ``id``, ``stage``,
        ``objective`` (NaN if failed), ``feasible``, ``status``, ``best`` (best feasible so far, NaN
        before the first), ``solver_s`` (solver time spent when it finished, seconds).
    sense : {"minimize", "maximize"}
    baseline : float or None
        The baseline's objective, drawn as a reference line.
    time_unit : (name, seconds)
        Unit for the second panel's axis, e.g. ``("min", 60)``.
    """
    fig = Figure(figsize=(11, 4.2), layout="constrained")
    axes = fig.subplots(1, 2, sharey=True)
    unit_name, unit_s = time_unit
    done = evals[evals["status"] == "done"]
    finite = done["objective"].to_numpy(dtype=float)
    ylim = _robust_limits(np.concatenate([finite, [baseline] if baseline is not None else [],
                                          evals["best"].dropna().to_numpy(dtype=float)]), sense)
    off = (lambda v: v > ylim[1]) if sense == "minimize" else (lambda v: v < ylim[0])
    edge = ylim[1] if sense == "minimize" else ylim[0]
    for ax, xcol, xlabel, scale in ((axes[0], "n", "designs evaluated", 1.0),
                                    (axes[1], "solver_s", f"solver time spent [{unit_name}]", unit_s)):
        x_all = evals[xcol].to_numpy(dtype=float) / scale
        for stage, rows in done.groupby("stage", sort=False):
            _scatter_designs(ax, rows, xcol, scale, _stage_colour(str(stage)), "o", f"{stage} design (feasible)",
                             off, edge, feasible=True)
        _scatter_designs(ax, done, xcol, scale, INFEASIBLE, "x", "infeasible design", off, edge, feasible=False)
        failed = evals[evals["status"] == "failed"]
        if len(failed):
            ax.scatter(failed[xcol] / scale, np.full(len(failed), ylim[0]), marker="s", s=26, color=FAILED,
                       clip_on=False, zorder=4, label="failed design (no objective, on the axis)")
        best = evals["best"].to_numpy(dtype=float)
        if np.isfinite(best).any():
            ax.step(x_all, best, where="post", color=BEST, lw=2.2, zorder=4, label="best feasible so far")
        if baseline is not None and np.isfinite(baseline):
            ax.axhline(baseline, color=BASELINE, ls="--", lw=1.2, zorder=2, label="baseline objective")
        for stage, first in _stage_starts(evals, xcol):
            if first > x_all.min():
                ax.axvline(first / scale, color="#999999", ls=":", lw=1)
                ax.annotate(f"{stage} starts", (first / scale, 0.985), xycoords=("data", "axes fraction"), rotation=90,
                            xytext=(2, 0), textcoords="offset points", fontsize=8, color="#555555", ha="left", va="top")
        ax.set_xlabel(xlabel)
        ax.set_ylim(*ylim)
        ax.grid(alpha=0.3)
    n_off = int(np.sum(off(finite)))
    axes[0].set_ylabel(objective_label)
    handles, labels = axes[0].get_legend_handles_labels()
    if n_off:
        handles.append(Line2D([], [], marker="^" if sense == "minimize" else "v", ls="", color="#444444"))
        labels.append(f"{n_off} design(s) off the scale, drawn at the edge")
    fig.legend(handles, labels, fontsize=8, loc="outside lower center", ncols=min(4, len(handles)))
    fig.suptitle(f"Best feasible objective ({'lower' if sense == 'minimize' else 'higher'} is better)", fontsize=11)
    return fig


def _scatter_designs(ax: Any, rows: pd.DataFrame, xcol: str, scale: float, colour: str, marker: str, name: str,
                     off: Callable[[np.ndarray], np.ndarray], edge: float, *, feasible: bool) -> None:
    """Designs as points; those beyond the y limit as triangles on the edge, so nothing silently disappears."""
    rows = rows[rows["feasible"].astype(bool) == feasible]
    if rows.empty:
        return
    y = rows["objective"].to_numpy(dtype=float)
    x = rows[xcol].to_numpy(dtype=float) / scale
    beyond = off(y)
    ax.scatter(x[~beyond], y[~beyond], s=24, marker=marker, color=colour, alpha=0.8, zorder=3, label=name)
    if beyond.any():
        ax.scatter(x[beyond], np.full(beyond.sum(), edge), s=30, marker="^" if off(np.array([np.inf]))[0] else "v",
                   color=colour, clip_on=False, zorder=3)


def _stage_starts(evals: pd.DataFrame, xcol: str) -> list[tuple[str, float]]:
    """The x position at which each stage after the first had its first design evaluated."""
    starts = []
    for stage in dict.fromkeys(evals["stage"]):
        if stage != "baseline":
            starts.append((str(stage), float(evals.loc[evals["stage"] == stage, xcol].min())))
    return starts[1:]  # the first stage starts with the campaign


def _robust_limits(values: np.ndarray, sense: str) -> tuple[float, float]:
    """Y limits that keep the interesting end readable: a few far-off bad designs are drawn at the edge."""
    v = values[np.isfinite(values)]
    if v.size == 0:
        return (0.0, 1.0)
    lo, hi = float(v.min()), float(v.max())
    if v.size >= 8:
        q1, q3 = np.percentile(v, [25, 75])
        if sense == "minimize":
            hi = min(hi, float(q3 + 3.0 * (q3 - q1)))
        else:
            lo = max(lo, float(q1 - 3.0 * (q3 - q1)))
    pad = 0.06 * (hi - lo or abs(hi) or 1.0)
    return lo - pad, hi + pad


# --------------------------------------------------------------------------- screening


def screening_figure(data: Mapping, labels: Mapping[str, str], *, max_outputs: int = 4, max_labels: int = 10,
                     max_bars: int = 12) -> Figure:
    """Screening effects per output (selected parameters highlighted) and the combined score.

    ``data`` is a screening analysis as recorded in the ledger: ``parameters``, ``outputs``,
    ``score``, ``selected``, and for ``method: morris`` ``mu_star`` and ``sigma`` (k×s), drawn as
    μ* against σ; for ``one-at-a-time`` ``span`` and for ``surrogate`` ``total_order`` (k×s), drawn
    as bars. Only the first
    ``max_outputs`` outputs get a panel and only the ``max_labels`` largest effects are named
    (``max_bars`` drawn), so twenty parameters stay readable; the score panel lists every parameter.
    """
    names = list(data["parameters"])
    outputs = list(data.get("outputs") or [])[:max_outputs]
    morris = data.get("method", "morris") == "morris"
    k = len(names)

    def matrix(key: str) -> np.ndarray:
        raw = data.get(key)
        return np.full((k, len(outputs)), np.nan) if raw is None else np.asarray(raw, dtype=float).reshape(k, -1)

    selected = set(data.get("selected") or [])
    score = np.asarray(data.get("score") if data.get("score") is not None else np.full(k, np.nan), dtype=float)
    n_panels = len(outputs) + 1
    ncols = min(3, n_panels)
    nrows = int(np.ceil(n_panels / ncols))
    fig = Figure(figsize=(4.3 * ncols, max(3.8, 0.2 * k + 1.2) * nrows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols)).ravel()
    colours = np.array([BEST if n in selected else "#9a9a9a" for n in names])
    method = data.get("method", "morris")
    effect = matrix({"morris": "mu_star", "surrogate": "total_order"}.get(method, "span"))
    sigma = matrix("sigma")
    for j, out in enumerate(outputs):
        ax = axes[j]
        ms = effect[:, j]
        if morris:
            sg = sigma[:, j]
            ax.scatter(ms, sg, c=colours, s=30, zorder=3)
            largest = float(np.nanmax(np.concatenate([ms, [0.0]])))
            small = np.nan_to_num(ms, nan=0.0) < 0.03 * largest
            lim = float(np.nanmax(np.concatenate([ms, sg, [1e-12]])))
            placed: list[tuple[float, float]] = []
            for i in np.argsort(-np.nan_to_num(ms, nan=-1))[:max_labels]:
                if np.isfinite(ms[i]) and np.isfinite(sg[i]) and not small[i]:
                    # a label close to one already placed goes below its point instead of above
                    near = any(abs(ms[i] - x) < 0.15 * lim and abs(sg[i] - y) < 0.05 * lim for x, y in placed)
                    ax.annotate(names[i], (ms[i], sg[i]), xytext=(3, -9 if near else 3), textcoords="offset points",
                                fontsize=7)
                    placed.append((ms[i], sg[i]))
            if small.sum() > 1:
                ax.annotate(f"{int(small.sum())} parameters near 0", (0, 0), xytext=(6, 6), textcoords="offset points",
                            fontsize=7, color="#777777")
            ax.plot([0, lim], [0, lim], color="#cccccc", lw=0.8, zorder=1)
            ax.set_xlabel("μ* (mean |elementary effect|)")
            ax.set_ylabel("σ (spread of the effects)")
        else:
            order = np.argsort(-np.nan_to_num(ms, nan=-1))[:max_bars][::-1]
            ax.barh([names[i] for i in order], np.nan_to_num(ms[order]), color=colours[order])
            ax.tick_params(axis="y", labelsize=7)
            ax.set_xlabel("total Sobol' index of the surrogate" if method == "surrogate" else "range over the sweep")
        ax.set_title(_wrap(str(out)), fontsize=9)
        ax.grid(alpha=0.3)
    ax = axes[len(outputs)]
    order = np.argsort(np.nan_to_num(score, nan=-1))
    ax.barh([labels.get(names[i], names[i]) for i in order], np.nan_to_num(score[order]), color=colours[order])
    ax.set_xlabel("combined importance")
    ax.tick_params(axis="y", labelsize=7 if k > 12 else 8)
    ax.set_title(f"selection rule: {data.get('rule', '?')}", fontsize=9)
    for extra in axes[n_panels:]:
        extra.set_visible(False)
    fig.legend([Line2D([], [], marker="o", ls="", color=BEST), Line2D([], [], marker="o", ls="", color="#9a9a9a")],
               ["selected (kept free)", "fixed at baseline"], loc="outside lower center", ncols=2, fontsize=8)
    return fig


def _wrap(text: str, width: int = 45) -> str:
    return text if len(text) <= width else text[:width] + "\n" + _wrap(text[width:], width)


def sobol_figure(data: Mapping, *, max_outputs: int = 4, max_parameters: int = 12) -> Figure:
    """First-order and total Sobol' indices per output with their intervals, largest total first."""
    names = list(data["parameters"])
    outputs = list(data.get("outputs") or [])[:max_outputs]
    k = len(names)

    def arr(key: str) -> np.ndarray:
        return np.asarray(data.get(key) if data.get(key) is not None else np.full((k, len(outputs)), np.nan),
                          dtype=float).reshape(k, -1)

    first, total = arr("first_order"), arr("total_order")
    f_lo, f_hi, t_lo, t_hi = arr("first_order_low"), arr("first_order_high"), arr("total_order_low"), arr("total_order_high")
    ncols = min(2, len(outputs))
    nrows = int(np.ceil(len(outputs) / ncols))
    shown = min(k, max_parameters)
    fig = Figure(figsize=(5.5 * ncols, 0.32 * shown * nrows + 1.4 * nrows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols)).ravel()
    for j, out in enumerate(outputs):
        ax = axes[j]
        order = np.argsort(-np.nan_to_num(total[:, j], nan=-1))[:shown][::-1]
        y = np.arange(len(order))
        for values, lo, hi, dy, colour, name in ((first, f_lo, f_hi, -0.18, "#7fa7d1", "first order S"),
                                                 (total, t_lo, t_hi, 0.18, BEST, "total S_T")):
            v = values[order, j]
            err = np.vstack([np.clip(v - lo[order, j], 0, None), np.clip(hi[order, j] - v, 0, None)])
            err = np.where(np.isfinite(err), err, 0.0)
            ax.barh(y + dy, v, height=0.34, color=colour, xerr=err, error_kw={"lw": 0.8, "capsize": 2}, label=name)
        ax.set_yticks(y, [names[i] for i in order], fontsize=8)
        ax.set_xlim(left=min(0.0, float(np.nanmin(np.concatenate([first[:, j], [0.0]])))))
        ax.set_xlabel("share of the output variance")
        ax.set_title(str(out), fontsize=9)
        ax.grid(alpha=0.3, axis="x")
        ax.legend(fontsize=7, loc="lower right")
    for extra in axes[len(outputs):]:
        extra.set_visible(False)
    level = data.get("confidence_level")
    if level:
        fig.suptitle(f"Sobol' indices with {100 * float(level):.0f} % intervals", fontsize=10)
    return fig


# --------------------------------------------------------------------------- surrogate trust


@dataclass
class ParityPanel:
    """One target's leave-one-out check: ``loo`` has design, actual, predicted, predicted_std."""

    title: str
    loo: pd.DataFrame
    axis_label: str
    highlight: dict[int, tuple[str, str]] = field(default_factory=dict)  # design id -> (colour, legend)


def parity_figure(panels: Sequence[ParityPanel]) -> Figure:
    """Predicted (by the model fitted without the design) against the solver's value, one panel per target."""
    n = len(panels)
    ncols = min(3, n)
    nrows = int(np.ceil(n / ncols))
    fig = Figure(figsize=(4.3 * ncols, 4.2 * nrows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols)).ravel()
    for ax, panel in zip(axes, panels, strict=False):
        t = panel.loo
        actual, pred = t["actual"].to_numpy(float), t["predicted"].to_numpy(float)
        err = 2.0 * t["predicted_std"].to_numpy(float)
        has_err = np.isfinite(err).any()
        ax.errorbar(actual, pred, yerr=np.where(np.isfinite(err), err, 0.0) if has_err else None, fmt="o", ms=4,
                    color="#555555", ecolor="#bbbbbb", elinewidth=0.8, zorder=3,
                    label="design (±2σ without it)" if has_err else "design")
        for design, (colour, name) in panel.highlight.items():
            hit = t["design"] == design
            if hit.any():
                ax.plot(actual[hit.to_numpy()], pred[hit.to_numpy()], "o", ms=8, mfc="none", mec=colour, mew=2,
                        zorder=4, label=name)
        both = np.concatenate([actual, pred])
        lo, hi = float(np.nanmin(both)), float(np.nanmax(both))
        pad = 0.05 * (hi - lo or 1.0)
        ax.plot([lo - pad, hi + pad], [lo - pad, hi + pad], color="#999999", lw=1, zorder=1)
        ax.set_xlim(lo - pad, hi + pad)
        ax.set_ylim(lo - pad, hi + pad)
        ax.set_aspect("equal", adjustable="box")
        ax.set_xlabel(f"solver: {panel.axis_label}")
        ax.set_ylabel("surrogate, fitted without that design")
        ax.set_title(panel.title, fontsize=9)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="upper left")
    for extra in axes[n:]:
        extra.set_visible(False)
    return fig


# --------------------------------------------------------------------------- slices

Predict = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


@dataclass
class Slice:
    """The objective surrogate along one parameter, the others held at the centre design."""

    parameter: Parameter
    x: np.ndarray  # physical values (level index for a choice parameter)
    u: np.ndarray  # unit-cube coordinate
    mean: np.ndarray
    std: np.ndarray
    infeasible: np.ndarray  # bool: a constraint surrogate predicts a violation here

    @property
    def span(self) -> float:
        """How far the predicted objective moves along the slice: the ranking of parameters."""
        return float(np.nanmax(self.mean) - np.nanmin(self.mean))


def axis_points(p: Parameter, n: int) -> tuple[np.ndarray, np.ndarray, bool]:
    """Unit coordinates, plotting positions and whether the axis is discrete (integer or choice levels)."""
    if p.kind == "continuous":
        u = np.linspace(0.0, 1.0, n)
        return u, p.lower + u * (p.upper - p.lower), False  # type: ignore[operator]
    levels = p.levels or 1
    u = (np.arange(levels) + 0.5) / levels
    if p.kind == "integer":
        return u, np.arange(levels) + int(p.lower), True  # type: ignore[arg-type]
    return u, _choice_positions(p), True


def _choice_positions(p: Parameter) -> np.ndarray:
    """Numeric choices are placed at their values; others at 0, 1, 2, ... with their names as ticks."""
    try:
        return np.array([float(c) for c in p.choices])
    except (TypeError, ValueError):
        return np.arange(len(p.choices), dtype=float)


def _to_position(p: Parameter, value: object) -> float:
    if p.kind == "choice":
        positions = _choice_positions(p)
        try:
            return float(positions[list(p.choices).index(value)])
        except ValueError:
            return float("nan")
    return float(value)  # type: ignore[arg-type]


def compute_slices(space: DesignSpace, centre: np.ndarray, objective: Predict, constraints: Sequence[Predict],
                   n: int = SLICE_POINTS) -> list[Slice]:
    """One main-effect curve per free parameter through ``centre`` (unit cube), all in one batch."""
    blocks, meta = [], []
    for i, p in enumerate(space.free):
        u, x, _ = axis_points(p, n)
        U = np.repeat(centre[None, :], len(u), axis=0)
        U[:, i] = u
        blocks.append(U)
        meta.append((p, x, u))
    U = np.vstack(blocks)
    mean, std = objective(U)
    bad = np.zeros(len(U), bool)
    for c in constraints:
        m, _ = c(U)
        bad |= m > 0
    out, start = [], 0
    for p, x, u in meta:
        rows = slice(start, start + len(u))
        out.append(Slice(p, x, u, mean[rows], std[rows], bad[rows]))
        start += len(u)
    return out


def slices_figure(slices: Sequence[Slice], *, centre_values: Mapping[str, object], designs: pd.DataFrame,
                  objective_label: str, best_label: str) -> Figure:
    """Main-effect curves with ±2σ bands, the centre value, evaluated designs and predicted-infeasible shading.

    ``designs`` holds the finished designs' parameter values and ``objective`` (and ``feasible``);
    they are drawn faintly because their other parameters differ from the slice's.
    """
    n = len(slices)
    ncols = min(4, n)
    nrows = int(np.ceil(n / ncols))
    fig = Figure(figsize=(3.3 * ncols, 2.9 * nrows + 0.5), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, sharey=True)).ravel()
    lows = np.concatenate([s.mean - 2 * np.nan_to_num(s.std) for s in slices])
    highs = np.concatenate([s.mean + 2 * np.nan_to_num(s.std) for s in slices])
    lo, hi = float(np.nanmin(lows)), float(np.nanmax(highs))
    pad = 0.08 * (hi - lo or 1.0)
    for ax, s in zip(axes, slices, strict=False):
        p = s.parameter
        _, _, discrete = axis_points(p, 2)
        if s.infeasible.any():
            _shade_runs(ax, s.x, s.infeasible, discrete)
        if discrete:
            ax.errorbar(s.x, s.mean, yerr=2 * np.nan_to_num(s.std), fmt="o-", color=BEST, ms=5, capsize=3, zorder=4)
            step = float(np.diff(s.x).min()) if len(s.x) > 1 else 1.0
            ax.set_xlim(s.x[0] - 0.6 * step, s.x[-1] + 0.6 * step)
            ax.set_xticks(s.x, [str(c) for c in p.choices] if p.kind == "choice" else [f"{v:g}" for v in s.x])
        else:
            ax.fill_between(s.x, s.mean - 2 * s.std, s.mean + 2 * s.std, color=BEST, alpha=0.18, lw=0)
            ax.plot(s.x, s.mean, color=BEST, lw=1.8, zorder=4)
        if p.name in designs.columns and "objective" in designs.columns:
            xs = np.array([_to_position(p, v) for v in designs[p.name]])
            ax.scatter(xs, designs["objective"], s=9, color="#777777", alpha=0.45, zorder=2, lw=0)
        centre = _to_position(p, centre_values.get(p.name))
        ax.axvline(centre, color="#222222", lw=1, ls="--", zorder=3)
        ax.set_xlabel(label(p.name, p.unit), fontsize=9)
        ax.set_ylim(lo - pad, hi + pad)
        ax.grid(alpha=0.3)
        ax.tick_params(labelsize=8)
    for ax in axes[::ncols]:
        ax.set_ylabel(objective_label, fontsize=9)
    for extra in axes[n:]:
        extra.set_visible(False)
    fig.legend([Line2D([], [], color=BEST, lw=2), Patch(color=BEST, alpha=0.18), Line2D([], [], color="#222222", ls="--"),
                Line2D([], [], marker="o", ls="", color="#777777", alpha=0.5), Patch(color=SHADE)],
               ["surrogate mean", "±2σ", best_label, "evaluated designs (other parameters differ)",
                "a constraint predicted violated"], loc="outside lower center", ncols=5, fontsize=8)
    return fig


def _shade_runs(ax: object, x: np.ndarray, mask: np.ndarray, discrete: bool) -> None:
    """Shade the x ranges where ``mask`` holds (half a step either side of each flagged point)."""
    if len(x) < 2:
        return
    half = np.diff(x).min() / 2 if discrete else (x[1] - x[0]) / 2
    start = None
    for i, flag in enumerate([*list(mask), False]):
        if flag and start is None:
            start = i
        elif not flag and start is not None:
            ax.axvspan(x[start] - half, x[i - 1] + half, color=SHADE, lw=0, zorder=0)  # type: ignore[attr-defined]
            start = None


@dataclass
class ContourMap:
    """The objective surrogate over two parameters, the others held at the centre design."""

    px: Parameter
    py: Parameter
    x: np.ndarray
    y: np.ndarray
    mean: np.ndarray  # shape (len(y), len(x))
    infeasible: np.ndarray  # bool, same shape
    margin: np.ndarray  # the largest predicted constraint margin, same shape (NaN without constraints)


def compute_contour(space: DesignSpace, centre: np.ndarray, i: int, j: int, objective: Predict,
                    constraints: Sequence[Predict], n: int = CONTOUR_POINTS) -> ContourMap:
    """The objective over parameters ``i`` and ``j`` of the free ones, with the predicted-infeasible mask."""
    px, py = space.free[i], space.free[j]
    ux, x, _ = axis_points(px, n)
    uy, y, _ = axis_points(py, n)
    gx, gy = np.meshgrid(ux, uy)
    U = np.repeat(centre[None, :], gx.size, axis=0)
    U[:, i], U[:, j] = gx.ravel(), gy.ravel()
    mean, _ = objective(U)
    margin = np.full(len(U), -np.inf)
    for c in constraints:
        margin = np.maximum(margin, c(U)[0])
    shape = gx.shape
    margin = margin.reshape(shape) if constraints else np.full(shape, np.nan)
    return ContourMap(px, py, x, y, mean.reshape(shape), (margin > 0) if constraints else np.zeros(shape, bool), margin)


def contour_figure(maps: Sequence[ContourMap], *, centre_values: Mapping[str, object], designs: pd.DataFrame,
                   objective_label: str, best_label: str) -> Figure:
    """Filled contours of the objective over pairs of parameters, infeasible region hatched, designs overlaid."""
    n = len(maps)
    ncols = min(3, n)
    nrows = int(np.ceil(n / ncols))
    fig = Figure(figsize=(4.6 * ncols, 4.0 * nrows + 0.5), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols)).ravel()
    allv = np.concatenate([m.mean.ravel() for m in maps])
    levels = MaxNLocator(nbins=14).tick_values(float(np.nanmin(allv)), float(np.nanmax(allv)))
    mappable = None
    for ax, m in zip(axes, maps, strict=False):
        dx = axis_points(m.px, 2)[2]
        dy = axis_points(m.py, 2)[2]
        if dx or dy:
            mappable = ax.pcolormesh(m.x, m.y, m.mean, shading="nearest", cmap="viridis", vmin=levels[0], vmax=levels[-1])
        else:
            mappable = ax.contourf(m.x, m.y, m.mean, levels=levels, cmap="viridis")
            ax.contour(m.x, m.y, m.mean, levels=levels, colors="white", linewidths=0.3, alpha=0.5)
        if m.infeasible.any():
            # washed out and hatched in red: the feasible region keeps its colours, the rest is still readable
            ax.contourf(m.x, m.y, m.infeasible.astype(float), levels=[0.5, 1.5], colors=["white"], alpha=0.45)
            with rc_context({"hatch.color": INFEASIBLE, "hatch.linewidth": 0.8}):
                ax.contourf(m.x, m.y, m.infeasible.astype(float), levels=[0.5, 1.5], colors="none", hatches=["///"])
            if not (dx or dy):
                ax.contour(m.x, m.y, m.margin, levels=[0.0], colors=[INFEASIBLE], linewidths=1.5)
        for col, p in (("x", m.px), ("y", m.py)):
            if p.kind == "choice":
                pos = _choice_positions(p)
                (ax.set_xticks if col == "x" else ax.set_yticks)(pos, [str(c) for c in p.choices])
        if m.px.name in designs.columns and m.py.name in designs.columns:
            xs = np.array([_to_position(m.px, v) for v in designs[m.px.name]])
            ys = np.array([_to_position(m.py, v) for v in designs[m.py.name]])
            feas = designs["feasible"].fillna(False).astype(bool).to_numpy() if "feasible" in designs else np.ones(len(xs), bool)
            ax.scatter(xs[feas], ys[feas], s=16, facecolor="white", edgecolor="black", lw=0.7, zorder=4)
            ax.scatter(xs[~feas], ys[~feas], s=22, marker="x", color=INFEASIBLE, lw=1.3, zorder=4)
        cx, cy = _to_position(m.px, centre_values.get(m.px.name)), _to_position(m.py, centre_values.get(m.py.name))
        ax.plot([cx], [cy], marker="*", ms=15, color=BEST, mec="white", mew=1, zorder=5)
        ax.set_xlabel(label(m.px.name, m.px.unit), fontsize=9)
        ax.set_ylabel(label(m.py.name, m.py.unit), fontsize=9)
        ax.tick_params(labelsize=8)
    for extra in axes[n:]:
        extra.set_visible(False)
    if mappable is not None:
        fig.colorbar(mappable, ax=list(axes[:n]), label=f"predicted {objective_label}", shrink=0.9)
    fig.legend([Line2D([], [], marker="*", ls="", ms=12, color=BEST),
                Line2D([], [], marker="o", ls="", mfc="white", mec="black"),
                Line2D([], [], marker="x", ls="", color=INFEASIBLE),
                Patch(facecolor="#f3eef3", edgecolor=INFEASIBLE, hatch="///", lw=0)],
               [best_label, "feasible design (all parameters)", "infeasible design", "a constraint predicted violated"],
               loc="outside lower center", ncols=4, fontsize=8)
    return fig


# --------------------------------------------------------------------------- quantities against the condition


@dataclass
class QuantityLine:
    """One design's values of one quantity at every condition (NaN where a case is not done)."""

    name: str
    values: np.ndarray
    colour: str
    marker: str
    band: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None  # (mean, low, high) of the surrogate without it


def quantities_figure(x: np.ndarray, xlabel: str, xticks: Sequence[str] | None,
                      panels: Sequence[tuple[str, Sequence[QuantityLine]]]) -> Figure:
    """Each quantity against the condition: one panel per quantity, one line per design shown."""
    n = len(panels)
    ncols = min(2, n)
    nrows = int(np.ceil(n / ncols))
    fig = Figure(figsize=(5.6 * ncols, 3.9 * nrows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols)).ravel()
    for ax, (ylabel, lines) in zip(axes, panels, strict=False):
        for line in lines:
            if line.band is not None:
                mean, low, high = line.band
                ax.fill_between(x, low, high, color=line.colour, alpha=0.15, lw=0,
                                label=f"{line.name}: surrogate without it, ±2σ")
                ax.plot(x, mean, color=line.colour, lw=1, ls=":")
            ax.plot(x, line.values, marker=line.marker, color=line.colour, lw=2, ms=6, label=line.name)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
        if xticks is not None:
            ax.set_xticks(x, list(xticks), fontsize=8)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
    for extra in axes[n:]:
        extra.set_visible(False)
    return fig

