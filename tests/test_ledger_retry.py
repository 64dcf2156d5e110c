"""Ledger.retry_case, checked against the raw rows (plain SQL), not through the ledger's own readers."""

from __future__ import annotations

import sqlite3
from pathlib import Path

from sortie.ledger import Ledger, ledger_path


def test_a_retried_case_is_planned_again_with_its_failure_kept_on_the_attempt(tmp_path: Path) -> None:
    path = ledger_path(tmp_path)
    with Ledger.create(path, {"campaign": "sled-test", "config_hash": "abc123"}) as ledger:
        design = ledger.add_design(stage="initial", reason="sobol point 1", values={"ramp_angle": 8.0},
                                   unit=[0.25], conditions=[{"mach": 0.95}])
        (case,) = ledger.cases(design_id=design)
        ledger.mark_submitting(case.id, tmp_path / "cases" / case.name)
        ledger.mark_running(case.id, "4242")
        ledger.retry_case(case.id, failure_class="transient", reason="node lost")
        assert ledger.check_consistency() == []
    con = sqlite3.connect(path)
    con.row_factory = sqlite3.Row
    try:
        row = con.execute("SELECT state, job_id, attempts, failure_class FROM cases WHERE id = ?", (case.id,)).fetchone()
        attempts = con.execute("SELECT number, state, failure_class, reason, ended_at FROM attempts WHERE case_id = ?",
                               (case.id,)).fetchall()
        kinds = [r["kind"] for r in con.execute("SELECT kind FROM events ORDER BY id")]
    finally:
        con.close()
    # The case is due again (planned, no job), and its last failure is still shown on it.
    assert (row["state"], row["job_id"], row["attempts"], row["failure_class"]) == ("planned", None, 1, "transient")
    ((number, state, failure_class, reason, ended_at),) = [tuple(r) for r in attempts]
    assert (number, state, failure_class, reason) == (1, "failed", "transient", "node lost") and ended_at is not None
    assert kinds[-1] == "case-retry"
