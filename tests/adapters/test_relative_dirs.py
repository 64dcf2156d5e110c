"""Whole runs through the command line with a solver shipped in the template (``./solver.py``)
and a campaign folder given relative to the working directory, under the command and the Slurm
adapter; and a template that fails for some designs only, which fails those cases in one line."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from sortie.ledger import Ledger, ledger_path
from tests.adapters.tiny_campaign import DECK, write_campaign
from tests.slurm_support import require_slurm

SLURM = {"adapter": "slurm", "timeout_s": None, "poll_interval_s": 0.5, "time_limit_s": 300}


def _sortie(*args: str, env: dict[str, str], cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "sortie.cli", *args], capture_output=True, text=True, env=env,
                          cwd=cwd, timeout=600)


@pytest.mark.slow
@pytest.mark.parametrize("adapter", ["command", "slurm"])
@pytest.mark.parametrize("folder", [None, "runs/tiny"])
def test_a_relative_campaign_folder_runs_a_solver_shipped_in_the_template(
        adapter: str, folder: str | None, tmp_path: Path, cli_env: dict[str, str]) -> None:
    if adapter == "slurm":
        require_slurm()
    config = write_campaign(tmp_path / "config", solver=SLURM if adapter == "slurm" else None)
    work = tmp_path / "work"
    work.mkdir()
    result = _sortie("run", str(config), *(["--dir", folder] if folder else []), env=cli_env, cwd=work)
    assert result.returncode == 0, result.stdout + result.stderr
    directory = work / (folder or "campaigns/tiny")  # None: the default campaigns/<name>, relative to the cwd
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        cases = ledger.cases()
    assert len(cases) == 6
    assert all(c.state == "done" for c in cases), [(c.name, c.failure_reason) for c in cases if c.state != "done"]
    baseline = sorted((c for c in cases if c.design_id == 1), key=lambda c: c.condition_index)
    assert [c.quantities for c in baseline] == [{"lift": 8.0 * 0.6}, {"lift": 8.0 * 1.1}]


@pytest.mark.slow
def test_a_template_that_fails_for_some_designs_fails_those_cases_in_one_line(tmp_path: Path,
                                                                               cli_env: dict[str, str]) -> None:
    """``1 // (ramp_angle >= 8)`` renders for the baseline (8.0), so check passes; a Latin hypercube of
    two designs over [2, 14] puts one below 8, whose cases then fail with the template's own line."""
    config = write_campaign(tmp_path, deck=DECK + "steep = {{ 1 // (ramp_angle >= 8.0) }}\n")
    result = _sortie("run", str(config), "--dir", "camp", env=cli_env, cwd=tmp_path)
    output = result.stdout + result.stderr
    assert result.returncode == 0, output
    assert "Traceback" not in output
    with Ledger.open(ledger_path(tmp_path / "camp"), readonly=True) as ledger:
        cases = ledger.cases()
    failed = [c for c in cases if c.state == "failed"]
    assert len(failed) == 2 and len({c.design_id for c in failed}) == 1, [(c.name, c.state) for c in cases]
    deck = tmp_path / "template" / "case.in"
    for case in failed:
        assert case.failure_class == "solver"
        assert case.failure_reason == (f"the case's input could not be rendered: template file {deck} line 3: "
                                       "ZeroDivisionError: integer division or modulo by zero")
