"""The conductor's ledger work per finished case does not grow with the ledger.

A counting wrapper around the ledger's SQLite connection records every statement and every row
a statement returns. The conductor is driven by hand, one slot, with outcomes fed in as a case
task would report them (no Prefect flow, no solver): each cycle finishes the case in flight,
scores its design when it was the design's last case, and starts the next case. The same cycle
costs the same number of statements and rows in a ledger of 8 designs as in one of 400.
"""

from __future__ import annotations

import sqlite3
import time
from collections import deque
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import yaml

from sortie import campaign
from sortie.adapters.base import CaseOutcome, JobHandle
from sortie.adapters.registry import check_solver
from sortie.config import load_config
from sortie.ledger import Ledger, ledger_path
from tests.conftest import DEMO_CONFIG


class _CountingCursor:
    def __init__(self, cursor: sqlite3.Cursor, counter: _CountingConnection) -> None:
        self._cursor = cursor
        self._counter = counter

    def __iter__(self) -> Iterator[Any]:
        for row in self._cursor:
            self._counter.rows += 1
            yield row

    def fetchone(self) -> Any:
        row = self._cursor.fetchone()
        self._counter.rows += row is not None
        return row

    def fetchall(self) -> list[Any]:
        rows = self._cursor.fetchall()
        self._counter.rows += len(rows)
        return rows

    @property
    def lastrowid(self) -> int | None:
        return self._cursor.lastrowid


class _CountingConnection:
    """Stands in for the ledger's connection: counts statements and the rows read back."""

    def __init__(self, conn: sqlite3.Connection) -> None:
        self._conn = conn
        self.statements = 0
        self.rows = 0

    def execute(self, sql: str, args: Any = ()) -> _CountingCursor:
        self.statements += 1
        return _CountingCursor(self._conn.execute(sql, args), self)

    def executemany(self, sql: str, args: Any) -> _CountingCursor:
        self.statements += 1
        return _CountingCursor(self._conn.executemany(sql, args), self)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._conn, name)


class _NoAdapter:
    detached = False


def _conductor(tmp_path: Path, designs: int) -> Any:
    from sortie.flows.campaign import _Conductor

    tmp_path.mkdir(exist_ok=True)
    config = yaml.safe_load(DEMO_CONFIG.read_text())
    config["solver"] = {"adapter": "python", "function": f"{tmp_path / 'noop.py'}:noop"}
    (tmp_path / "noop.py").write_text("def noop(p, c):\n    return {'lift': 0.1, 'drag': 0.2}\n")
    config["quantities"] = {"lift": {}, "drag": {}}
    config["conditions"] = {"mach": [0.6, 1.3]}
    config["plan"] = {"initial": {"method": "lhs", "designs": designs - 1}}
    config["budget"] = {"designs": designs}
    config["slots"] = 1
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(config))
    cfg = load_config(path, check_solver=check_solver)
    campaign.prepare(path, cfg, tmp_path / "camp")
    ledger = Ledger.open(ledger_path(tmp_path / "camp"))
    conductor = _Conductor(tmp_path / "camp", cfg, ledger, _NoAdapter())  # type: ignore[arg-type]
    conductor._launch = lambda spec, handle: None  # no Prefect task: outcomes are fed in by hand
    conductor.plan()
    conductor.waiting = deque(ledger.case_ids(states=("planned",)))
    conductor.fill_slots()
    return conductor


def _cycle(conductor: Any, counter: _CountingConnection | None = None) -> tuple[int, int]:
    """Finish the case in flight and start the next; the statements and rows it took."""
    from sortie.flows.campaign import _Finished, _Started

    (case_id,) = conductor.in_flight
    conductor.handle(_Started(case_id, JobHandle(case_id, f"job-{case_id}", time.time())))
    before = (counter.statements, counter.rows) if counter else (0, 0)
    mach = conductor.in_flight[case_id][0].condition["mach"]
    conductor.handle(_Finished(case_id, CaseOutcome({"lift": mach * 0.1, "drag": 0.2 + mach})))
    conductor.fill_slots()
    return (counter.statements - before[0], counter.rows - before[1]) if counter else (0, 0)


def _costs_after(tmp_path: Path, designs: int, done_first: int) -> list[tuple[int, int]]:
    """Per-cycle (statements, rows) for four cases (two designs) after ``done_first`` cases finished."""
    conductor = _conductor(tmp_path, designs)
    for _ in range(done_first):
        _cycle(conductor)
    counter = _CountingConnection(conductor.ledger._conn)
    conductor.ledger._conn = counter
    costs = [_cycle(conductor, counter) for _ in range(4)]
    conductor.ledger._conn = counter._conn
    assert conductor.ledger.check_consistency() == []
    conductor.ledger.close()
    return costs


def test_queries_and_rows_per_finished_case_do_not_grow_with_the_ledger(tmp_path: Path) -> None:
    small = _costs_after(tmp_path / "small", designs=8, done_first=4)
    large = _costs_after(tmp_path / "large", designs=400, done_first=600)
    assert small == large
    # a design's first case only records; its last case also scores the design
    assert small[0] == small[2] and small[1] == small[3]
    assert small[1][0] > small[0][0]
    assert max(rows for _, rows in small) <= 12


def test_designs_waiting_for_the_baseline_are_scored_when_it_comes_in(tmp_path: Path) -> None:
    """The goal compares with the baseline: designs finished before it are scored once it is in."""
    from sortie.flows.campaign import _Finished, _Started

    conductor = _conductor(tmp_path, designs=4)
    (first,) = conductor.in_flight  # the baseline's first case: hold it back until the end
    conductor.in_flight.clear()
    conductor.ledger.requeue(first, why="interrupted", reason="held back by the test")
    conductor.waiting.append(first)
    for _ in range(8):
        conductor.fill_slots()
        (case_id,) = conductor.in_flight
        conductor.handle(_Started(case_id, JobHandle(case_id, "job", time.time())))
        mach = conductor.in_flight[case_id][0].condition["mach"]
        conductor.handle(_Finished(case_id, CaseOutcome({"lift": mach * 0.1, "drag": 0.2 + mach})))
        if case_id != first:
            assert conductor.ledger.design(conductor.ledger.first_design_id()).status == "pending"
    assert conductor.ledger.count_designs(status="done") == 4
    assert conductor.ledger.check_consistency() == []
    conductor.ledger.close()
