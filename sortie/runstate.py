"""Whether a campaign is running, and how its last run ended: the campaign's state.

A campaign is in one of four states:

- ``running``: an orchestrator holds the campaign lock (the kernel says so, see
  :func:`sortie.lock.holder`), or, on another host where the lock cannot be seen, its heartbeat
  is recent;
- ``finished``: its last run ended with the plan done;
- ``failed``: its last run stopped for a reason the user must act on (the reason is recorded);
- ``interrupted``: its last run was stopped (Ctrl-C, SIGTERM), or died without recording an end
  (``kill -9``, a crash, a machine that went down: nobody holds the lock, no end was recorded).

Each orchestrator run is a row of the ledger's ``runs`` table: pid, host, start, a heartbeat
written every :data:`HEARTBEAT_S` seconds by a thread of its own, and the end (outcome and
reason). The lock alone would tell running from not running, and the record alone would tell
how a run ended; together they tell a dead run from a live one without trusting a pid.
"""

from __future__ import annotations

import contextlib
import os
import socket
import sqlite3
import threading
import time
from pathlib import Path
from types import TracebackType
from typing import Any

from sortie.errors import SortieError
from sortie.ledger import Ledger, ledger_path
from sortie.lock import holder

STATES = ("running", "interrupted", "finished", "failed")
HEARTBEAT_S = 5.0
# A run seen only through its heartbeat (on another host) counts as alive for this long after its last beat.
STALE_S = 6 * HEARTBEAT_S
UNENDED = "the orchestrator stopped without recording an end (killed, or its machine went down)"


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised in the main thread like Ctrl-C so the run stops the same careful way."""


class RunRecord:
    """Record one orchestrator run in the ledger: its start, a heartbeat, and how it ended.

    Use as a context manager around the whole run, while holding the campaign lock. Leaving it
    normally records ``finished``; a :class:`~sortie.errors.SortieError` records ``failed`` with
    its message; Ctrl-C or SIGTERM records ``interrupted``. :meth:`end` records another ending
    explicitly (the first recorded ending wins).
    """

    def __init__(self, directory: Path, *, heartbeat_s: float = HEARTBEAT_S) -> None:
        self.path = ledger_path(directory)
        self.heartbeat_s = heartbeat_s
        self.run_id: int | None = None
        self._ended = False
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._beat, name="sortie-heartbeat", daemon=True)

    def __enter__(self) -> RunRecord:
        with Ledger.open(self.path) as ledger:
            self.run_id = ledger.start_run(os.getpid(), socket.gethostname(), unended_reason=UNENDED)
        self._thread.start()
        return self

    def _beat(self) -> None:
        """Write the heartbeat until stopped, on this thread's own connection (SQLite's rule)."""
        assert self.run_id is not None
        with Ledger.open(self.path) as ledger:
            while not self._stop.wait(self.heartbeat_s):
                # a beat lost to a busy or full disk is not worth stopping the run for; the next one tries again
                with contextlib.suppress(SortieError, sqlite3.Error):
                    ledger.beat(self.run_id)

    def end(self, outcome: str, reason: str | None = None) -> None:
        """Record how the run ended (once); the heartbeat stops."""
        if self._ended or self.run_id is None:
            return
        if outcome not in STATES[1:]:
            raise ValueError(f"outcome must be one of {STATES[1:]}, got {outcome!r}")
        self._stop.set()
        self._thread.join(timeout=2 * self.heartbeat_s)
        with Ledger.open(self.path) as ledger:
            ledger.end_run(self.run_id, outcome, reason)
        self._ended = True

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None) -> None:
        if exc is None:
            self.end("finished")
        elif isinstance(exc, Terminated):
            self.end("interrupted", "stopped by SIGTERM")
        elif isinstance(exc, KeyboardInterrupt):
            self.end("interrupted", "stopped by Ctrl-C (SIGINT)")
        elif isinstance(exc, SortieError):
            self.end("failed", str(exc))
        else:
            self.end("failed", f"internal error ({type(exc).__name__}: {exc})")


def campaign_state(directory: Path, ledger: Ledger, *, plan_done: bool, now: float | None = None) -> dict[str, Any]:
    """The campaign's state with the pid, host and last heartbeat of its latest run.

    Returns ``{"state", "reason", "pid", "host", "started_at", "heartbeat_at", "ended_at"}``
    (times in seconds since the epoch; None where unknown).
    """
    now = time.time() if now is None else now
    runs = ledger.runs()
    last = runs[-1] if runs else None
    live = holder(directory)
    info: dict[str, Any] = {"state": None, "reason": None, "pid": None, "host": None,
                            "started_at": None, "heartbeat_at": None, "ended_at": None}
    if last is not None:
        info.update({k: last[k] for k in ("pid", "host", "started_at", "heartbeat_at", "ended_at")})
    if live is not None and (last is None or last["outcome"] is not None or last["pid"] != live.get("pid")):
        # the lock is held by a run that has not recorded its start yet (it is preparing the folder)
        return {**info, "state": "running", "pid": live.get("pid"), "host": live.get("host"),
                "started_at": live.get("since"), "heartbeat_at": None, "ended_at": None}
    if last is None:
        if plan_done:
            return {**info, "state": "finished"}
        return {**info, "state": "interrupted", "reason": "no orchestrator run is recorded in the ledger (it was "
                "written by an older sortie, or its run stopped while starting)"}
    if last["outcome"] is not None:
        return {**info, "state": last["outcome"], "reason": last["reason"]}
    if live is not None:
        return {**info, "state": "running"}
    if last["host"] != socket.gethostname() and now - last["heartbeat_at"] < STALE_S:
        # another host's lock may be invisible from here; its heartbeat is recent
        return {**info, "state": "running"}
    return {**info, "state": "interrupted", "reason": UNENDED}


def describe_state(state: dict[str, Any], now: float | None = None) -> str:
    """One line, e.g. ``running (pid 4242 on node1, last heartbeat 3 s ago)``."""
    now = time.time() if now is None else now
    who = f"pid {state['pid']} on {state['host']}" if state["pid"] is not None else None
    parts = [p for p in (who, _ago("last heartbeat", state["heartbeat_at"], now) if state["state"] == "running"
                         else _ago("ended", state["ended_at"] or state["heartbeat_at"], now)) if p]
    line = state["state"] + (f" ({', '.join(parts)})" if parts else "")
    return line + (f": {state['reason']}" if state["reason"] else "")


def _ago(what: str, at: float | None, now: float) -> str | None:
    if at is None:
        return None
    seconds = max(0.0, now - at)
    if seconds < 120:
        return f"{what} {seconds:.0f} s ago"
    return f"{what} {time.strftime('%Y-%m-%d %H:%M:%S', time.localtime(at))}"
