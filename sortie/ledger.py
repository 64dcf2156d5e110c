"""The ledger: one SQLite file per campaign, the single record that status, export and resume read.

Write before you act: a case row is committed as ``submitting`` before its solver starts, and as
``running`` with its job id as soon as that is known, so an interrupted campaign can always tell
what was in flight. Every state change is one short transaction (``BEGIN IMMEDIATE``) on a
connection owned by one thread; readers (``status --watch``, reports) open their own read-only
connection, which WAL mode lets run beside the writer.
"""

from __future__ import annotations

import json
import math
import os
import sqlite3
import time
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sortie.errors import LedgerError

SCHEMA_VERSION = 2
LEDGER_NAME = "ledger.sqlite"
CASE_STATES = ("planned", "submitting", "running", "done", "failed")
DESIGN_STATES = ("pending", "done", "failed")
# The attempt row of a case's current attempt (parameters: case id, case id).
_CURRENT_ATTEMPT = "case_id = ? AND number = (SELECT attempts FROM cases WHERE id = ?)"

_SCHEMA = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE designs (
    id INTEGER PRIMARY KEY,
    stage TEXT NOT NULL,
    reason TEXT NOT NULL,
    values_json TEXT NOT NULL,
    unit_json TEXT NOT NULL,
    status TEXT NOT NULL DEFAULT 'pending' CHECK (status IN ('pending', 'done', 'failed')),
    objective REAL,
    constraints_json TEXT,
    feasible INTEGER,
    prediction_json TEXT,
    created_at REAL NOT NULL,
    finished_at REAL
);
CREATE TABLE cases (
    id INTEGER PRIMARY KEY,
    design_id INTEGER NOT NULL REFERENCES designs(id),
    condition_index INTEGER NOT NULL,
    condition_json TEXT NOT NULL,
    state TEXT NOT NULL DEFAULT 'planned'
        CHECK (state IN ('planned', 'submitting', 'running', 'done', 'failed')),
    attempts INTEGER NOT NULL DEFAULT 0,
    job_id TEXT,
    workdir TEXT,
    started_at REAL,
    ended_at REAL,
    quantities_json TEXT,
    failure_class TEXT,
    failure_reason TEXT,
    UNIQUE (design_id, condition_index)
);
CREATE TABLE attempts (
    id INTEGER PRIMARY KEY,
    case_id INTEGER NOT NULL REFERENCES cases(id),
    number INTEGER NOT NULL,
    state TEXT NOT NULL,
    job_id TEXT,
    pgid INTEGER,
    started_at REAL NOT NULL,
    ended_at REAL,
    failure_class TEXT,
    reason TEXT,
    UNIQUE (case_id, number)
);
CREATE TABLE events (
    id INTEGER PRIMARY KEY,
    at REAL NOT NULL,
    kind TEXT NOT NULL,
    message TEXT NOT NULL,
    data_json TEXT
);
CREATE TABLE models (
    id INTEGER PRIMARY KEY,
    at REAL NOT NULL,
    target TEXT NOT NULL,
    chosen TEXT NOT NULL,
    n_points INTEGER NOT NULL,
    scores_json TEXT NOT NULL
);
CREATE TABLE analyses (
    id INTEGER PRIMARY KEY,
    at REAL NOT NULL,
    kind TEXT NOT NULL,
    data_json TEXT NOT NULL
);
-- one row per orchestrator run (see sortie.runstate): who ran it, its heartbeat, how it ended
CREATE TABLE runs (id INTEGER PRIMARY KEY, pid INTEGER NOT NULL, host TEXT NOT NULL,
    started_at REAL NOT NULL, heartbeat_at REAL NOT NULL, ended_at REAL, outcome TEXT, reason TEXT);
