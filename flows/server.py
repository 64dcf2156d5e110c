"""A Prefect API server owned by one campaign run: in its own session, dying with the run.

Prefect's temporary server is a child in the orchestrator's process group, so a terminal Ctrl-C
kills it at once and leaves the flow hanging on connection errors, and a ``kill -9`` of the
orchestrator leaves it running forever. Starting the same server ourselves fixes both: it runs
in its own session (a terminal's Ctrl-C does not reach it), the kernel sends it SIGTERM when the
orchestrator dies for any reason (``PR_SET_PDEATHSIG``), and its log goes to the campaign folder
instead of the terminal.
"""

from __future__ import annotations

import atexit
import contextlib
import ctypes
import importlib.util
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

from sortie.errors import CampaignError

LOG_NAME = "prefect-server.log"
PID_NAME = "prefect-server.pid"
DATABASE_NAME = "prefect.db"  # Prefect's default server database, in PREFECT_HOME
_PR_SET_PDEATHSIG = 1
# The run's own server records flow and task runs (the task run recorder) and nothing else: no
# UI reads its event feed and nobody can define automations, deployments or schedules on it, so
# the services behind those only cost CPU per case (each task run sends three events) or per tick.
PRIVATE_SERVER_SERVICES = {f"PREFECT_SERVER_SERVICES_{name}_ENABLED": "false" for name in (
    "EVENT_PERSISTER", "TRIGGERS", "SCHEDULER", "LATE_RUNS", "FOREMAN", "PAUSE_EXPIRATIONS", "REPOSSESSOR",
    "CANCELLATION_CLEANUP")}


def _die_with_parent() -> None:
    """Runs in the child between fork and exec: ask the kernel for SIGTERM when the parent dies."""
    libc = ctypes.CDLL(None, use_errno=True)
    libc.prctl(_PR_SET_PDEATHSIG, signal.SIGTERM, 0, 0, 0)


def _free_port() -> int:
    with contextlib.closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def start_local_api(log_dir: Path, *, timeout_s: float = 120.0, fresh_database: bool = False) -> str:
    """Start a private Prefect API on a free loopback port and return its URL.

    Sets ``PREFECT_API_URL`` for this process, so call it before ``prefect`` is imported. The
    server is stopped at interpreter exit by a hook registered *before* Prefect's own, so it
    runs after Prefect has flushed its pending events (exit hooks run last-registered first);
    if the process dies without running hooks, the kernel's parent-death signal stops it.

    ``fresh_database``: start from an empty Prefect database in ``PREFECT_HOME`` (pass it only
    when that home belongs to the campaign). This is the retention rule: the ledger is the
    campaign's record, Prefect's rows only serve the run in progress, so a campaign folder holds
    one run's worth of them however often it is resumed.
    """
    spec = importlib.util.find_spec("prefect")
    if spec is None or spec.origin is None:
        raise CampaignError("Prefect is not installed in this environment; reinstall sortie (pip install -e .)")
    app_dir = str(Path(spec.origin).parent.parent)
    _stop_stale(Path(log_dir) / PID_NAME)
    if fresh_database:
        _remove_database(Path(os.environ["PREFECT_HOME"]))
    port = _free_port()
    url = f"http://127.0.0.1:{port}/api"
    log_path = Path(log_dir) / LOG_NAME
    env = {**os.environ, "PREFECT_UI_ENABLED": "0", "PREFECT_SERVER_UI_ENABLED": "false",
           "PREFECT__SERVER_EPHEMERAL": "1", "PREFECT__SERVER_FINAL": "1", **PRIVATE_SERVER_SERVICES}
    env.pop("PREFECT_API_URL", None)
    with open(log_path, "ab") as log:
        proc = subprocess.Popen(
            [sys.executable, "-m", "uvicorn", "--app-dir", app_dir, "--factory", "prefect.server.api.server:create_app",
             "--host", "127.0.0.1", "--port", str(port), "--log-level", "error", "--lifespan", "on"],
            stdin=subprocess.DEVNULL, stdout=log, stderr=log, env=env, start_new_session=True,
            preexec_fn=_die_with_parent,
        )
    (Path(log_dir) / PID_NAME).write_text(f"{proc.pid}\n")
    atexit.register(_stop, proc)
    _wait_healthy(proc, url, timeout_s, log_path)
    os.environ["PREFECT_API_URL"] = url
    return url


def _stop_stale(pid_file: Path) -> None:
    """Stop a server a killed earlier run left behind (normally the kernel's parent-death signal
    already has). The pid is trusted only if it still runs Prefect's app, so a reused pid is safe."""
    try:
        pid = int(pid_file.read_text().strip())
        cmdline = Path(f"/proc/{pid}/cmdline").read_bytes()
    except (OSError, ValueError):
        return
    if b"prefect.server.api.server:create_app" in cmdline:
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.kill(pid, signal.SIGTERM)
        deadline = time.monotonic() + 10  # gone before its database is replaced
        while Path(f"/proc/{pid}").exists() and time.monotonic() < deadline:
            time.sleep(0.1)


def _remove_database(home: Path) -> None:
    """Delete the Prefect database of an earlier run (SQLite file with its WAL and shared-memory files)."""
    for name in (DATABASE_NAME, f"{DATABASE_NAME}-wal", f"{DATABASE_NAME}-shm", f"{DATABASE_NAME}-journal"):
        (home / name).unlink(missing_ok=True)


def _wait_healthy(proc: subprocess.Popen[bytes], url: str, timeout_s: float, log_path: Path) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise CampaignError(f"Prefect's API server exited with code {proc.returncode} while starting; see {log_path}")
        try:
            with urllib.request.urlopen(f"{url}/health", timeout=2) as response:
                if response.status == 200:
                    return
        except (urllib.error.URLError, ConnectionError, TimeoutError):
            pass
        time.sleep(0.2)
    _stop(proc)
    raise CampaignError(f"Prefect's API server did not answer within {timeout_s:g} s; see {log_path}")


def _stop(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is not None:
        return
    proc.terminate()
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
