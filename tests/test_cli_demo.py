"""The demo campaign end to end through the real CLI: mock solver processes, SQLite ledger, Prefect."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml

from sortie.ledger import Ledger, ledger_path
from tests.conftest import DEMO_CONFIG

pytestmark = pytest.mark.slow


def sortie(*args: str, env: dict[str, str], cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "sortie.cli", *args], capture_output=True, text=True, env=env,
                          cwd=cwd, timeout=600)


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, subprocess.CompletedProcess[str], dict[str, str]]:
    """Run the demo config once into a fresh folder (not a terminal, so plain progress lines)."""
    work = tmp_path_factory.mktemp("demo")
    env = {**os.environ, "PREFECT_HOME": str(work / "prefect-home")}
    env.pop("PREFECT_API_URL", None)
    result = sortie("run", str(DEMO_CONFIG), "--dir", str(work / "camp"), env=env, cwd=work)
    return work / "camp", result, env


def test_demo_run_succeeds_quietly_with_plain_lines(demo) -> None:
    _, result, _ = demo
    assert result.returncode == 0, result.stderr
    assert "Traceback" not in result.stdout + result.stderr
    assert "\x1b" not in result.stdout, "no control characters when stdout is not a terminal"
    assert "best design" in result.stdout and "must be confirmed by the real solver" in result.stdout
    assert result.stderr.strip() == "", result.stderr


def test_demo_ledger_holds_every_case_of_every_design(demo) -> None:
    directory, _, _ = demo
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    n_conditions = len(config["conditions"]["mach"])
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        designs, cases = ledger.designs(), ledger.cases()
        assert ledger.check_consistency() == []
    assert len(designs) == config["budget"]["designs"]
    assert len(cases) == len(designs) * n_conditions
    assert all(c.state == "done" for c in cases)
    first = designs[0]
    assert first.stage == "baseline"
    assert first.values == {k: v["baseline"] for k, v in config["parameters"].items()}
    assert min(c.started_at for c in cases if c.design_id == first.id) == min(c.started_at for c in cases)
    assert all(d.status == "done" and d.objective is not None and d.feasible is not None for d in designs)
    assert first.feasible and first.constraints == {"drag <= baseline.drag": 0.0}
    # the objective is the swing of lift over the conditions, recomputed from the case rows
    for d in designs:
        lift = [c.quantities["lift"] for c in cases if c.design_id == d.id]
        assert d.objective == pytest.approx(max(lift) - min(lift))
    # every case ran in its own folder from the rendered template
    for c in cases:
        deck = (Path(c.workdir) / "case.in").read_text()
        assert f"mach = {c.condition['mach']}" in deck


def test_status_json_reports_the_counts(demo) -> None:
    directory, _, env = demo
    result = sortie("status", str(directory), "--json", env=env, cwd=directory.parent)
    assert result.returncode == 0, result.stderr
    status = json.loads(result.stdout)
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    n_designs = config["budget"]["designs"]
    assert status["designs_total"] == status["designs_done"] == n_designs
    assert status["designs_failed"] == status["cases_failed"] == status["cases_running"] == 0
    assert status["cases_done"] == n_designs * len(config["conditions"]["mach"])
    # the demo's swing goal is composite: one model per quantity per condition
    assert set(status["models"]) == {f"{q}[mach={m:g}]" for q in ("lift", "drag") for m in config["conditions"]["mach"]}
    assert {r["output"] for r in status["outputs_checked"]} == set(status["models"])
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        feasible = [d for d in ledger.designs() if d.feasible]
    best = min(feasible, key=lambda d: d.objective)
    assert status["best"]["design"] == best.id and status["best"]["objective"] == pytest.approx(best.objective)
    assert status["best"]["feasible"] is True


def test_status_watch_follows_until_the_campaign_is_done(demo) -> None:
    directory, _, env = demo
    result = sortie("status", str(directory), "--watch", env=env, cwd=directory.parent)
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert any(line.startswith("cases ") and "queued" in line for line in lines)
    assert "\x1b" not in result.stdout, "plain lines when not on a terminal"


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_export_writes_one_row_per_design(demo, suffix: str) -> None:
    directory, _, env = demo
    out = directory.parent / f"designs{suffix}"
    result = sortie("export", str(directory), "--to", str(out), env=env, cwd=directory.parent)
    assert result.returncode == 0, result.stderr
    table = pd.read_csv(out) if suffix == ".csv" else pd.read_parquet(out)
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    assert list(table.columns) == ["id", "stage", *config["parameters"], "objective", "drag <= baseline.drag",
                                   "feasible", "status"]
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        designs = ledger.designs()
    assert len(table) == len(designs)
    assert table["objective"].tolist() == pytest.approx([d.objective for d in designs])


def test_run_refuses_a_folder_holding_another_campaign(demo, tmp_path: Path) -> None:
    directory, _, env = demo
    other = yaml.safe_load(DEMO_CONFIG.read_text())
    name = next(iter(other["parameters"]))
    other["parameters"][name]["upper"] = other["parameters"][name]["upper"] * 2
    other["solver"]["template"] = str(DEMO_CONFIG.parent / "cases" / "template")
    path = tmp_path / "other.yaml"
    path.write_text(yaml.safe_dump(other))
    result = sortie("run", str(path), "--dir", str(directory), env=env, cwd=tmp_path)
    assert result.returncode == 2
    assert f"parameters.{name}.upper" in result.stderr and "Traceback" not in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1


def test_run_into_an_unwritable_folder_says_so_in_one_line(tmp_path: Path) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("")
    env = {**os.environ, "PREFECT_HOME": str(tmp_path / "ph")}
    result = sortie("run", str(DEMO_CONFIG), "--dir", str(blocker / "camp"), env=env, cwd=tmp_path)
    assert result.returncode == 2
    assert "cannot be written" in result.stderr and "Traceback" not in result.stderr
    assert not (blocker / "camp").exists()


def test_ctrl_c_stops_cleanly_and_the_same_command_finishes_the_campaign(tmp_path: Path) -> None:
    import signal
    import time

    env = {**os.environ, "PREFECT_HOME": str(tmp_path / "prefect-home")}
    env.pop("PREFECT_API_URL", None)
    directory = tmp_path / "camp"
    small = yaml.safe_load(DEMO_CONFIG.read_text())  # the demo, cut down: two conditions, 20 designs
    small["solver"]["template"] = str(DEMO_CONFIG.parent / "cases" / "template")
    small["conditions"] = {"mach": [0.6, 1.3]}
    small["plan"]["initial"]["designs"] = 8
    small["budget"]["designs"] = 20
    config = tmp_path / "small.yaml"
    config.write_text(yaml.safe_dump(small))
    # own session, like a terminal's foreground job: Ctrl-C goes to the whole group
    proc = subprocess.Popen([sys.executable, "-m", "sortie.cli", "run", str(config), "--dir", str(directory)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=tmp_path,
                            start_new_session=True)
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline:
        if (directory / "ledger.sqlite").exists():
            with Ledger.open(ledger_path(directory), readonly=True) as ledger:
                if sum(c.state == "done" for c in ledger.cases()) >= 12:
                    break
        time.sleep(0.5)
    os.killpg(proc.pid, signal.SIGINT)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert f"Continue with: sortie resume {directory}" in err
    assert "Traceback" not in out + err
    server_pid = int((directory / "prefect-server.pid").read_text())
    cmdline = Path(f"/proc/{server_pid}/cmdline")
    assert not (cmdline.exists() and b"create_app" in cmdline.read_bytes()), "the run's Prefect API server is gone"
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert ledger.check_consistency() == []
        done_before = {c.id for c in ledger.cases(states=("done",))}

    result = sortie("run", str(config), "--dir", str(directory), env=env, cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert ledger.check_consistency() == []
        cases = ledger.cases()
        assert len(ledger.designs()) == small["budget"]["designs"]
    assert all(c.state == "done" for c in cases)
    assert all(c.attempts == 1 for c in cases if c.id in done_before), "finished cases are never run again"


def test_a_campaign_that_cannot_go_on_says_why_in_one_line(tmp_path: Path, cli_env: dict[str, str]) -> None:
    from tests.conftest import FIXTURES, branin_config, write_config

    config = branin_config(solver={"adapter": "python", "function": f"{FIXTURES / 'models.py'}:always_fails"})
    path = write_config(tmp_path, config)
    # the shared Prefect server: this run's own start-up is not what is tested here
    result = sortie("run", str(path), "--dir", str(tmp_path / "camp"), env=cli_env, cwd=tmp_path)
    assert result.returncode == 2
    assert "Traceback" not in result.stdout + result.stderr
    errors = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(errors) == 1 and errors[0].startswith("error: the baseline design failed")
    assert "solver diverged" in errors[0] and "error.txt" in errors[0]
