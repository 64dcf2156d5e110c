"""Campaign state through the real CLI: Ctrl-C, SIGTERM and kill -9 of real ``sortie`` processes,
``status --json`` and ``status --watch --json`` beside them, and what a run leaves outside its folder."""

from __future__ import annotations

import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
import yaml

from sortie.ledger import Ledger, ledger_path
from sortie.runstate import UNENDED
from tests.conftest import DEMO_CONFIG, branin_config, write_config

pytestmark = pytest.mark.slow


def _sortie(*args: str, env: dict[str, str], cwd: Path, timeout: float = 300) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "sortie.cli", *args], capture_output=True, text=True, env=env, cwd=cwd,
                          timeout=timeout)


def _start(args: list[str], env: dict[str, str], cwd: Path) -> subprocess.Popen[str]:
    # own session, like a terminal's foreground job: Ctrl-C goes to the whole group
    return subprocess.Popen([sys.executable, "-m", "sortie.cli", *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env, cwd=cwd, start_new_session=True)


def _done(directory: Path) -> int:
    if not ledger_path(directory).exists():
        return 0
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        return sum(c.state == "done" for c in ledger.cases())


def _wait_for_done(directory: Path, at_least: int, proc: subprocess.Popen[str]) -> None:
    deadline = time.monotonic() + 300
    while _done(directory) < at_least:
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the campaign made no progress"
        time.sleep(0.2)


def _state(directory: Path, env: dict[str, str]) -> dict[str, Any]:
    result = _sortie("status", str(directory), "--json", env=env, cwd=directory.parent)
    assert result.returncode == 0, result.stderr
    return json.loads(result.stdout)["state"]


def _assert_quiet_stop(proc: subprocess.Popen[str], code: int) -> None:
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == code, err
    assert "Crash detected" not in out + err, "Prefect must not call an interrupt a crash"
    assert "Traceback" not in out + err


def test_state_through_ctrl_c_sigterm_kill_9_and_a_watched_finish(tmp_path: Path, cli_env: dict[str, str]) -> None:
    # slow cases: starting a status or watch process takes seconds on a busy machine, and the run must still be live
    env = {**cli_env, "SORTIE_MOCK_RUN_TIME_S": "3"}
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    config["solver"]["template"] = str(DEMO_CONFIG.parent / "cases" / "template")
    config["conditions"] = {"mach": [0.6, 1.3]}
    config["plan"] = {"initial": {"method": "sobol", "designs": 8}, "infill": {"candidates": 256, "restarts": 2}}
    config["budget"] = {"designs": 16}
    config["slots"] = 2
    path = tmp_path / "campaign.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    directory = tmp_path / "camp"

    run = _start(["run", str(path), "--dir", str(directory)], env, tmp_path)
    _wait_for_done(directory, 2, run)
    watch = subprocess.Popen([sys.executable, "-m", "sortie.cli", "status", str(directory), "--watch", "--json"],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=tmp_path)
    assert watch.stdout is not None
    first = json.loads(watch.stdout.readline())  # the watcher has seen the run live before it is stopped
    live = first["state"]
    assert live["state"] == "running" and live["pid"] == run.pid and time.time() - live["heartbeat_at"] < 60
    os.killpg(run.pid, signal.SIGINT)
    _assert_quiet_stop(run, 130)
    rest, werr = watch.communicate(timeout=120)
    assert watch.returncode == 0, werr
    objects = [first, *(json.loads(line) for line in rest.splitlines())]  # every line is one JSON object, nothing else
    assert all(o["cases_total"] <= o["designs_planned"] * o["n_conditions"] for o in objects)
    assert objects[-1]["state"]["state"] == "interrupted", "watching ends with the run, on its final state"
    state = _state(directory, env)
    assert state["state"] == "interrupted" and "Ctrl-C" in state["reason"] and state["pid"] == run.pid

    resumed = _start(["resume", str(directory)], env, tmp_path)
    _wait_for_done(directory, _done(directory) + 2, resumed)
    resumed.send_signal(signal.SIGTERM)  # as a batch system's wall-time kill would
    _assert_quiet_stop(resumed, 143)
    state = _state(directory, env)
    assert state["state"] == "interrupted" and "SIGTERM" in state["reason"] and state["pid"] == resumed.pid

    killed = _start(["resume", str(directory)], env, tmp_path)
    _wait_for_done(directory, _done(directory) + 2, killed)
    killed.kill()
    killed.communicate(timeout=60)
    state = _state(directory, env)
    assert state["state"] == "interrupted" and state["reason"] == UNENDED and state["pid"] == killed.pid

    last = _sortie("resume", str(directory), env=env, cwd=tmp_path, timeout=600)
    assert last.returncode == 0, last.stderr
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        assert [r["outcome"] for r in ledger.runs()] == ["interrupted"] * 3 + ["finished"]
        assert ledger.check_consistency() == []
    plain = _sortie("status", str(directory), env=env, cwd=tmp_path)
    assert plain.stdout.splitlines()[0].startswith(f"campaign 'sled-aftbody' in {directory}: finished (pid ")


def _read_only(directory: Path, command: list[str], env: dict[str, str]) -> subprocess.CompletedProcess[str]:
    """Run a command with the campaign folder read-only: a permission bit for a plain user; for
    root, whom permission bits do not stop, a read-only bind mount in a private mount namespace."""
    if os.geteuid() != 0:
        directory.chmod(0o555)
        try:
            return subprocess.run(command, capture_output=True, text=True, env=env, timeout=300)
        finally:
            directory.chmod(0o755)
    unshare = shutil.which("unshare")
    if unshare is None:
        pytest.skip("running as root without unshare: the folder cannot be made read-only")
    script = 'mount --bind "$1" "$1" && mount -o remount,ro,bind "$1" && shift && exec "$@"'
    result = subprocess.run([unshare, "-m", "sh", "-c", script, "sh", str(directory), *command], capture_output=True,
                            text=True, env=env, timeout=300)
    if "mount:" in result.stderr:
        pytest.skip(f"no read-only bind mount here ({result.stderr.strip()[:120]})")
    return result


def test_a_run_writes_nothing_under_home_and_keeps_prefect_with_the_campaign(tmp_path: Path) -> None:
    """HOME is an empty folder; the run starts its own Prefect API (no PREFECT_HOME, no PREFECT_API_URL)."""
    home = tmp_path / "home"
    home.mkdir()
    env = {k: v for k, v in os.environ.items() if k not in ("PREFECT_HOME", "PREFECT_API_URL") and not k.startswith("XDG_")}
    env["HOME"] = str(home)
    path = write_config(tmp_path, branin_config())
    directory = tmp_path / "camp"
    for _ in range(2):  # the second run continues the finished campaign: one more flow run, no case
        result = _sortie("run", str(path), "--dir", str(directory), env=env, cwd=tmp_path)
        assert result.returncode == 0, result.stderr
    assert sorted(home.rglob("*")) == [], "nothing under HOME"
    database = directory / ".prefect" / "prefect.db"
    assert database.is_file(), "Prefect's database lives in the campaign folder"
    with sqlite3.connect(f"{database.as_uri()}?mode=ro", uri=True) as conn:  # Prefect's own table of flow runs
        assert conn.execute("SELECT COUNT(*) FROM flow_run").fetchone()[0] == 1, "each run starts a fresh database"

    status = _sortie("status", str(directory), "--json", env=env, cwd=tmp_path)
    assert json.loads(status.stdout)["state"]["state"] == "finished"

    refused = _read_only(directory, [sys.executable, "-m", "sortie.cli", "report", str(directory)], env)
    assert refused.returncode == 2, refused.stderr
    lines = refused.stderr.strip().splitlines()
    assert len(lines) == 1 and "cannot be written" in lines[0] and "--out" in lines[0], refused.stderr
    out = tmp_path / "review"
    written = _read_only(directory, [sys.executable, "-m", "sortie.cli", "report", str(directory), "--out", str(out)], env)
    assert written.returncode == 0, written.stderr
    page = (out / "index.html").read_text()
    assert "state: finished (pid " in page
