"""The notebook API: tables that match the ledger and the exports row for row, and surrogates in physical units.

Most tests run on campaigns written straight into a ledger through the Ledger API, the way the
conductor writes them (fast, no Prefect); one finished campaign run through the real flow is
shared with ``tests/test_report.py``. The helpers that build both live here.
"""

from __future__ import annotations

import json
import math
import shutil
import sqlite3
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml

from sortie import campaign
from sortie.adapters.registry import check_solver
from sortie.api import ApiError, open_campaign
from sortie.config import load_config
from sortie.ledger import Ledger, ledger_path
from sortie.mock_solver.physics import evaluate
from sortie.plan import first_designs
from tests.conftest import DEMO_CONFIG, write_config

SLED_MODEL = '''"""The mock sled physics, in-process, with a region where the "mesher" fails."""
from sortie.mock_solver.physics import evaluate


def sled(parameters, condition):
    if float(parameters["ramp_angle"]) > 13.0:
        raise RuntimeError("mesh generation failed: ramp steeper than 13 deg")
    return evaluate(parameters, condition["mach"])
'''


def sled_model(p: dict[str, Any], c: dict[str, float]) -> dict[str, float]:
    """The same model as ``SLED_MODEL``, called directly by :func:`simulate_campaign`."""
    if float(p["ramp_angle"]) > 13.0:
        raise RuntimeError("mesh generation failed: ramp steeper than 13 deg")
    return evaluate(p, c["mach"])


def sled_config(directory: Path, **changes: Any) -> dict[str, Any]:
    """The demo's sled campaign, solved in-process by the mock physics, smaller than the demo."""
    model = directory / "sled_model.py"
    model.write_text(SLED_MODEL)
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    config["solver"] = {"adapter": "python", "function": f"{model}:sled"}
    config["quantities"] = {"lift": {"unit": "-"}, "drag": {"unit": "-"}}
    config["plan"] = {"initial": {"method": "lhs", "designs": 12}, "infill": {"candidates": 256, "restarts": 2}}
    config["budget"] = {"designs": 18}
    config.update(changes)
    return config


def finished_campaign(factory: pytest.TempPathFactory) -> Path:
    """A finished sled campaign run through the real flow, once per test session (both modules share it)."""
    from sortie.flows.campaign import run_campaign

    root = factory.getbasetemp() / "sortie-finished-sled"
    directory = root / "camp"
    if (root / "complete").exists():
        return directory
    if root.exists():
        shutil.rmtree(root)
    root.mkdir()
    path = write_config(root, sled_config(root))
    campaign.prepare(path, load_config(path, check_solver=check_solver), directory)
    run_campaign(directory)
    (root / "complete").touch()
    return directory


def simulate_campaign(root: Path, config: dict[str, Any], *, folder: str = "sim", running: int = 0,
                      model: Callable[[dict[str, Any], dict[str, float]], dict[str, float]] = sled_model) -> Path:
    """Write a campaign's first designs into a fresh ledger as the conductor would, without Prefect.

    The last ``running`` designs are left with their cases running (a campaign caught mid-way);
    the others are solved by ``model`` and scored with the goal.
    """
    path = write_config(root, config, name=f"{folder}.yaml")
    cfg = load_config(path, check_solver=check_solver)
    directory = root / folder
    campaign.prepare(path, cfg, directory)
    goal, conditions = cfg.goal.build(), cfg.condition_list()
    planned = first_designs(cfg.plan, cfg.space(), cfg.campaign.seed)
    baseline = None
    with Ledger.open(ledger_path(directory)) as ledger:
        for k, design in enumerate(planned):
            design_id = ledger.add_design(stage=design.stage, reason=design.reason, values=design.values,
                                          unit=design.unit, conditions=conditions)
            cases = ledger.cases(design_id=design_id)
            vectors: dict[str, list[float]] = {q: [] for q in cfg.quantities}
            failed = False
            for case in cases:
                ledger.mark_submitting(case.id, directory / "cases" / case.name)
                ledger.mark_running(case.id, f"job-{case.id}")
                if k >= len(planned) - running:
                    continue
                try:
                    quantities = model(design.values, case.condition)
                except RuntimeError as err:
                    ledger.finish_case(case.id, failure_class="solver", reason=str(err))
                    failed = True
                    continue
                ledger.finish_case(case.id, quantities=quantities)
                for q in vectors:
                    vectors[q].append(quantities[q])
            if k >= len(planned) - running:
                continue
            if failed:
                ledger.finish_design(design_id, status="failed")
                continue
            values = {q: np.array(v) for q, v in vectors.items()}
            baseline = baseline or values
            score = goal.score(values, baseline, conditions)
            ledger.finish_design(design_id, status="done", objective=score.objective, constraints=score.constraints,
                                 feasible=score.feasible)
        assert ledger.check_consistency() == []
    return directory


