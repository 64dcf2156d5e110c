"""The campaign flow in-process, on cheap python-adapter models, under a real Prefect API."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from sortie import campaign
from sortie.adapters.registry import check_solver
from sortie.config import load_config
from sortie.errors import CampaignError
from sortie.ledger import Ledger, ledger_path
from tests.conftest import FIXTURES, branin_config, write_config

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("prefect_api")]


def _run(tmp_path: Path, config: dict, folder: str = "camp") -> Path:
    from sortie.flows.campaign import run_campaign

    path = write_config(tmp_path, config)
    cfg = load_config(path, check_solver=check_solver)
    directory = tmp_path / folder
    campaign.prepare(path, cfg, directory)
    run_campaign(directory)
    return directory


def test_flow_runs_every_case_and_scores_every_design(tmp_path: Path) -> None:
    directory = _run(tmp_path, branin_config())
    with Ledger.open(ledger_path(directory)) as ledger:
        designs, cases = ledger.designs(), ledger.cases()
        assert ledger.check_consistency() == []
        attempts = ledger.attempts()
    assert len(designs) == 9 and len(cases) == 18
    assert all(c.state == "done" and c.attempts == 1 for c in cases)
    assert len(attempts) == 18
    assert designs[0].stage == "baseline" and designs[0].values == {"x1": 0.0, "x2": 5.0}
    for d in designs:
        x1, x2 = d.values["x1"], d.values["x2"]
        f = (x2 - 5.1 * x1**2 / (4 * math.pi**2) + 5 * x1 / math.pi - 6) ** 2 + 10 * (1 - 1 / (8 * math.pi)) * math.cos(x1) + 10
        assert d.objective == pytest.approx(1.5 * f)  # mean over scale 1 and 2
        assert d.constraints == {"g <= baseline.g + 10": pytest.approx(x1 + x2 - 15.0)}
        assert d.feasible == (x1 + x2 - 15.0 <= 0)


def test_failed_cases_fail_their_design_and_the_campaign_goes_on(tmp_path: Path) -> None:
    config = branin_config(solver={"adapter": "python", "function": f"{FIXTURES / 'models.py'}:branin_failing_corner"})
    directory = _run(tmp_path, config)
    with Ledger.open(ledger_path(directory)) as ledger:
        designs, cases = ledger.designs(), ledger.cases()
    failed = [d for d in designs if d.status == "failed"]
    assert failed, "the seeded design has points with x1 > 5"
    assert all(d.values["x1"] > 5 for d in failed)
    assert all(d.status == "done" for d in designs if d.values["x1"] <= 5)
    bad = [c for c in cases if c.state == "failed"]
    assert all(c.failure_class == "solver" and "mesh generation failed" in (c.failure_reason or "") for c in bad)


def test_failed_baseline_stops_with_one_clear_reason(tmp_path: Path) -> None:
    config = branin_config(solver={"adapter": "python", "function": f"{FIXTURES / 'models.py'}:always_fails"}, slots=1)
    with pytest.raises(CampaignError, match=r"the baseline design failed .*solver diverged"):
        _run(tmp_path, config)
    with Ledger.open(ledger_path(tmp_path / "camp")) as ledger:
        assert ledger.check_consistency() == []
        started = [c for c in ledger.cases() if c.attempts > 0]
    assert {c.design_id for c in started} == {1}, "nothing beyond the baseline is started once it has failed"


def test_running_again_continues_without_repeating_finished_cases(tmp_path: Path) -> None:
    from sortie.flows.campaign import run_campaign

    directory = _run(tmp_path, branin_config())
    with Ledger.open(ledger_path(directory)) as ledger:
        # as if the orchestrator had died with two cases in flight and two not started
        for case in ledger.cases()[-4:-2]:
            ledger.requeue(case.id, why="lost", reason="test")
            ledger.mark_submitting(case.id, directory / "cases" / case.name)
        for case in ledger.cases()[-2:]:
            ledger._conn.execute("UPDATE cases SET state = 'planned' WHERE id = ?", (case.id,))
        ledger._conn.execute("UPDATE designs SET status = 'pending', objective = NULL WHERE id = 9")
        before = {c.id: c.attempts for c in ledger.cases()}
    run_campaign(directory)
    with Ledger.open(ledger_path(directory)) as ledger:
        after = {c.id: c.attempts for c in ledger.cases()}
        assert all(c.state == "done" for c in ledger.cases())
        assert ledger.design(9).status == "done"
    rerun = {cid for cid in after if after[cid] != before[cid]}
    assert rerun == set(list(after)[-4:]), "only the interrupted and the unstarted cases ran (again)"
    assert all(after[cid] == 1 for cid in list(after)[:-4]), "finished cases are never repeated"


def _mock_config(**changes) -> dict:
    import yaml

    from tests.conftest import DEMO_CONFIG

    config = yaml.safe_load(DEMO_CONFIG.read_text())
    config["solver"]["template"] = str(DEMO_CONFIG.parent / "cases" / "template")
    config["plan"] = {"initial": {"method": "lhs", "designs": 8}}
    config["budget"] = {"designs": 9}
    config.update(changes)
    return config


def test_mock_solver_mesh_failures_fail_only_their_designs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("SORTIE_MOCK_MESH_FAIL_REGION", "ramp_angle > 9")
    directory = _run(tmp_path, _mock_config())
    with Ledger.open(ledger_path(directory)) as ledger:
        designs, cases = ledger.designs(), ledger.cases()
        assert ledger.check_consistency() == []
    inside = {d.id for d in designs if d.values["ramp_angle"] > 9}
    assert inside and inside != {d.id for d in designs}
    assert {d.id for d in designs if d.status == "failed"} == inside
    for c in cases:
        if c.design_id in inside:
            assert c.state == "failed" and c.failure_class == "solver"
            assert "exited with code 4" in c.failure_reason and "mesh generation failed" in c.failure_reason
            assert c.failure_reason.endswith("solver.stderr")
        else:
            assert c.state == "done"


def test_garbage_output_is_an_output_failure_naming_the_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("SORTIE_MOCK_GARBAGE_RATE", "1")
    with pytest.raises(CampaignError, match=r"the baseline design failed .*result\.out"):
        _run(tmp_path, _mock_config())
    with Ledger.open(ledger_path(tmp_path / "camp")) as ledger:
        failed = [c for c in ledger.cases() if c.state == "failed"]
        assert ledger.check_consistency() == []
    assert failed and all(c.failure_class == "output" for c in failed)


def test_hanging_solver_is_killed_at_its_timeout(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("SORTIE_MOCK_HANG_RATE", "1")
    config = _mock_config()
    config["solver"]["timeout_s"] = 1
    config["solver"]["kill_grace_s"] = 0.5
    with pytest.raises(CampaignError, match="timeout_s=1"):
        _run(tmp_path, config)
    with Ledger.open(ledger_path(tmp_path / "camp")) as ledger:
        baseline_cases = ledger.cases(design_id=1)
    assert all(c.state == "failed" and c.failure_class == "timeout" for c in baseline_cases)
    assert all(c.ended_at - c.started_at < 10 for c in baseline_cases)


def test_failures_are_retried_as_the_policy_allows_with_back_off(tmp_path: Path) -> None:
    from sortie.status import summary

    config = branin_config(solver={"adapter": "python", "function": f"{FIXTURES / 'models.py'}:branin_flaky"},
                           retries={"solver": 1, "backoff_s": 0.3})
    directory = _run(tmp_path, config)
    with Ledger.open(ledger_path(directory)) as ledger:
        assert ledger.check_consistency() == []
        cases, attempts = ledger.cases(), ledger.attempts()
        cfg, _ = campaign.load(directory)
        s = summary(ledger, cfg)
    assert all(c.state == "done" and c.attempts == 2 for c in cases)
    by_case: dict[int, list[dict]] = {}
    for a in attempts:
        by_case.setdefault(a["case_id"], []).append(a)
    for first, second in by_case.values():
        assert first["state"] == "failed" and first["failure_class"] == "solver" and "licence server busy" in first["reason"]
        assert second["state"] == "done"
        assert second["started_at"] - first["ended_at"] >= 0.3  # the back-off was waited out
    assert s["retries"] == len(cases) and s["attempt_failures"]["solver"]["attempts"] == len(cases)


def test_without_retries_a_failure_is_final(tmp_path: Path) -> None:
    config = branin_config(solver={"adapter": "python", "function": f"{FIXTURES / 'models.py'}:branin_flaky"},
                           retries={"solver": 0})
    with pytest.raises(CampaignError, match="baseline design failed"):
        _run(tmp_path, config, folder="camp2")


def _mock_log(path: Path) -> tuple[dict[str, int], dict[str, list[str]]]:
    """Starts per case folder, and the outcomes of the runs that finished, from the mock's run log."""
    starts: dict[str, int] = {}
    outcomes: dict[str, list[str]] = {}
    for line in path.read_text().splitlines():
        word, _pid, deck, *rest = line.split()
        folder = str(Path(deck).parent)
        if word == "start":
            starts[folder] = starts.get(folder, 0) + 1
        else:
            outcomes.setdefault(folder, []).append(rest[0])
    return starts, outcomes


