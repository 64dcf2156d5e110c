"""The campaign's state (running, interrupted, finished, failed) from the ledger's run records and the lock.

Unit tests on real files: a ledger in a temporary folder, the real ``flock`` (held by this process
or by a child process that is then killed), no Prefect.
"""

from __future__ import annotations

import json
import logging
import subprocess
import sys
import threading
import time
from io import StringIO
from pathlib import Path

import pytest

from sortie.errors import CampaignError
from sortie.ledger import Ledger, ledger_path
from sortie.lock import CampaignLock, holder
from sortie.runstate import UNENDED, RunRecord, Terminated, campaign_state, describe_state
from tests.conftest import branin_config, write_config


@pytest.fixture
def directory(tmp_path: Path) -> Path:
    """A prepared campaign folder (config and ledger, no run yet)."""
    from sortie import campaign
    from sortie.config import load_config

    path = write_config(tmp_path, branin_config())
    directory = tmp_path / "camp"
    campaign.prepare(path, load_config(path), directory)
    return directory


def state_of(directory: Path, *, plan_done: bool = False, now: float | None = None) -> dict:
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        return campaign_state(directory, ledger, plan_done=plan_done, now=now)


def test_no_run_recorded_is_interrupted_unless_the_plan_is_done(directory: Path) -> None:
    state = state_of(directory)
    assert state["state"] == "interrupted" and "no orchestrator run is recorded" in state["reason"]
    assert state_of(directory, plan_done=True)["state"] == "finished"


def test_a_run_that_ends_normally_is_finished_with_its_pid_and_host(directory: Path) -> None:
    import os
    import socket

    with CampaignLock(directory), RunRecord(directory):
        running = state_of(directory)
    assert running["state"] == "running" and running["pid"] == os.getpid() and running["host"] == socket.gethostname()
    state = state_of(directory)
    assert state["state"] == "finished" and state["reason"] is None
    assert state["ended_at"] >= state["started_at"]


@pytest.mark.parametrize(("raised", "outcome", "reason"), [
    (CampaignError("the baseline design failed (case d0001-c0: diverged)"), "failed", "the baseline design failed"),
    (KeyboardInterrupt(), "interrupted", "Ctrl-C"),
    (Terminated(), "interrupted", "SIGTERM"),
    (RuntimeError("boom"), "failed", "internal error (RuntimeError: boom)"),
])
def test_how_a_run_ends_is_recorded_with_the_reason(directory: Path, raised: BaseException, outcome: str, reason: str) -> None:
    with pytest.raises(type(raised)), CampaignLock(directory), RunRecord(directory):
        raise raised
    state = state_of(directory)
    assert state["state"] == outcome and reason in state["reason"]
    assert describe_state(state).startswith(f"{outcome} (pid ")


def test_the_heartbeat_advances_while_the_run_lives(directory: Path) -> None:
    with CampaignLock(directory), RunRecord(directory, heartbeat_s=0.05):
        first = state_of(directory)["heartbeat_at"]
        time.sleep(0.4)
        later = state_of(directory)["heartbeat_at"]
    assert later > first


KILLED_RUN = """
import sys, time
from pathlib import Path
from sortie.lock import CampaignLock
from sortie.runstate import RunRecord
directory = Path(sys.argv[1])
lock = CampaignLock(directory).acquire()
record = RunRecord(directory, heartbeat_s=0.05).__enter__()
print("running", flush=True)
time.sleep(600)
"""