CREATE INDEX cases_by_state ON cases(state);
CREATE INDEX cases_by_design ON cases(design_id);
CREATE INDEX designs_by_status ON designs(status);
CREATE INDEX designs_by_stage ON designs(stage, status);
CREATE INDEX designs_by_score ON designs(status, feasible, objective);
CREATE INDEX attempts_by_state ON attempts(state);
"""

# How a ledger of an older schema version becomes the current one: the statements that take
# version N to N + 1, run in one transaction on the first writable open (``resume``, ``run``).
# Version 2 added the indexes that the per-event queries filter by, and the runs table; without them every case
# finished would scan the designs table, so an old ledger is upgraded, never read slowly.
_MIGRATIONS: dict[int, tuple[str, ...]] = {
    1: (
        "CREATE TABLE IF NOT EXISTS analyses (id INTEGER PRIMARY KEY, at REAL NOT NULL, kind TEXT NOT NULL,"
        " data_json TEXT NOT NULL)",
        "CREATE TABLE IF NOT EXISTS runs (id INTEGER PRIMARY KEY, pid INTEGER NOT NULL, host TEXT NOT NULL,"
        " started_at REAL NOT NULL, heartbeat_at REAL NOT NULL, ended_at REAL, outcome TEXT, reason TEXT)",
        "CREATE INDEX IF NOT EXISTS cases_by_state ON cases(state)",
        "CREATE INDEX IF NOT EXISTS cases_by_design ON cases(design_id)",
        "CREATE INDEX IF NOT EXISTS designs_by_status ON designs(status)",
        "CREATE INDEX IF NOT EXISTS designs_by_stage ON designs(stage, status)",
        "CREATE INDEX IF NOT EXISTS designs_by_score ON designs(status, feasible, objective)",
        "CREATE INDEX IF NOT EXISTS attempts_by_state ON attempts(state)",
    ),
}


@dataclass(frozen=True)
class DesignRow:
    """A design as recorded; ``values`` are physical, ``unit`` the unit-cube point."""

    id: int
    stage: str
    reason: str
    values: dict[str, Any]
    unit: list[float]
    status: str
    objective: float | None
    constraints: dict[str, float] | None
    feasible: bool | None
    prediction: dict[str, Any] | None = None


@dataclass(frozen=True)
class CaseRow:
    """A case as recorded."""

    id: int
    design_id: int
    condition_index: int
    condition: dict[str, float]
    state: str
    attempts: int
    job_id: str | None
    workdir: str | None
    started_at: float | None
    ended_at: float | None
    quantities: dict[str, float] | None
    failure_class: str | None
    failure_reason: str | None

    @property
    def name(self) -> str:
        """Readable case name, also used for its folder and job name."""
        return case_name(self.design_id, self.condition_index)


def case_name(design_id: int, condition_index: int) -> str:
    return f"d{design_id:04d}-c{condition_index}"


class Ledger:
    """The campaign's SQLite ledger. Use :meth:`create` or :meth:`open`; close when done.

    Parameters
    ----------
    path : Path
        The SQLite file (``<campaign>/ledger.sqlite``).
    readonly : bool
        Open without write access, for watchers and reports while a campaign runs.
    """

    def __init__(self, path: Path, *, readonly: bool = False) -> None:
        self.path = Path(path)
        self.readonly = readonly
        try:
            if readonly:
                uri = self.path.absolute().as_uri() + "?mode=ro"
                self._conn = sqlite3.connect(uri, uri=True, isolation_level=None, timeout=30)
            else:
                self._conn = sqlite3.connect(self.path, isolation_level=None, timeout=30)
            self._conn.execute("PRAGMA foreign_keys=ON")
            self._conn.execute("PRAGMA busy_timeout=30000")
        except sqlite3.Error as err:
            raise LedgerError(f"{self.path}: cannot open the ledger ({err}); check the folder exists and is writable") from None
        self._conn.row_factory = sqlite3.Row

    # -- lifecycle -------------------------------------------------------------------------
    @classmethod
    def create(cls, path: Path, meta: Mapping[str, str]) -> Ledger:
        """Create a new ledger with its schema and metadata, appearing at ``path`` all at once.

        The file is built under a temporary name and renamed into place, so a reader (a
        progress watcher, ``sortie status``) never sees a ledger without its tables.
        """
        path = Path(path)
        if path.exists():
            raise LedgerError(f"{path}: a ledger already exists here; open it instead of creating one")
        building = path.with_name(path.name + ".new")
        for leftover in (building, Path(f"{building}-wal"), Path(f"{building}-shm")):
            leftover.unlink(missing_ok=True)
        ledger = cls(building)
        try:
            with ledger.transaction() as c:
                for stmt in _SCHEMA.strip().split(";\n"):
                    if stmt.strip():
                        c.execute(stmt)
                rows = {"schema_version": str(SCHEMA_VERSION), "created_at": str(time.time()), **meta}
                c.executemany("INSERT INTO meta(key, value) VALUES (?, ?)", rows.items())
        except BaseException:
            ledger.close()
            building.unlink(missing_ok=True)
            raise
        ledger.close()  # rollback journal while building: the file is complete once closed
        os.replace(building, path)
        return cls.open(path)

    @classmethod
    def open(cls, path: Path, *, readonly: bool = False) -> Ledger:
        """Open an existing ledger and check its schema version."""
        if not Path(path).is_file():
            raise LedgerError(f"{path}: no ledger here; give the folder of a campaign started with 'sortie run'")
        ledger = cls(path, readonly=readonly)
        try:
            version = ledger.meta().get("schema_version")
        except sqlite3.DatabaseError as err:  # not SQLite at all, or SQLite without our tables
            ledger.close()
            raise LedgerError(f"{path}: not a sortie ledger ({err})") from None
        known = version is not None and version.isdigit() and int(version) in (*_MIGRATIONS, SCHEMA_VERSION)
        if not known:
            ledger.close()
            raise LedgerError(f"{path}: ledger schema version {version} is not supported; this sortie reads version {SCHEMA_VERSION}")
        if readonly and version != str(SCHEMA_VERSION):
            ledger.close()
            raise LedgerError(f"{path}: the ledger has schema version {version}, older than this sortie's {SCHEMA_VERSION}; "
                              f"upgrade it in place with 'sortie resume {Path(path).parent}' (it keeps every result)")
        if not readonly:
            ledger._writer_pragmas()
            ledger._upgrade(int(version))  # type: ignore[arg-type]
        return ledger

    def _writer_pragmas(self) -> None:
        """WAL lets readers watch while the campaign writes; set only on a file known to be ours."""
        self._conn.execute("PRAGMA journal_mode=WAL")
        self._conn.execute("PRAGMA synchronous=NORMAL")

    def _upgrade(self, version: int) -> None:
        """Bring an older ledger to :data:`SCHEMA_VERSION` in one transaction (all steps or none)."""
        if version == SCHEMA_VERSION:
            return
        with self.transaction() as c:
            for step in range(version, SCHEMA_VERSION):
                for stmt in _MIGRATIONS[step]:
                    c.execute(stmt)
            c.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION),))
            self._event(c, "ledger-upgraded", f"ledger upgraded from schema version {version} to {SCHEMA_VERSION}",
                        {"from": version, "to": SCHEMA_VERSION})

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """One atomic write: everything inside commits together or not at all."""
        self._conn.execute("BEGIN IMMEDIATE")
        try:
            yield self._conn
        except BaseException:
            self._conn.execute("ROLLBACK")
            raise
        self._conn.execute("COMMIT")

    # -- writes ----------------------------------------------------------------------------
    def add_design(self, *, stage: str, reason: str, values: Mapping[str, Any], unit: Sequence[float],
                   conditions: Sequence[Mapping[str, float]], prediction: Mapping[str, Any] | None = None) -> int:
        """Record a design, its planned cases (one per condition) and any prediction, together."""
        with self.transaction() as c:
            return self._insert_design(c, stage, reason, values, unit, conditions, prediction)

    def add_designs(self, designs: Sequence[Any], conditions: Sequence[Mapping[str, float]]) -> list[int]:
        """Record several designs (each with ``stage``, ``reason``, ``values``, ``unit``) in one transaction.

        A plan of thousands of designs is then one commit, not one per design, and is recorded
        all at once or not at all.
        """
        with self.transaction() as c:
            return [self._insert_design(c, d.stage, d.reason, d.values, d.unit, conditions, None) for d in designs]

    def _insert_design(self, c: sqlite3.Connection, stage: str, reason: str, values: Mapping[str, Any],
                       unit: Sequence[float], conditions: Sequence[Mapping[str, float]],
                       prediction: Mapping[str, Any] | None) -> int:
        cur = c.execute(
            "INSERT INTO designs(stage, reason, values_json, unit_json, prediction_json, created_at)"
            " VALUES (?, ?, ?, ?, ?, ?)",
            (stage, reason, json.dumps(dict(values)), json.dumps([float(u) for u in unit]),
             json.dumps(dict(prediction)) if prediction is not None else None, time.time()),
        )
        design_id = int(cur.lastrowid)
        c.executemany(
            "INSERT INTO cases(design_id, condition_index, condition_json) VALUES (?, ?, ?)",
            [(design_id, i, json.dumps(dict(cond))) for i, cond in enumerate(conditions)],
        )
        self._event(c, "design", f"design {design_id} added ({stage}: {reason})", {"design": design_id})
        return design_id

    def mark_submitting(self, case_id: int, workdir: Path) -> int:
        """Commit that a case is about to start; returns the attempt number."""
        now = time.time()
        with self.transaction() as c:
            row = c.execute("SELECT attempts, state FROM cases WHERE id = ?", (case_id,)).fetchone()
            if row is None:
                raise LedgerError(f"case {case_id} is not in the ledger")
            number = int(row["attempts"]) + 1
            c.execute(
                "UPDATE cases SET state = 'submitting', attempts = ?, workdir = ?, started_at = ?, ended_at = NULL,"
                " job_id = NULL, failure_class = NULL, failure_reason = NULL WHERE id = ?",
                (number, str(workdir), now, case_id),
            )
            c.execute("INSERT INTO attempts(case_id, number, state, started_at) VALUES (?, ?, 'submitting', ?)",
                      (case_id, number, now))
        return number

    def mark_running(self, case_id: int, job_id: str, pgid: int | None = None) -> None:
        """Record the job id (pid or scheduler id) as soon as it is known."""
        with self.transaction() as c:
            c.execute("UPDATE cases SET state = 'running', job_id = ? WHERE id = ?", (job_id, case_id))
            c.execute(f"UPDATE attempts SET state = 'running', job_id = ?, pgid = ? WHERE {_CURRENT_ATTEMPT}",
                      (job_id, pgid, case_id, case_id))

    def finish_case(self, case_id: int, *, quantities: Mapping[str, float] | None = None,
                    failure_class: str | None = None, reason: str | None = None) -> None:
        """Record a case's end: its quantities, or the class and reason of its failure."""
        ok = failure_class is None
        if ok and quantities is None:
            raise ValueError("finish_case needs quantities for a case that succeeded, or a failure_class")
        now = time.time()
        state = "done" if ok else "failed"
        with self.transaction() as c:
            c.execute(
                "UPDATE cases SET state = ?, ended_at = ?, quantities_json = ?, failure_class = ?, failure_reason = ?"
                " WHERE id = ?",
                (state, now, json.dumps(dict(quantities)) if ok and quantities is not None else None,
                 failure_class, reason, case_id),
            )
            c.execute(f"UPDATE attempts SET state = ?, ended_at = ?, failure_class = ?, reason = ? WHERE {_CURRENT_ATTEMPT}",
                      (state, now, failure_class, reason, case_id, case_id))
            if not ok:
                self._event(c, "case-failed", f"case {case_id} failed ({failure_class}): {reason}", {"case": case_id})

    def requeue(self, case_id: int, *, why: str, reason: str) -> None:
        """Put a case back to ``planned``; its current attempt ends as ``why`` (lost, interrupted)."""
        with self.transaction() as c:
            c.execute(f"UPDATE attempts SET state = ?, ended_at = ?, reason = ? WHERE {_CURRENT_ATTEMPT}",
                      (why, time.time(), reason, case_id, case_id))
            c.execute("UPDATE cases SET state = 'planned', job_id = NULL, ended_at = NULL WHERE id = ?", (case_id,))
            self._event(c, "case-requeued", f"case {case_id} requeued ({why}): {reason}", {"case": case_id})

    def retry_case(self, case_id: int, *, failure_class: str, reason: str) -> None:
        """End the current attempt as failed and put the case back to ``planned`` for another try."""
        now = time.time()
        with self.transaction() as c:
            c.execute(f"UPDATE attempts SET state = 'failed', ended_at = ?, failure_class = ?, reason = ? WHERE {_CURRENT_ATTEMPT}",
                      (now, failure_class, reason, case_id, case_id))
            c.execute("UPDATE cases SET state = 'planned', job_id = NULL, ended_at = ?, failure_class = ?,"
                      " failure_reason = ? WHERE id = ?", (now, failure_class, reason, case_id))
            self._event(c, "case-retry", f"case {case_id} failed ({failure_class}) and will be tried again: {reason}",
                        {"case": case_id})

    def case_attempts(self, case_id: int) -> list[dict[str, Any]]:
        """Every attempt of one case, oldest first."""
        return [dict(r) for r in self._conn.execute("SELECT * FROM attempts WHERE case_id = ? ORDER BY number", (case_id,))]

    def finish_design(self, design_id: int, *, status: str, objective: float | None = None,
                      constraints: Mapping[str, float] | None = None, feasible: bool | None = None) -> None:
        """Record a design's goal values once all its cases are in."""
        if status not in DESIGN_STATES:
            raise ValueError(f"status must be one of {DESIGN_STATES}, got {status!r}")
        with self.transaction() as c:
            c.execute(
                "UPDATE designs SET status = ?, objective = ?, constraints_json = ?, feasible = ?, finished_at = ?"
                " WHERE id = ?",
                (status, objective, json.dumps(dict(constraints)) if constraints is not None else None,
                 None if feasible is None else int(feasible), time.time(), design_id),
            )

    def add_model_choice(self, target: str, chosen: str, n_points: int, scores: Sequence[Mapping[str, Any]]) -> None:
        """Record which surrogate was chosen for a target, with every candidate's LOO score."""
        with self.transaction() as c:
            c.execute("INSERT INTO models(at, target, chosen, n_points, scores_json) VALUES (?, ?, ?, ?, ?)",
                      (time.time(), target, chosen, n_points, json.dumps([_finite(dict(s)) for s in scores])))

    def model_choices(self) -> dict[str, dict[str, Any]]:
        """The latest model choice per target."""
        rows = self._conn.execute("SELECT * FROM models WHERE id IN (SELECT MAX(id) FROM models GROUP BY target) ORDER BY target")
        return {r["target"]: {"chosen": r["chosen"], "n_points": r["n_points"], "scores": json.loads(r["scores_json"])}
                for r in rows}

    def add_analysis(self, kind: str, data: Mapping[str, Any]) -> None:
        """Record the result of an analysis (``screening``, ``sobol``, ...) as one JSON document."""
        with self.transaction() as c:
            c.execute("INSERT INTO analyses(at, kind, data_json) VALUES (?, ?, ?)",
                      (time.time(), kind, json.dumps(_finite_deep(data))))

    def analyses(self, kind: str | None = None) -> list[dict[str, Any]]:
        """Recorded analyses, oldest first, each ``{"id", "at", "kind", "data"}``; [] if none."""
        try:
            rows = self._conn.execute("SELECT * FROM analyses" + (" WHERE kind = ?" if kind else "") + " ORDER BY id",
                                      (kind,) if kind else ()).fetchall()
        except sqlite3.OperationalError:  # a ledger from before the table existed, opened read-only
            return []
        return [{"id": r["id"], "at": r["at"], "kind": r["kind"], "data": json.loads(r["data_json"])} for r in rows]

    # -- orchestrator runs (campaign state) --------------------------------------------------
    def start_run(self, pid: int, host: str, *, unended_reason: str) -> int:
        """Record that an orchestrator starts; runs still open (their process died) end as interrupted."""
        now = time.time()
        with self.transaction() as c:
            c.execute("UPDATE runs SET outcome = 'interrupted', reason = ? WHERE outcome IS NULL", (unended_reason,))
            cur = c.execute("INSERT INTO runs(pid, host, started_at, heartbeat_at) VALUES (?, ?, ?, ?)",
                            (pid, host, now, now))
        return int(cur.lastrowid)

    def beat(self, run_id: int) -> None:
        """The run is alive: one short write, every few seconds."""
        with self.transaction() as c:
            c.execute("UPDATE runs SET heartbeat_at = ? WHERE id = ?", (time.time(), run_id))

    def end_run(self, run_id: int, outcome: str, reason: str | None = None) -> None:
        """Record how a run ended: finished, failed or interrupted, with the reason."""
        now = time.time()
        with self.transaction() as c:
            c.execute("UPDATE runs SET ended_at = ?, heartbeat_at = ?, outcome = ?, reason = ? WHERE id = ?",
                      (now, now, outcome, reason, run_id))

    def runs(self) -> list[dict[str, Any]]:
        """Every orchestrator run, oldest first; [] for a ledger written before runs were recorded."""
        try:
            return [dict(r) for r in self._conn.execute("SELECT * FROM runs ORDER BY id")]
        except sqlite3.OperationalError:  # no runs table yet, opened read-only
            return []

    def event(self, kind: str, message: str, data: Mapping[str, Any] | None = None) -> None:
        with self.transaction() as c:
            self._event(c, kind, message, data)

    @staticmethod
    def _event(c: sqlite3.Connection, kind: str, message: str, data: Mapping[str, Any] | None) -> None:
        c.execute("INSERT INTO events(at, kind, message, data_json) VALUES (?, ?, ?, ?)",
                  (time.time(), kind, message, json.dumps(dict(data)) if data else None))

    def set_meta(self, key: str, value: str) -> None:
        with self.transaction() as c:
            c.execute("INSERT INTO meta(key, value) VALUES (?, ?) ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                      (key, value))

    # -- reads -----------------------------------------------------------------------------
    def meta(self) -> dict[str, str]:
        return {r["key"]: r["value"] for r in self._conn.execute("SELECT key, value FROM meta")}

    def data_version(self) -> int:
        """A number that changes whenever another connection commits to the ledger.

        A watcher keeps its connection open and compares this before reading anything else, so an
        idle tick costs one pragma, not a read of the ledger.
        """
        return int(self._conn.execute("PRAGMA data_version").fetchone()[0])

    def designs(self, *, status: str | None = None) -> list[DesignRow]:
        """Every design (of one status), oldest first. Loads them all: not for per-event decisions."""
        return list(self.iter_designs(status=status))

    def iter_designs(self, *, status: str | None = None) -> Iterator[DesignRow]:
        """The designs one at a time, so a long table can be written without holding it in memory."""
        sql = "SELECT * FROM designs" + (" WHERE status = ?" if status else "") + " ORDER BY id"
        return map(_design, self._conn.execute(sql, (status,) if status else ()))

    def count_designs(self, *, status: str | None = None, stage: str | None = None) -> int:
        """How many designs (of a status, of a stage) are recorded, counted on the indexes."""
        clauses = [c for c, v in (("status = ?", status), ("stage = ?", stage)) if v is not None]
        where = f" WHERE {' AND '.join(clauses)}" if clauses else ""
        args = [v for v in (status, stage) if v is not None]
        return int(self._conn.execute(f"SELECT COUNT(*) FROM designs{where}", args).fetchone()[0])

    def first_design_id(self) -> int | None:
        """The first design recorded (the baseline), or None in an empty ledger."""
        return self._conn.execute("SELECT MIN(id) FROM designs").fetchone()[0]

    def unscored_design_ids(self) -> list[int]:
        """Pending designs whose cases have all ended: the ones waiting to be scored."""
        rows = self._conn.execute(
            "SELECT d.id FROM designs d WHERE d.status = 'pending' AND NOT EXISTS (SELECT 1 FROM cases c"
            " WHERE c.design_id = d.id AND c.state NOT IN ('done', 'failed')) ORDER BY d.id")
        return [int(r[0]) for r in rows]

    def best_design(self, sense: str) -> DesignRow | None:
        """Best feasible scored design; if none is feasible, the one that violates its constraints least.

        The feasible case is one indexed lookup; the fallback reads only the constraint margins of
        the scored designs, one row at a time, and only while no design is feasible.
        """
        order = "objective ASC" if sense == "minimize" else "objective DESC"
        row = self._conn.execute("SELECT * FROM designs WHERE status = 'done' AND feasible = 1 AND objective IS NOT NULL"
                                 f" ORDER BY {order}, id LIMIT 1").fetchone()
        if row is not None:
            return _design(row)
        best_id, best_worst = None, math.inf
        for r in self._conn.execute("SELECT id, constraints_json FROM designs WHERE status = 'done' AND objective IS NOT NULL"
                                    " ORDER BY id"):
            worst = max(json.loads(r[1]).values(), default=0.0) if r[1] else 0.0
            worst = math.inf if worst is None else worst
            if best_id is None or worst < best_worst:
                best_id, best_worst = r[0], worst
        return None if best_id is None else self.design(best_id)

    def design(self, design_id: int) -> DesignRow:
        row = self._conn.execute("SELECT * FROM designs WHERE id = ?", (design_id,)).fetchone()
        if row is None:
            raise LedgerError(f"design {design_id} is not in the ledger")
        return _design(row)

    def cases(self, *, design_id: int | None = None, states: Sequence[str] | None = None) -> list[CaseRow]:
        """The cases (of one design, in some states), by id. Without a filter this loads them all."""
        return list(self.iter_cases(design_id=design_id, states=states))

    def case_ids(self, *, states: Sequence[str], retried: bool = False) -> list[int]:
        """Ids of the cases in ``states`` (only those with an earlier attempt if ``retried``), by id."""
        sql = f"SELECT id FROM cases WHERE state IN ({','.join('?' * len(states))})" + (" AND attempts > 0" if retried else "")
        return [int(r[0]) for r in self._conn.execute(sql + " ORDER BY id", list(states))]

    def count_cases(self) -> dict[str, int]:
        """How many cases are in each state (every state present, zero if none)."""
        counts = dict.fromkeys(CASE_STATES, 0)
        counts.update({r[0]: int(r[1]) for r in self._conn.execute("SELECT state, COUNT(*) FROM cases GROUP BY state")})
        return counts

    def tally(self, table: str, column: str, *, where: str = "") -> dict[str, int]:
        """Rows of ``table`` counted by ``column`` (in order of first appearance), on the indexes.

        ``table``, ``column`` and ``where`` are the caller's fixed SQL, never user input.
        """
        sql = f"SELECT {column}, COUNT(*) FROM {table}{' WHERE ' + where if where else ''} GROUP BY {column} ORDER BY MIN(id)"
        return {r[0]: int(r[1]) for r in self._conn.execute(sql)}

    def attempt_stats(self) -> dict[str, Any]:
        """Aggregates of the attempts table for ``status``: times, retries, failed classes with reasons.

        Computed in SQL, so its cost is a scan of one narrow table and its size does not grow with it.
        """
        q = self._conn.execute
        mean, total, count = q("SELECT AVG(CASE WHEN state = 'done' AND ended_at THEN ended_at - started_at END),"
                               " TOTAL(CASE WHEN ended_at THEN ended_at - started_at END), COUNT(*) FROM attempts").fetchone()
        retries = q("SELECT COUNT(*) FROM attempts a WHERE a.state = 'failed' AND a.number <"
                    " (SELECT MAX(b.number) FROM attempts b WHERE b.case_id = a.case_id)").fetchone()[0]
        failed: dict[str, dict[str, Any]] = {}
        for cls, n in self.tally("attempts", "failure_class", where="state = 'failed' AND failure_class IS NOT NULL"
                                 " AND failure_class != ''").items():
            reasons = q("SELECT reason FROM attempts WHERE state = 'failed' AND failure_class = ? AND reason IS NOT NULL"
                        " AND reason != '' GROUP BY reason ORDER BY MIN(id) LIMIT 3", (cls,))
            failed[cls] = {"attempts": n, "reasons": [r[0] for r in reasons]}
        return {"mean_case_s": mean, "solver_s": total, "attempts_total": int(count), "retries": int(retries),
                "attempt_failures": failed}

    def first_design(self, stage: str) -> DesignRow | None:
        """The first design of a stage (the baseline, say), or None."""
        row = self._conn.execute("SELECT * FROM designs WHERE stage = ? ORDER BY id LIMIT 1", (stage,)).fetchone()
        return None if row is None else _design(row)

    def iter_cases(self, *, design_id: int | None = None, states: Sequence[str] | None = None) -> Iterator[CaseRow]:
        """The cases one at a time (see :meth:`cases`)."""
        clauses, args = [], []
        if design_id is not None:
            clauses.append("design_id = ?")
            args.append(design_id)
        if states:
            clauses.append(f"state IN ({','.join('?' * len(states))})")
            args.extend(states)
        where = f" WHERE {' AND '.join(clauses)}" if clauses else ""
        return map(_case, self._conn.execute(f"SELECT * FROM cases{where} ORDER BY id", args))

    def case(self, case_id: int) -> CaseRow:
        row = self._conn.execute("SELECT * FROM cases WHERE id = ?", (case_id,)).fetchone()
        if row is None:
            raise LedgerError(f"case {case_id} is not in the ledger")
        return _case(row)

    def attempts(self) -> list[dict[str, Any]]:
        return [dict(r) for r in self._conn.execute("SELECT * FROM attempts ORDER BY id")]

    def events(self) -> list[dict[str, Any]]:
        return [dict(r) for r in self._conn.execute("SELECT * FROM events ORDER BY id")]

    def check_consistency(self) -> list[str]:
        """Problems that would mean the ledger lies; empty when it is consistent."""
        problems = []
        q = self._conn.execute
        for r in q("SELECT id FROM cases WHERE state = 'done' AND quantities_json IS NULL"):
            problems.append(f"case {r['id']} is done but has no quantities")
        for r in q("SELECT id FROM cases WHERE state = 'failed' AND failure_class IS NULL"):
            problems.append(f"case {r['id']} failed without a failure class")
        for r in q("SELECT c.id FROM cases c WHERE c.attempts != (SELECT COUNT(*) FROM attempts a WHERE a.case_id = c.id)"):
            problems.append(f"case {r['id']} has an attempt count that does not match its attempt rows")
        for r in q("SELECT d.id FROM designs d WHERE d.status = 'done' AND (d.objective IS NULL OR EXISTS"
                   " (SELECT 1 FROM cases c WHERE c.design_id = d.id AND c.state != 'done'))"):
            problems.append(f"design {r['id']} is done but lacks an objective or a finished case")
        for r in q("SELECT d.id FROM designs d WHERE NOT EXISTS (SELECT 1 FROM cases c WHERE c.design_id = d.id)"):
            problems.append(f"design {r['id']} has no cases")
        return problems


def _finite(row: dict[str, Any]) -> dict[str, Any]:
    """JSON has no inf or NaN: store them as null so every reader can parse the ledger."""
    return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in row.items()}