def snapshot_at(source: Path, target: Path, when: float) -> Path:
    """A copy of a campaign's ledger as it stood at time ``when``: what a copy taken mid-campaign holds.

    Rows created later are removed, cases started but not ended then are running, designs not
    finished then are pending; the result passes the ledger's consistency check.
    """
    target.mkdir(parents=True)
    shutil.copy(source / campaign.CONFIG_COPY, target / campaign.CONFIG_COPY)
    with sqlite3.connect(ledger_path(source)) as src, sqlite3.connect(ledger_path(target)) as dst:
        src.backup(dst)
    con = sqlite3.connect(ledger_path(target))
    with con:
        for table, column in (("models", "at"), ("events", "at"), ("analyses", "at"), ("attempts", "started_at")):
            con.execute(f"DELETE FROM {table} WHERE {column} > ?", (when,))
        con.execute("DELETE FROM cases WHERE design_id IN (SELECT id FROM designs WHERE created_at > ?)", (when,))
        con.execute("DELETE FROM designs WHERE created_at > ?", (when,))
        con.execute("UPDATE cases SET state = 'planned', job_id = NULL, workdir = NULL, started_at = NULL, ended_at = NULL,"
                    " quantities_json = NULL, failure_class = NULL, failure_reason = NULL"
                    " WHERE started_at IS NULL OR started_at > ?", (when,))
        con.execute("UPDATE cases SET state = 'running', ended_at = NULL, quantities_json = NULL, failure_class = NULL,"
                    " failure_reason = NULL WHERE started_at <= ? AND (ended_at IS NULL OR ended_at > ?)", (when, when))
        con.execute("UPDATE attempts SET state = 'running', ended_at = NULL, failure_class = NULL, reason = NULL"
                    " WHERE ended_at > ?", (when,))
        con.execute("UPDATE cases SET attempts = (SELECT COUNT(*) FROM attempts a WHERE a.case_id = cases.id)")
        con.execute("UPDATE designs SET status = 'pending', objective = NULL, constraints_json = NULL, feasible = NULL,"
                    " finished_at = NULL WHERE finished_at IS NULL OR finished_at > ?", (when,))
    con.close()
    with Ledger.open(ledger_path(target), readonly=True) as ledger:
        assert ledger.check_consistency() == []
    return target


