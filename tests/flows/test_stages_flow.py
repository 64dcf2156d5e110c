"""Staged plans through the real flow: screening selects, later stages use the selection, confirmation checks."""

from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from sortie import campaign
from sortie.adapters.registry import check_solver
from sortie.config import load_config
from sortie.ledger import Ledger, ledger_path
from sortie.mock_solver import physics
from tests.conftest import ROOT, write_config

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("prefect_api")]
DEMO_20 = ROOT / "configs" / "sled-aftbody-20.yaml"


def _config(**plan_changes: object) -> dict:
    """The twenty-parameter demo on the mock's physics in-process (python adapter), at two Mach numbers."""
    config = yaml.safe_load(DEMO_20.read_text())
    config["solver"] = {"adapter": "python", "function": "benchmarks.problems:sled_case"}
    config["quantities"] = {"lift": {}, "drag": {}}
    config["conditions"] = {"mach": [0.6, 1.3]}
    config["plan"] = {"screening": {"method": "morris", "trajectories": 4, "levels": 4, "select": {"fraction": 0.1}},
                      "initial": {"method": "lhs", "designs": 8}, **plan_changes}
    config["slots"] = 4
    return config


def _run(tmp_path: Path, config: dict) -> Path:
    from sortie.flows.campaign import run_campaign

    path = write_config(tmp_path, config)
    cfg = load_config(path, check_solver=check_solver)
    directory = tmp_path / "camp"
    campaign.prepare(path, cfg, directory)
    run_campaign(directory)
    return directory


def test_screening_selects_the_parameters_the_mock_uses_and_later_stages_keep_the_rest_at_baseline(tmp_path: Path) -> None:
    config = _config()
    config["budget"] = {"designs": 1 + 4 * 21 + 8}
    directory = _run(tmp_path, config)
    with Ledger.open(ledger_path(directory)) as ledger:
        assert ledger.check_consistency() == []
        designs = ledger.designs()
        (screening,) = ledger.analyses("screening")
    data = screening["data"]
    # The answer comes from the mock's own definition of what its physics reads.
    assert set(data["selected"]) == set(physics.ACTIVE_PARAMETERS)
    inert = set(config["parameters"]) - set(physics.ACTIVE_PARAMETERS)
    assert set(data["fixed"]) == inert
    assert len([d for d in designs if d.stage == "screening"]) == 4 * 21
    initial = [d for d in designs if d.stage == "initial"]
    assert len(initial) == 8 and len(designs) == config["budget"]["designs"]
    baseline = {name: spec["baseline"] for name, spec in config["parameters"].items()}
    for d in initial:
        assert all(d.values[name] == baseline[name] for name in inert), "fixed parameters stay at their baseline"
        assert len({d.values[name] for name in physics.ACTIVE_PARAMETERS} - {baseline[n] for n in physics.ACTIVE_PARAMETERS}) > 0
    mu_star = dict(zip(data["parameters"], data["mu_star"], strict=True))
    assert all(max(mu_star[name]) == 0.0 for name in inert), "the mock ignores these: their effects are exactly zero"


def test_infill_and_confirmation_after_screening(tmp_path: Path) -> None:
    config = _config(infill={"candidates": 256, "restarts": 2}, confirmation={"designs": 1})
    config["plan"]["screening"]["select"] = {"top": 3}
    config["budget"] = {"designs": 1 + 4 * 21 + 8 + 4 + 1}
    directory = _run(tmp_path, config)
    with Ledger.open(ledger_path(directory)) as ledger:
        assert ledger.check_consistency() == []
        designs = ledger.designs()
        (screening,) = ledger.analyses("screening")
        checks = ledger.analyses("confirmation")
        (sobol,) = ledger.analyses("sobol")
    kept = screening["data"]["selected"]
    # the second opinion on the surrogates covers the parameters still free, for every goal value
    assert sobol["data"]["parameters"] == kept and sobol["data"]["outputs"] == ["objective", *config["goal"]["subject_to"]]
    assert all(lo <= hi for row_lo, row_hi in zip(sobol["data"]["total_order_low"], sobol["data"]["total_order_high"],
                                                  strict=True) for lo, hi in zip(row_lo, row_hi, strict=True))
    assert len(kept) == 3
    stages = [d.stage for d in designs]
    assert stages.count("infill") == 4 and stages[-1] == "confirmation"
    confirmation = designs[-1]
    others = set(config["parameters"]) - set(kept)
    assert all(confirmation.values[n] == config["parameters"][n]["baseline"] for n in others)
    (check,) = [c["data"] for c in checks]
    assert check["design"] == confirmation.id
    assert check["objective"]["actual"] == pytest.approx(confirmation.objective)
    assert check["objective"]["predicted"] == pytest.approx(confirmation.prediction["objective_mean"])
    assert check["passed"] == bool(confirmation.feasible)
    assert [c["constraint"] for c in check["constraints"]] == config["goal"]["subject_to"]