def test_injected_hangs_and_crashes_are_counted_by_class(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    log = tmp_path / "mock.log"
    for key, value in {"CRASH_RATE": "0.2", "HANG_RATE": "0.2", "RUN_TIME_S": "0.05", "LOG": str(log)}.items():
        monkeypatch.setenv(f"SORTIE_MOCK_{key}", value)
    config = _mock_config(conditions={"mach": [0.6, 1.3]}, slots=4,
                          goal={"minimize": "max(lift) - min(lift)", "subject_to": ["drag <= 10"]},
                          plan={"initial": {"method": "lhs", "designs": 12}, "infill": {"candidates": 256, "restarts": 2}},
                          budget={"designs": 16})
    config["solver"]["timeout_s"] = 5  # far above a clean run (0.05 s) even on a loaded machine
    config["solver"]["kill_grace_s"] = 0.2
    directory = _run(tmp_path, config)
    starts, outcomes = _mock_log(log)
    hung = {f for f in starts if f not in outcomes}  # a hung run is killed: it never logs its finish
    crashed = {f for f, o in outcomes.items() if o == ["crash"]}
    with Ledger.open(ledger_path(directory)) as ledger:
        assert ledger.check_consistency() == []
        cases, designs = ledger.cases(), ledger.designs()
    assert len(designs) == 16, "the campaign ran to its budget despite the failures"
    assert all(n == 1 for n in starts.values()), "no failed case was retried (retries default to 0 for these classes)"
    failed = {c.workdir: c.failure_class for c in cases if c.state == "failed"}
    assert {w for w, k in failed.items() if k == "timeout"} == hung
    assert {w for w, k in failed.items() if k == "solver"} == crashed
    # 20 % each over 32 cases: P(no case of a kind) = 0.8**32 < 0.1 %, and the mock's draws are fixed per case
    assert hung and crashed
    assert len(failed) == len(hung) + len(crashed)