def _finite_deep(value: Any) -> Any:
    """Like :func:`_finite`, through nested lists and mappings (numpy values become plain floats)."""
    if isinstance(value, Mapping):
        return {str(k): _finite_deep(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_deep(v) for v in value]
    if hasattr(value, "tolist"):
        return _finite_deep(value.tolist())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _design(r: sqlite3.Row) -> DesignRow:
    return DesignRow(
        id=r["id"], stage=r["stage"], reason=r["reason"], values=json.loads(r["values_json"]),
        unit=json.loads(r["unit_json"]), status=r["status"], objective=r["objective"],
        constraints=json.loads(r["constraints_json"]) if r["constraints_json"] else None,
        feasible=None if r["feasible"] is None else bool(r["feasible"]),
        prediction=json.loads(r["prediction_json"]) if r["prediction_json"] else None,
    )


def _case(r: sqlite3.Row) -> CaseRow:
    return CaseRow(
        id=r["id"], design_id=r["design_id"], condition_index=r["condition_index"],
        condition=json.loads(r["condition_json"]), state=r["state"], attempts=r["attempts"], job_id=r["job_id"],
        workdir=r["workdir"], started_at=r["started_at"], ended_at=r["ended_at"],
        quantities=json.loads(r["quantities_json"]) if r["quantities_json"] else None,
        failure_class=r["failure_class"], failure_reason=r["failure_reason"],
    )


def ledger_path(campaign_dir: Path) -> Path:
    return Path(campaign_dir) / LEDGER_NAME


def writable_dir(path: Path, *, what: str = "the campaign folder", hint: str = "choose a writable folder with --dir") -> None:
    """Create ``path`` if needed and prove it is writable, or raise one clear LedgerError."""
    try:
        Path(path).mkdir(parents=True, exist_ok=True)
        probe = Path(path) / f".write-test-{os.getpid()}"
        probe.write_bytes(b"x")
        probe.unlink()
    except OSError as err:
        raise LedgerError(f"{path}: {what} cannot be written ({err.strerror or err}); {hint}") from None