def test_surrogate_screening_selects_the_parameters_the_mock_uses_and_its_designs_serve_later_stages(tmp_path: Path) -> None:
    config = _config()
    config["plan"]["screening"] = {"method": "surrogate", "select": {"fraction": 0.25}}
    config["budget"] = {"designs": 1 + 64 + 8}
    directory = _run(tmp_path, config)
    with Ledger.open(ledger_path(directory)) as ledger:
        assert ledger.check_consistency() == []
        designs = ledger.designs()
        (screening,) = ledger.analyses("screening")
        events = [e["message"] for e in ledger.events() if e["kind"] == "screening"]
    data = screening["data"]
    assert data["method"] == "surrogate" and data["n_designs"] == 64  # 3 x 20 rounded up to a power of two
    # The answer comes from the mock's own definition of what its physics reads.
    assert set(data["selected"]) == set(physics.ACTIVE_PARAMETERS)
    assert all(r2 >= 0.5 for r2 in data["loo_r2"]) and len(events) == 1, events  # no warning about the processes
    total = dict(zip(data["parameters"], data["total_order"], strict=True))
    inert = set(config["parameters"]) - set(physics.ACTIVE_PARAMETERS)
    assert max(max(total[n]) for n in inert) < min(max(total[n]) for n in physics.ACTIVE_PARAMETERS)
    screened = [d for d in designs if d.stage == "screening"]
    # Sobol' points move every parameter, so each one is a distinct design of the selected parameters too.
    assert len({tuple(d.values[n] for n in physics.ACTIVE_PARAMETERS if n != "fin_count") for d in screened}) == 64
    assert [d.stage for d in designs].count("initial") == 8 and len(designs) == config["budget"]["designs"]


def test_composite_infill_and_confirmation_through_the_flow(tmp_path: Path) -> None:
    # The demo's swing goal reads lift and drag at both Mach numbers and uses max/min: composite by default.
    config = _config(initial={"method": "lhs", "designs": 6}, infill={"candidates": 256, "restarts": 2},
                     confirmation={"designs": 1})
    del config["plan"]["screening"]
    for name in set(config["parameters"]) - set(physics.ACTIVE_PARAMETERS):
        config["parameters"][name]["fixed"] = True
    config["budget"] = {"designs": 1 + 6 + 4 + 1}
    assert load_config(write_config(tmp_path, config), check_solver=check_solver).surrogate_mode()[0] == "composite"
    directory = _run(tmp_path, config)
    with Ledger.open(ledger_path(directory)) as ledger:
        assert ledger.check_consistency() == []
        designs = ledger.designs()
        (check,) = [c["data"] for c in ledger.analyses("confirmation")]
        targets = set(ledger.model_choices())
    labels = {f"{q}[mach={m:g}]" for q in ("lift", "drag") for m in (0.6, 1.3)}
    assert labels <= targets  # one model per quantity per condition, recorded like any other choice
    infill = [d for d in designs if d.stage == "infill"]
    assert len(infill) == 4 and all(set(d.prediction["outputs"]) == labels for d in infill)
    confirmation = designs[-1]
    assert confirmation.stage == "confirmation" and check["design"] == confirmation.id
    assert {row["output"] for row in check["outputs"]} == labels
    if confirmation.status == "done":
        rows = {row["output"]: row for row in check["outputs"]}
        swing = max(rows[f"lift[mach={m:g}]"]["actual"] for m in (0.6, 1.3)) - \
            min(rows[f"lift[mach={m:g}]"]["actual"] for m in (0.6, 1.3))
        assert swing == pytest.approx(confirmation.objective)  # the actual values are the ones the goal scored