@pytest.fixture(scope="module")
def sim(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("api-sim")
    return simulate_campaign(root, sled_config(root), running=2)


# --------------------------------------------------------------------------- tables


def _ledger_rows(directory: Path, query: str) -> list[sqlite3.Row]:
    """Rows read with plain SQL from the ledger file, not through any sortie reader."""
    con = sqlite3.connect(f"file:{ledger_path(directory)}?mode=ro", uri=True)
    con.row_factory = sqlite3.Row
    try:
        return con.execute(query).fetchall()
    finally:
        con.close()


def _same(shown: Any, stored: Any) -> bool:
    """A table cell against a ledger value: NaN or pd.NA in the table stands for NULL."""
    if stored is None:
        return bool(pd.isna(shown))
    if isinstance(stored, float):
        return not pd.isna(shown) and float(shown) == stored
    return bool(shown == stored)


def assert_tables_match_ledger_rows(directory: Path) -> None:
    """``designs()`` and ``cases()`` hold, cell by cell, what the ledger's own rows say."""
    view = open_campaign(directory)
    parameters, constraints = list(view.config.parameters), list(view.config.goal.subject_to)
    conditions, quantities = list(view.config.conditions), list(view.config.quantities)
    designs = view.designs()
    rows = _ledger_rows(directory, "SELECT id, stage, values_json, status, objective, constraints_json, feasible"
                                   " FROM designs ORDER BY id")
    assert list(designs.columns) == ["id", "stage", *parameters, "objective", *constraints, "feasible", "status"]
    assert designs["id"].tolist() == [r["id"] for r in rows]
    for shown, r in zip(designs.to_dict("records"), rows, strict=True):
        values, margins = json.loads(r["values_json"]), json.loads(r["constraints_json"] or "{}")
        stored = {"stage": r["stage"], "status": r["status"], "objective": r["objective"],
                  "feasible": None if r["feasible"] is None else bool(r["feasible"]),
                  **{p: values[p] for p in parameters}, **{c: margins.get(c) for c in constraints}}
        assert all(_same(shown[k], v) for k, v in stored.items()), (shown, dict(r))
    cases = view.cases()
    rows = _ledger_rows(directory, "SELECT * FROM cases ORDER BY id")
    assert list(cases.columns) == ["id", "design", "condition_index", *conditions, "state", "attempts", "job_id",
                                   *quantities, "failure_class", "failure_reason", "started_at", "ended_at"]
    assert cases["id"].tolist() == [r["id"] for r in rows]
    for shown, r in zip(cases.to_dict("records"), rows, strict=True):
        condition, results = json.loads(r["condition_json"]), json.loads(r["quantities_json"] or "{}")
        stored = {"design": r["design_id"], "condition_index": r["condition_index"], "state": r["state"],
                  "attempts": r["attempts"], "job_id": r["job_id"], "failure_class": r["failure_class"],
                  "failure_reason": r["failure_reason"], "started_at": r["started_at"], "ended_at": r["ended_at"],
                  **{c: condition[c] for c in conditions}, **{q: results.get(q) for q in quantities}}
        assert all(_same(shown[k], v) for k, v in stored.items()), (shown, dict(r))


def test_designs_and_cases_match_the_ledger_rows_read_with_sql(sim: Path) -> None:
    assert_tables_match_ledger_rows(sim)
    designs = open_campaign(sim).designs()
    assert len(designs) == 13 and (designs["status"] == "pending").sum() == 2


def test_cases_hold_every_ledger_case_with_its_quantities(sim: Path) -> None:
    view = open_campaign(sim)
    table = view.cases()
    with Ledger.open(ledger_path(sim), readonly=True) as ledger:
        cases = ledger.cases()
    assert list(table.columns) == ["id", "design", "condition_index", "mach", "state", "attempts", "job_id", "lift", "drag",
                                   "failure_class", "failure_reason", "started_at", "ended_at"]
    assert table["id"].tolist() == [c.id for c in cases]
    for row, case in zip(table.itertuples(index=False), cases, strict=True):
        assert (row.design, row.condition_index, row.mach, row.state) == (case.design_id, case.condition_index,
                                                                         case.condition["mach"], case.state)
        assert (row.attempts, _none(row.job_id), row.started_at) == (case.attempts, case.job_id, case.started_at)
        if case.state == "done":
            assert (row.lift, row.drag) == (case.quantities["lift"], case.quantities["drag"])
        else:
            assert math.isnan(row.lift) and math.isnan(row.drag)
        assert (_none(row.failure_class), _none(row.failure_reason)) == (case.failure_class, case.failure_reason)
    assert {"done", "running"} <= set(table["state"]) and "failed" in set(table["state"])


def _none(value: Any) -> Any:
    """pandas shows a missing text as NaN (or pd.NA); the ledger as None."""
    return None if pd.isna(value) else value


def test_exports_round_trip_through_csv_and_parquet(sim: Path, tmp_path: Path) -> None:
    view = open_campaign(sim)
    for name, table in (("designs", view.designs()), ("cases", view.cases())):
        table.to_csv(tmp_path / f"{name}.csv", index=False)
        table.to_parquet(tmp_path / f"{name}.parquet", index=False)
        back_csv = pd.read_csv(tmp_path / f"{name}.csv")
        back_parquet = pd.read_parquet(tmp_path / f"{name}.parquet")
        pd.testing.assert_frame_equal(back_parquet, table)
        assert list(back_csv.columns) == list(table.columns) and len(back_csv) == len(table)
        for column in table.columns:
            ours, theirs = table[column], back_csv[column]
            if pd.api.types.is_numeric_dtype(theirs) and not pd.api.types.is_bool_dtype(ours):
                np.testing.assert_array_equal(pd.to_numeric(ours, errors="coerce").to_numpy(float), theirs.to_numpy(float))
            else:
                assert [None if pd.isna(v) else str(v) for v in ours] == [None if pd.isna(v) else str(v) for v in theirs]


def test_cli_export_equals_the_api_designs(sim: Path, tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from sortie.cli import app

    out = tmp_path / "designs.parquet"
    result = CliRunner().invoke(app, ["export", str(sim), "--to", str(out)])
    assert result.exit_code == 0, result.output
    pd.testing.assert_frame_equal(pd.read_parquet(out), open_campaign(sim).designs())


def test_best_is_the_best_feasible_design(sim: Path) -> None:
    view = open_campaign(sim)
    best = view.best()
    designs = view.designs()
    feasible = designs[(designs["status"] == "done") & designs["feasible"].fillna(False).astype(bool)]
    assert best is not None
    assert best["id"] == feasible.loc[feasible["objective"].idxmin(), "id"]
    assert best["objective"] == feasible["objective"].min() and bool(best["feasible"])
    assert view.baseline()["id"] == 1


def test_events_attempts_and_analyses(sim: Path) -> None:
    view = open_campaign(sim)
    events = view.events()
    assert list(events.columns) == ["id", "at", "kind", "message", "data"]
    assert (events["kind"] == "design").sum() == 13 and events["data"].iloc[0] == {"design": 1}
    assert len(view.attempts()) == len(view.cases())
    assert view.screening() is None and view.sobol() is None and view.analyses() == []


def test_the_view_reads_a_ledger_that_is_being_written(sim: Path, tmp_path: Path) -> None:
    """A view keeps no connection open and sees every new row: safe beside a running campaign."""
    copy = tmp_path / "copy"
    shutil.copytree(sim, copy)
    view = open_campaign(copy)
    before = len(view.designs())
    with Ledger.open(ledger_path(copy)) as writer:  # the orchestrator's connection (WAL mode)
        writer.add_design(stage="infill", reason="test", values=view.design_rows()[0].values, unit=[0.5] * 8,
                          conditions=view.config.condition_list())
        assert len(view.designs()) == before + 1
        assert len(view.cases()) == 4 * (before + 1)


# --------------------------------------------------------------------------- surrogates


def test_surrogate_predicts_evaluated_designs_in_physical_units(sim: Path) -> None:
    view = open_campaign(sim)
    done = view.designs().query("status == 'done'")
    for target, column in (("objective", "objective"), ("drag <= baseline.drag", "drag <= baseline.drag")):
        model = view.surrogate(target)
        assert model.name in ("gp", "quadratic", "rbf") and model.y.size == len(done)
        mean, std = model.predict(done)
        scale = float(np.ptp(done[column]))
        np.testing.assert_allclose(mean, done[column].to_numpy(float), atol=0.05 * scale)
        assert mean.shape == std.shape == (len(done),)
        assert np.isfinite(model.score.loo_rmse)


def test_surrogate_of_a_quantity_at_a_condition(sim: Path) -> None:
    view = open_campaign(sim)
    cases = view.cases().query("state == 'done' and mach == 1.1")
    model = view.surrogate("lift[mach=1.1]")
    assert model.target == "lift[mach=1.1]" and model.unit == "-"
    designs = view.designs().set_index("id").loc[cases["design"]]
    mean, _ = model.predict(designs)
    np.testing.assert_allclose(mean, cases["lift"].to_numpy(float), atol=0.05 * float(np.ptp(cases["lift"])))
    same = view.surrogate("lift", condition={"mach": 1.1})
    assert same is model, "one fit per target and ledger state"
    assert view.surrogate("lift", condition=2).target == "lift[mach=1.1]"


def test_prediction_takes_dicts_and_lists_of_values(sim: Path) -> None:
    view = open_campaign(sim)
    model = view.surrogate("objective")
    best = view.best()
    values = {name: best[name] for name in view.config.parameters}
    mean, _ = model.predict(values)
    assert mean.shape == (1,) and mean[0] == pytest.approx(best["objective"], abs=0.05 * np.ptp(model.y))
    two, _ = model.predict([values, {**values, "ramp_angle": 3.0}])
    assert two[0] == pytest.approx(mean[0]) and two[1] != pytest.approx(mean[0])
    columns, _ = model.predict({k: [v, v] for k, v in values.items()})
    np.testing.assert_allclose(columns, [mean[0], mean[0]])


def test_prediction_refuses_what_the_model_cannot_know(sim: Path) -> None:
    view = open_campaign(sim)
    model = view.surrogate("objective")
    values = {name: view.best()[name] for name in view.config.parameters}
    with pytest.raises(ApiError, match=r"'ramp_angle': 20 is outside its bounds \[2, 14\]"):
        model.predict({**values, "ramp_angle": 20.0})
    with pytest.raises(ApiError, match=r"'fin_count': 5 is not one of its choices \[2, 3, 4\]"):
        model.predict({**values, "fin_count": 5})
    missing = dict(values)
    del missing["skirt_gap"]
    with pytest.raises(ApiError, match="'skirt_gap' is missing"):
        model.predict(missing)


def test_unknown_targets_say_what_is_allowed(sim: Path) -> None:
    view = open_campaign(sim)
    with pytest.raises(ApiError, match=r"unknown; allowed: 'objective', 'drag <= baseline\.drag', 'lift', 'drag'"):
        view.surrogate("downforce")
    with pytest.raises(ApiError, match=r"pick one: lift\[mach=0.6\]"):
        view.surrogate("lift")
    with pytest.raises(ApiError, match="matches none"):
        view.surrogate("lift[mach=2]")
    assert view.targets()[:3] == ["objective", "drag <= baseline.drag", "lift[mach=0.6]"]


def test_loo_table_matches_refits_without_each_design(sim: Path) -> None:
    """The closed-form leave-one-out prediction equals a refit without the design, at fixed hyper-parameters."""
    from sortie.models import GaussianProcessSurrogate

    view = open_campaign(sim)
    model = view.surrogate("objective", models=["gp"])
    loo = model.loo()
    assert loo["design"].tolist() == list(model.design_ids)
    for i in (0, len(loo) // 2):
        keep = np.arange(len(model.y)) != i
        refit = GaussianProcessSurrogate(warm_kernel=model.model.kernel_, optimize=False)
        refit.fit(model.X[keep], model.y[keep])
        # the closed form keeps the full-data y normalisation, the refit renormalises: close, not identical
        assert loo["predicted"].iloc[i] == pytest.approx(refit.predict(model.X[i : i + 1])[0],
                                                         abs=0.02 * float(np.ptp(model.y)))


def test_too_few_designs_is_one_clear_sentence(tmp_path: Path) -> None:
    directory = simulate_campaign(tmp_path, sled_config(tmp_path), running=11)
    view = open_campaign(directory)
    with pytest.raises(ApiError, match="2 finished designs so far; a surrogate needs at least 3"):
        view.surrogate("objective")
    assert view.best() is not None  # the baseline is feasible against itself
    assert (view.designs()["status"] == "pending").sum() == 11


def test_after_screening_the_model_spans_the_selected_parameters(tmp_path: Path) -> None:
    config = sled_config(tmp_path)
    directory = simulate_campaign(tmp_path, config)
    names = list(config["parameters"])
    with Ledger.open(ledger_path(directory)) as ledger:
        ledger.add_analysis("screening", {"method": "morris", "parameters": names, "outputs": ["objective"],
                                          "selected": names[:3], "fixed": names[3:]})
    view = open_campaign(directory)
    model = view.surrogate("objective")
    assert [p.name for p in model.space.free] == names[:3] and model.X.shape[1] == 3
    mean, _ = model.predict({n: view.best()[n] for n in names[:3]})  # the fixed ones are not needed
    assert mean.shape == (1,)


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_api")
def test_a_campaign_run_by_the_flow_reads_back_whole(tmp_path_factory: pytest.TempPathFactory) -> None:
    directory = finished_campaign(tmp_path_factory)
    view = open_campaign(directory)
    assert_tables_match_ledger_rows(directory)
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert ledger.check_consistency() == []
        chosen = ledger.model_choices()
    assert len(view.designs()) == 18 and set(view.designs()["stage"]) == {"baseline", "initial", "infill"}
    choices = view.model_choices()
    # the demo's swing goal is composite: one model per quantity at each of its conditions
    outputs = {f"{q}[mach={m:g}]" for q in ("lift", "drag") for m in view.config.conditions["mach"]}
    assert set(choices["target"]) == set(chosen) == outputs
    assert choices.groupby("target")["chosen"].sum().tolist() == [1] * len(outputs)
    best = view.best()
    model = view.surrogate("objective")
    mean, _ = model.predict(view.designs().query("status == 'done'"))
    done = view.designs().query("status == 'done'")["objective"].to_numpy(float)
    np.testing.assert_allclose(mean, done, atol=0.05 * float(np.ptp(done)))
    assert best is not None
    if best["stage"] == "infill":
        assert not math.isnan(best["predicted"]), "an infill design carries the prediction made when it was proposed"