def test_a_run_killed_without_an_end_is_interrupted_and_the_next_run_closes_its_record(directory: Path) -> None:
    proc = subprocess.Popen([sys.executable, "-c", KILLED_RUN, str(directory)], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout is not None and proc.stdout.readline().strip() == "running"
        live = state_of(directory)
        assert live["state"] == "running" and live["pid"] == proc.pid
        assert holder(directory) is not None
    finally:
        proc.kill()  # kill -9: no end is recorded, the kernel drops the lock
        proc.wait()
    assert holder(directory) is None
    dead = state_of(directory)
    assert dead["state"] == "interrupted" and dead["reason"] == UNENDED and dead["pid"] == proc.pid
    with CampaignLock(directory), RunRecord(directory):
        pass
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        runs = ledger.runs()
    assert [r["outcome"] for r in runs] == ["interrupted", "finished"]
    assert runs[0]["reason"] == UNENDED


def test_a_lock_held_before_the_run_is_recorded_counts_as_running(directory: Path) -> None:
    """Between taking the lock and recording its run (preparing the folder), the lock holder is shown."""
    import os

    with CampaignLock(directory):
        state = state_of(directory)
    assert state["state"] == "running" and state["pid"] == os.getpid()


def test_a_run_on_another_host_is_judged_by_its_heartbeat(directory: Path) -> None:
    with Ledger.open(ledger_path(directory)) as ledger:
        run_id = ledger.start_run(4242, "other-node", unended_reason=UNENDED)
        ledger.beat(run_id)
        beat = ledger.runs()[-1]["heartbeat_at"]
    assert state_of(directory, now=beat + 10)["state"] == "running"
    stale = state_of(directory, now=beat + 300)
    assert stale["state"] == "interrupted" and stale["host"] == "other-node"
    assert describe_state(stale, now=beat + 300).startswith("interrupted (pid 4242 on other-node, ended ")


def test_a_status_probe_does_not_make_a_starting_orchestrator_fail(directory: Path) -> None:
    """The probe holds a shared lock for an instant; acquire tries again for 0.4 s before refusing."""
    import fcntl
    import os

    fd = os.open(directory / "campaign.lock", os.O_RDONLY | os.O_CREAT)
    fcntl.flock(fd, fcntl.LOCK_SH)
    releaser = threading.Timer(0.15, lambda: fcntl.flock(fd, fcntl.LOCK_UN))
    releaser.start()
    try:
        with CampaignLock(directory):
            pass
    finally:
        releaser.join()
        os.close(fd)


def test_status_summary_carries_the_state(directory: Path) -> None:
    from sortie import campaign
    from sortie.status import summary

    cfg, _ = campaign.load(directory)
    with CampaignLock(directory), RunRecord(directory), Ledger.open(ledger_path(directory), readonly=True) as ledger:
        s = summary(ledger, cfg)
    assert s["state"]["state"] == "running"
    json.dumps(s)  # the JSON of `status --json`


def test_progress_counts_cases_against_the_plan_not_those_created_so_far() -> None:
    from sortie.progress import describe, eta_s

    s = {"best": None, "cases_done": 4, "cases_total": 6, "cases_running": 2, "cases_planned": 0, "cases_failed": 0,
         "designs_done": 2, "designs_failed": 0, "designs_planned": 10, "n_conditions": 3, "mean_case_s": 2.0}
    line = describe(s, slots=2)
    assert line.startswith("cases 4/30 done") and "designs 2/10" in line
    assert eta_s(s, slots=2) == pytest.approx((30 - 4) * 2.0 / 2)


def test_watch_json_writes_one_object_per_line_and_ends_with_the_final_state(directory: Path) -> None:
    from sortie import campaign
    from sortie.progress import LedgerWatcher

    cfg, _ = campaign.load(directory)
    stream = StringIO()
    with CampaignLock(directory), RunRecord(directory):
        watcher = LedgerWatcher(directory, cfg, stream=stream, interval_s=0.05)
        thread = threading.Thread(target=watcher.follow_json)
        thread.start()
        time.sleep(0.3)
    thread.join(timeout=5)
    assert not thread.is_alive(), "watching ends when the run does"
    objects = [json.loads(line) for line in stream.getvalue().splitlines()]
    assert objects[0]["state"]["state"] == "running" and objects[-1]["state"]["state"] == "finished"
    assert all(line.startswith("{") for line in stream.getvalue().splitlines())


def test_prefects_crash_line_is_dropped_only_for_an_interrupt() -> None:
    from sortie.flows.runtime import _not_an_interrupt_crash

    def record(message: str) -> logging.LogRecord:
        return logging.LogRecord("prefect.flow_runs", logging.ERROR, __file__, 1, message, None, None)

    # the messages Prefect's exception_to_crashed_state writes (prefect/states.py)
    assert not _not_an_interrupt_crash(record("Crash detected! Execution was aborted by an interrupt signal."))
    assert not _not_an_interrupt_crash(record("Crash detected! Execution was aborted by a termination signal."))
    assert _not_an_interrupt_crash(record("Crash detected! Execution was interrupted by an unexpected exception: X"))
    assert _not_an_interrupt_crash(record("Finished in state Cancelled('stopped by Ctrl-C')"))


def test_prefect_home_goes_inside_the_campaign_folder_unless_the_user_set_one(tmp_path: Path, monkeypatch) -> None:
    from sortie.flows.runtime import PREFECT_DIR, configure_prefect

    monkeypatch.delenv("PREFECT_HOME", raising=False)
    assert configure_prefect(tmp_path / "camp") is True
    import os

    assert os.environ["PREFECT_HOME"] == str((tmp_path / "camp").resolve() / PREFECT_DIR)
    monkeypatch.setenv("PREFECT_HOME", str(tmp_path / "mine"))
    assert configure_prefect(tmp_path / "camp") is False
    assert os.environ["PREFECT_HOME"] == str(tmp_path / "mine")
