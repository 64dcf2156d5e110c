"""Resume with Slurm jobs in flight: jobs outlive the orchestrator and are re-attached, never resubmitted.

Needs a real Slurm (``scripts/slurm-local.sh start``); skipped with the reason otherwise, and a
failure when ``SORTIE_REQUIRE_SLURM=1`` (as in CI).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

from sortie.ledger import Ledger, ledger_path
from tests.conftest import DEMO_CONFIG
from tests.slurm_support import require_slurm  # loaded as a pytest plugin by conftest first

pytestmark = pytest.mark.slow


def _config(tmp_path: Path, partition: str) -> Path:
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    config["solver"] = {"adapter": "slurm", "template": str(DEMO_CONFIG.parent / "cases" / "template"),
                        "command": ["sortie-mock-solver", "case.in", "result.out"], "partition": partition,
                        "time_limit_s": 600, "poll_interval_s": 0.5}
    config["conditions"] = {"mach": [0.6, 1.3]}
    config["plan"] = {"initial": {"method": "lhs", "designs": 4}}
    config["budget"] = {"designs": 5}
    config["slots"] = 4
    path = tmp_path / "campaign.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def _in_flight(directory: Path) -> dict[int, str]:
    if not ledger_path(directory).exists():
        return {}
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        return {c.id: c.job_id for c in ledger.cases(states=("running",)) if c.job_id}


def _wait_in_flight(directory: Path, proc: subprocess.Popen[str], n: int) -> dict[int, str]:
    deadline = time.monotonic() + 120
    while len(running := _in_flight(directory)) < n:
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "Slurm jobs did not start"
        time.sleep(0.2)
    return running


def _job_states() -> dict[str, str]:
    """Every job the controller knows (finished ones are kept for a day) and its state."""
    out = subprocess.run(["squeue", "-h", "-t", "all", "-o", "%i %T"], capture_output=True, text=True, check=True).stdout
    return dict(line.split() for line in out.splitlines() if line.strip())


def test_interrupted_and_killed_runs_leave_jobs_running_and_resume_reattaches_them(tmp_path: Path,
                                                                                   cli_env: dict[str, str]) -> None:
    info = require_slurm()
    log = tmp_path / "mock.log"
    env = {**cli_env, "SORTIE_MOCK_RUN_TIME_S": "4", "SORTIE_MOCK_LOG": str(log)}
    config = _config(tmp_path, info.partition)
    directory = tmp_path / "camp"
    cli = [sys.executable, "-m", "sortie.cli"]

    # 1. Ctrl-C: the run stops, the batch jobs stay queued or running, recorded with their ids.
    proc = subprocess.Popen([*cli, "run", str(config), "--dir", str(directory)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=env, cwd=tmp_path)
    first = _wait_in_flight(directory, proc, 2)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "batch jobs left running" in err and f"sortie resume {directory}" in err
    states = _job_states()
    assert all(states.get(job) not in (None, "CANCELLED") for job in first.values()), f"jobs left to Slurm: {states}"
    status = subprocess.run([*cli, "status", str(directory)], capture_output=True, text=True, env=env, check=True)
    assert all(job in status.stdout for job in _in_flight(directory).values()), "status shows the job ids in flight"

    # 2. Resume, then kill -9 while jobs run.
    proc = subprocess.Popen([*cli, "resume", str(directory)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env, cwd=tmp_path)
    second = _wait_in_flight(directory, proc, 2)
    time.sleep(0.5)
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate()
    in_flight = _in_flight(directory)
    assert in_flight, "jobs were in flight at the kill"

    # 3. Resume to the end: the same jobs are waited for, nothing is submitted twice.
    final = subprocess.run([*cli, "resume", str(directory)], capture_output=True, text=True, env=env, cwd=tmp_path,
                           timeout=600)
    assert final.returncode == 0, final.stderr
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert ledger.check_consistency() == []
        cases = {c.id: c for c in ledger.cases()}
        events = ledger.events()
    assert len(cases) == 10 and all(c.state == "done" for c in cases.values())
    for case_id, job_id in {**first, **second, **in_flight}.items():
        assert cases[case_id].job_id == job_id, f"case {case_id} was re-attached to its own job, not resubmitted"
        assert cases[case_id].attempts == 1
    reattached = [e for e in events if e["kind"] == "case-reattached"]
    assert len(reattached) >= len(in_flight)
    starts: dict[str, int] = {}
    for line in log.read_text().splitlines():
        word, _pid, deck, *_ = line.split()
        if word == "start":
            starts[str(Path(deck).parent)] = starts.get(str(Path(deck).parent), 0) + 1
    assert sorted(starts.values()) == [1] * 10, "every case's solver ran exactly once"
