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

from sortie.config import CampaignConfig
from sortie.errors import LedgerError
from sortie.ledger import Ledger, ledger_path
from sortie.runstate import campaign_state
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


class SummaryReader:
    """Reads a campaign's summary again only when its ledger changed since the last read.

    One read-only connection is kept open (opened on the first read that finds the ledger):
    SQLite's ``data_version`` on it changes only when another connection commits, so a read of
    an unchanged ledger costs one pragma. Use it from one thread; close it when done.
    """

    def __init__(self, directory: Path, config: CampaignConfig) -> None:
        self.directory = Path(directory)
        self.config = config
        self._ledger: Ledger | None = None
        self._version: int | None = None
        self._last: dict[str, Any] | None = None

    def read(self) -> dict[str, Any] | None:
        """The summary, or None while the ledger is being created or briefly locked."""
        try:
            if self._ledger is None:
                self._ledger = Ledger.open(ledger_path(self.directory), readonly=True)
            version = self._ledger.data_version()
            if version != self._version or self._last is None:
                self._last = summary(self._ledger, self.config)
                self._version = version
            else:
                # Nothing was written, but the orchestrator may have died since: the state comes from the
                # kernel's view of the lock as well as the ledger, so it is asked again on every read.
                last = self._last
                plan_done = last["designs_total"] >= last["designs_planned"] and not last["designs_pending"]
                self._last = {**last, "state": campaign_state(self.directory, self._ledger, plan_done=plan_done)}
            return self._last
        except (LedgerError, sqlite3.Error):
            self.close()
            return None  # try again next tick

    def close(self) -> None:
        if self._ledger is not None:
            self._ledger.close()
            self._ledger = None


class LedgerWatcher:
    """Shows campaign progress until :meth:`stop`; use as a context manager."""

    def __init__(self, directory: Path, config: CampaignConfig, *, stream: TextIO, interval_s: float = 0.5) -> None:
        self.directory = Path(directory)
        self.config = config
        self.stream = stream
        self.interval_s = interval_s
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="sortie-progress", daemon=True)
        self._readers = threading.local()  # a connection belongs to the thread that opened it
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
        try:
            while True:
                s = self._read()
                if s is not None and s["state"]["state"] != "running":
                    return
                self._stop.wait(self.interval_s)
        finally:
            self._close_reader()

    def _read(self) -> dict[str, Any] | None:
        """The summary as of now, through this thread's own :class:`SummaryReader`."""
        reader = getattr(self._readers, "reader", None)
        if reader is None:
            reader = self._readers.reader = SummaryReader(self.directory, self.config)
        return reader.read()

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
        try:
            if self.tty:
                self._loop_rich()
            else:
                self._loop_plain()
        finally:
            self._close_reader()

    def _close_reader(self) -> None:
        """Close the calling thread's connection (SQLite connections stay in their thread)."""
        reader = getattr(self._readers, "reader", None)
        if reader is not None:
            reader.close()
            self._readers.reader = None

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
        from rich.console import Console  # only a terminal needs it; `status --json` starts faster without
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

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

