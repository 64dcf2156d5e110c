"""Overnight reliability through the real CLI: kill -9 at many moments, then resume.

Every run here is a real ``sortie`` process running the mock solver as real subprocesses. One
Prefect API serves the module's runs (``PREFECT_API_URL``), as a site's own server would, so each
run does not pay for starting its own.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import yaml

from sortie.ledger import Ledger, ledger_path
from tests.conftest import DEMO_CONFIG

pytestmark = pytest.mark.slow
BUDGET = 18
INITIAL_DESIGNS = 8


@pytest.fixture
def env(cli_env: dict[str, str]) -> dict[str, str]:
    return cli_env


def _config(tmp_path: Path, **changes: object) -> Path:
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    config["solver"]["template"] = str(DEMO_CONFIG.parent / "cases" / "template")
    config["conditions"] = {"mach": [0.6, 1.3]}
    config["plan"] = {"initial": {"method": "sobol", "designs": INITIAL_DESIGNS}, "infill": {"candidates": 256, "restarts": 2}}
    config["budget"] = {"designs": BUDGET}
    config["slots"] = 2
    config.update(changes)
    path = tmp_path / "campaign.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def _start(args: list[str], env: dict[str, str], cwd: Path) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "sortie.cli", *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env, cwd=cwd)


def _log_counts(log: Path) -> tuple[dict[str, int], dict[str, int]]:
    starts: dict[str, int] = {}
    finishes: dict[str, int] = {}
    if log.exists():
        for line in log.read_text().splitlines():
            word, _pid, deck, *_ = line.split()
            target = starts if word == "start" else finishes
            target[str(Path(deck).parent)] = target.get(str(Path(deck).parent), 0) + 1
    return starts, finishes


class _Run:
    """One ``sortie`` process whose stdout is read as it comes, so the test can wait for a line."""

    def __init__(self, args: list[str], env: dict[str, str], cwd: Path, stderr: Path) -> None:
        with stderr.open("w") as err:
            self.proc = subprocess.Popen([sys.executable, "-m", "sortie.cli", *args], stdout=subprocess.PIPE,
                                         stderr=err, text=True, env=env, cwd=cwd)
        self.stderr = stderr
        self._lines: list[str] = []
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self._lines.append(line)

    def wait_for(self, text: str, deadline: float) -> None:
        while not any(text in line for line in list(self._lines)):
            assert self.proc.poll() is None, f"the run ended before printing {text!r}: {self.stderr.read_text()}"
            assert time.monotonic() < deadline, f"the run printed no {text!r} in time: {self.out()}"
            time.sleep(0.02)

    def kill(self) -> None:
        os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait()
        self._reader.join(timeout=10)

    def out(self) -> str:
        return "".join(self._lines)


def _started(log: Path, directory: Path, *, since: int = 0, infill_only: bool = False) -> set[str]:
    """Case folders whose solver started after byte ``since`` of the mock solver's log, all or only
    those of infill designs (a case's folder is committed to the ledger before its solver starts)."""
    if not log.exists():
        return set()
    with log.open("rb") as f:
        f.seek(since)
        lines = f.read().decode().splitlines()
    folders = {str(Path(line.split()[2]).parent) for line in lines if line.startswith("start ")}
    if not infill_only:
        return folders
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        infill = {d.id for d in ledger.designs() if d.stage == "infill"}
        return folders & {c.workdir for c in ledger.cases() if c.design_id in infill}


def _snapshot(directory: Path) -> dict[int, tuple[dict, int]]:
    if not ledger_path(directory).exists():
        return {}
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert ledger.check_consistency() == []
        return {c.id: (c.quantities, c.attempts) for c in ledger.cases(states=("done",))}


def test_kill_9_at_ten_moments_then_resume_loses_and_repeats_nothing(tmp_path: Path, env: dict[str, str]) -> None:
    log = tmp_path / "mock.log"
    run_env = {**env, "SORTIE_MOCK_RUN_TIME_S": "0.2", "SORTIE_MOCK_LOG": str(log), "PYTHONUNBUFFERED": "1"}
    config = _config(tmp_path)
    directory = tmp_path / "camp"
    total_cases = BUDGET * 2
    infill_cases = (BUDGET - 1 - INITIAL_DESIGNS) * 2  # after the baseline and the initial design
    rng = random.Random(5)
    # Each run is killed once it has itself started a few solvers, then after a random delay, so the
    # kills land in different phases (recording, submitting, proposing, waiting). Counting each run's
    # own starts, never a total across runs, means no run is killed before it has done anything. The
    # first six count every start (about the initial design, cases 0-17); the last four count only
    # infill starts, spread over the infill cases not yet started, so they fall in the infill stage
    # and the final resume is left work however far the earlier runs got.
    first_kills = [1, 2, 3, 4, 4, 4]
    infill_kills = 4
    kept: dict[int, tuple[dict, int]] = {}
    for i in range(len(first_kills) + infill_kills):
        args = ["run", str(config), "--dir", str(directory)] if i == 0 else ["resume", str(directory)]
        run = _Run(args, run_env, tmp_path, tmp_path / f"run{i}.err")
        deadline = time.monotonic() + 120
        if i > 0:  # its first words: the killed run's lock is taken over with a message, before any kill
            run.wait_for("took over the lock", deadline)
        since = log.stat().st_size if log.exists() else 0
        infill_only = i >= len(first_kills)
        delay = rng.uniform(0.0, 0.4)
        if infill_only:  # this run's share of the infill cases not yet started, one share left for the end
            runs_left = len(first_kills) + infill_kills - i
            infill_left = infill_cases - len(_started(log, directory, infill_only=True))
            wanted = max(1, infill_left // (runs_left + 1))
            # A run with little left could finish its campaign within the random delay (2 slots, 0.2 s
            # cases): then it is killed as soon as it reaches its share, still inside the infill stage.
            if infill_left - wanted < 6:
                delay = 0.0
        else:
            wanted = first_kills[i]
        while len(_started(log, directory, since=since, infill_only=infill_only)) < wanted:
            assert run.proc.poll() is None, f"the run ended before kill {i + 1}: {run.stderr.read_text()}"
            assert time.monotonic() < deadline, "the campaign made no progress"
            time.sleep(0.02)
        time.sleep(delay)
        assert run.proc.poll() is None, f"the run ended before kill {i + 1}: {run.stderr.read_text()}"
        run.kill()
        now = _snapshot(directory)
        for case_id, before in kept.items():
            assert now.get(case_id) == before, f"finished case {case_id} was lost or changed"
        kept = now

    final = subprocess.run([sys.executable, "-m", "sortie.cli", "resume", str(directory)], capture_output=True,
                           text=True, env=run_env, cwd=tmp_path, timeout=600)
    assert final.returncode == 0, final.stderr
    assert "took over the lock" in final.stdout

    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert ledger.check_consistency() == []
        designs, cases, attempts = ledger.designs(), ledger.cases(), ledger.attempts()
    assert len(designs) == BUDGET, "the budget ends exactly where it was set"
    assert len(cases) == total_cases and all(c.state == "done" for c in cases)
    for case_id, before in kept.items():
        assert (next(c for c in cases if c.id == case_id).quantities, next(c for c in cases if c.id == case_id).attempts) == before
    starts, finishes = _log_counts(log)
    lost = {a["case_id"] for a in attempts if a["state"] == "lost"}
    for case in cases:
        assert finishes.get(case.workdir) == 1, f"case {case.name} finished {finishes.get(case.workdir)} times"
        # a solver killed mid-run before its job record was written is the only one that starts twice
        assert starts[case.workdir] == 1 or (starts[case.workdir] == 2 and case.id in lost), case.name
    assert not [a for a in attempts if a["state"] in ("submitting", "running")], "every attempt has ended"


def test_second_orchestrator_sigterm_and_config_changes_on_resume(tmp_path: Path, env: dict[str, str]) -> None:
    run_env = {**env, "SORTIE_MOCK_RUN_TIME_S": "0.5", "PYTHONUNBUFFERED": "1"}
    config = _config(tmp_path, budget={"designs": 10})
    directory = tmp_path / "camp"
    first = _start(["run", str(config), "--dir", str(directory)], run_env, tmp_path)
    deadline = time.monotonic() + 120
    while not _snapshot(directory):
        assert time.monotonic() < deadline and first.poll() is None
        time.sleep(0.1)

    second = subprocess.run([sys.executable, "-m", "sortie.cli", "resume", str(directory)], capture_output=True,
                            text=True, env=run_env, cwd=tmp_path, timeout=120)
    assert second.returncode == 2
    assert f"being run by pid {first.pid}" in second.stderr and "Traceback" not in second.stderr

    first.send_signal(signal.SIGTERM)  # as a batch system's wall-time kill would
    out, err = first.communicate(timeout=60)
    assert first.returncode == 143, err
    assert f"Continue with: sortie resume {directory}" in err and "Traceback" not in out + err
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert ledger.check_consistency() == []
        assert not ledger.cases(states=("submitting", "running")), "local solvers were stopped and requeued"
        n_designs = len(ledger.designs())
    assert n_designs < 10

    changed = yaml.safe_load(config.read_text())
    changed["parameters"]["ramp_angle"]["lower"] = 3.0
    config.write_text(yaml.safe_dump(changed, sort_keys=False))
    refused = subprocess.run([sys.executable, "-m", "sortie.cli", "run", str(config), "--dir", str(directory)],
                             capture_output=True, text=True, env=run_env, cwd=tmp_path, timeout=120)
    assert refused.returncode == 2
    assert "parameters.ramp_angle.lower 2.0 -> 3.0" in refused.stderr
    assert len(refused.stderr.strip().splitlines()) == 1

    changed["parameters"]["ramp_angle"]["lower"] = 2.0
    changed["budget"]["designs"] = 12
    changed["slots"] = 3
    config.write_text(yaml.safe_dump(changed, sort_keys=False))
    accepted = subprocess.run([sys.executable, "-m", "sortie.cli", "run", str(config), "--dir", str(directory)],
                              capture_output=True, text=True, env=run_env, cwd=tmp_path, timeout=600)
    assert accepted.returncode == 0, accepted.stderr
    assert "accepted config change: budget.designs 10 -> 12" in accepted.stdout
    assert "accepted config change: slots 2 -> 3" in accepted.stdout
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert len(ledger.designs()) == 12
        assert any(e["kind"] == "config-changed" for e in ledger.events())
        assert ledger.check_consistency() == []
