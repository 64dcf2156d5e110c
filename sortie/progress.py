"""Progress of a running campaign, read from its ledger by a watcher thread.

The watcher opens its own read-only connection, so it shows exactly what the ledger holds and
works the same for the run in this process and for ``status`` on a campaign run elsewhere. On a
terminal it draws a rich progress bar; otherwise it prints a plain line whenever a count changes,
with no control characters, so logs of overnight runs stay readable.
"""

from __future__ import annotations

import json
import sqlite3
import threading
from pathlib import Path
from typing import Any, TextIO

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

from sortie.config import CampaignConfig
from sortie.errors import LedgerError
from sortie.ledger import Ledger, ledger_path
from sortie.status import summary


def planned_cases(s: dict[str, Any]) -> int:
    """Cases the plan needs in all: its designs times the conditions (more if retries or an
    accepted config change recorded extra designs), not just the cases created so far."""
    return max(s["cases_total"], s["designs_planned"] * s["n_conditions"])


def describe(s: dict[str, Any], slots: int | None = None) -> str:
    """One plain line: cases and designs against the plan, failures, the best design so far and an ETA."""
    best = s["best"]
    shown = "none yet"
    if best is not None:
        shown = f"design {best['design']} objective {best['objective']:.6g} ({'feasible' if best['feasible'] else 'infeasible'})"
    eta = eta_s(s, slots)
    return (f"cases {s['cases_done']}/{planned_cases(s)} done, {s['cases_running']} running, {s['cases_planned']} queued, "
            f"{s['cases_failed']} failed | designs {s['designs_done'] + s['designs_failed']}/{s['designs_planned']} | "
            f"best: {shown}" + ("" if eta is None else f" | ETA {_clock(eta)}"))


def eta_s(s: dict[str, Any], slots: int | None) -> float | None:
    """Seconds left: the cases the plan still needs times the mean observed case time, over the slots.

    Proposal time and queueing on a cluster are not in it, so it is a lower bound early on."""
    if not s.get("mean_case_s") or not slots:
        return None
    left = max(planned_cases(s) - s["cases_done"] - s["cases_failed"], 0)
    return left * s["mean_case_s"] / slots


def _clock(seconds: float) -> str:
    m, sec = divmod(round(seconds), 60)
    h, m = divmod(m, 60)
    return f"{h}:{m:02d}:{sec:02d}" if h else f"{m}:{sec:02d}"


class LedgerWatcher:
    """Shows campaign progress until :meth:`stop`; use as a context manager."""

    def __init__(self, directory: Path, config: CampaignConfig, *, stream: TextIO, interval_s: float = 0.5) -> None:
        self.directory = Path(directory)
        self.config = config
        self.stream = stream
        self.interval_s = interval_s
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="sortie-progress", daemon=True)
        self.tty = bool(getattr(stream, "isatty", lambda: False)())
        # the plan's full size, so the bars do not grow as infill adds designs
        self.target_designs = config.target_designs()

    def __enter__(self) -> LedgerWatcher:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(timeout=5)

    def wait_until_finished(self) -> None:
        """Block until no orchestrator runs the campaign (its plan done, or the run stopped or died)."""
        while True:
            s = self._read()
            if s is not None and s["state"]["state"] != "running":
                return
            self._stop.wait(self.interval_s)

    def _read(self) -> dict[str, Any] | None:
        try:
            with Ledger.open(ledger_path(self.directory), readonly=True) as ledger:
                return summary(ledger, self.config)
        except (LedgerError, sqlite3.Error):
            return None  # the ledger is being created or briefly locked; try again next tick

    def follow_json(self) -> None:
        """Write the summary as one JSON object per line whenever it changes, until no
        orchestrator runs the campaign; the last line is the final state. For scripts: nothing
        else is written."""
        last = None
        while True:
            s = self._read()
            if s is not None:
                line = json.dumps(s, separators=(",", ":"))
                if line != last:
                    print(line, file=self.stream, flush=True)
                    last = line
                if s["state"]["state"] != "running":
                    return
            self._stop.wait(self.interval_s)

    def _loop(self) -> None:
        if self.tty:
            self._loop_rich()
        else:
            self._loop_plain()

    def _loop_plain(self) -> None:
        last = None
        while True:
            stopping = self._stop.is_set()
            s = self._read()
            if s is not None and s["cases_total"]:
                line = describe(s, self.config.slots)
                if line != last:
                    print(line, file=self.stream, flush=True)
                    last = line
            if stopping:
                return
            self._stop.wait(self.interval_s)

    def _loop_rich(self) -> None:
        console = Console(file=self.stream)
        columns = (TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                   TextColumn("{task.fields[detail]}"))
        with Progress(*columns, console=console, transient=False) as bar:
            cases = bar.add_task("cases", total=None, detail="")
            designs = bar.add_task("designs", total=self.target_designs, detail="")
            while True:
                stopping = self._stop.is_set()
                s = self._read()
                if s is not None:
                    best = s["best"]
                    best_text = "" if best is None else f"best design {best['design']}: {best['objective']:.6g}" + ("" if best["feasible"] else " (infeasible)")
                    eta = eta_s(s, self.config.slots)
                    bar.update(cases, total=planned_cases(s), completed=s["cases_done"] + s["cases_failed"],
                               detail=f"{s['cases_running']} running, {s['cases_planned']} queued, {s['cases_failed']} failed"
                               + ("" if eta is None else f", ETA {_clock(eta)}"))
                    bar.update(designs, completed=s["designs_done"] + s["designs_failed"], detail=best_text)
                if stopping:
                    return
                self._stop.wait(self.interval_s)

