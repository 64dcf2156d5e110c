"""The campaign ledger on a real SQLite file: atomic writes, versioning, readers beside a writer."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

from sortie.errors import LedgerError
from sortie.ledger import (
    LEDGER_NAME,
    SCHEMA_VERSION,
    Ledger,
    case_name,
    ledger_path,
    writable_dir,
)

CONDITIONS = [{"mach": 0.8}, {"mach": 0.95}, {"mach": 1.2}]


@pytest.fixture
def path(tmp_path: Path) -> Path:
    return ledger_path(tmp_path)


@pytest.fixture
def ledger(path: Path):
    led = Ledger.create(path, {"campaign": "sled-test", "config_hash": "abc123"})
    yield led
    led.close()


def _design(ledger: Ledger, conditions=CONDITIONS) -> int:
    return ledger.add_design(stage="initial", reason="sobol point 1", values={"ramp_angle": 8.0, "flap": "short"},
                             unit=[0.25, 1.0], conditions=conditions)


def _raw(path: Path) -> sqlite3.Connection:
    conn = sqlite3.connect(path)
    conn.row_factory = sqlite3.Row
    return conn


# --------------------------------------------------------------------------- create and open


def test_create_then_open_keeps_schema_version_and_metadata(path, ledger):
    ledger.close()
    assert path.name == LEDGER_NAME
    with Ledger.open(path) as again:
        meta = again.meta()
    assert meta["schema_version"] == str(SCHEMA_VERSION)
    assert meta["campaign"] == "sled-test"
    assert meta["config_hash"] == "abc123"
    assert float(meta["created_at"]) > 0


def test_create_refuses_to_overwrite_an_existing_ledger(path, ledger):
    with pytest.raises(LedgerError, match="already exists"):
        Ledger.create(path, {})


def test_open_of_a_missing_ledger_is_one_sentence(tmp_path):
    with pytest.raises(LedgerError) as info:
        Ledger.open(tmp_path / "nowhere" / LEDGER_NAME)
    assert "no ledger here" in str(info.value)
    assert "\n" not in str(info.value)


def test_ledger_with_another_schema_version_is_refused(path, ledger):
    ledger.set_meta("schema_version", "99")
    ledger.close()
    for readonly in (False, True):
        with pytest.raises(LedgerError) as info:
            Ledger.open(path, readonly=readonly)
        message = str(info.value)
        assert message.startswith(f"{path}: ")
        assert "schema version 99 is not supported" in message
        assert f"reads version {SCHEMA_VERSION}" in message
        assert "\n" not in message


@pytest.mark.parametrize("readonly", [False, True])
def test_file_that_is_not_sqlite_is_refused_and_left_unchanged(path, readonly):
    content = b"campaign notes, not a database\n" * 20
    path.write_bytes(content)
    with pytest.raises(LedgerError) as info:
        Ledger.open(path, readonly=readonly)
    message = str(info.value)
    assert message.startswith(f"{path}: ")
    assert "not a database" in message
    assert "\n" not in message
    assert path.read_bytes() == content


def test_sqlite_file_of_another_program_is_refused(path):
    conn = sqlite3.connect(path)
    conn.execute("CREATE TABLE readings (t REAL, p REAL)")
    conn.commit()
    conn.close()
    with pytest.raises(LedgerError, match="not a sortie ledger"):
        Ledger.open(path, readonly=True)


def test_ledger_folder_that_does_not_exist_is_one_sentence(tmp_path):
    with pytest.raises(LedgerError) as info:
        Ledger(tmp_path / "missing" / LEDGER_NAME)
    assert "cannot open the ledger" in str(info.value)
    assert "\n" not in str(info.value)


# --------------------------------------------------------------------------- writes


def test_add_design_adds_one_planned_case_per_condition(path, ledger):
    design_id = _design(ledger)
    design = ledger.design(design_id)
    assert design.values == {"ramp_angle": 8.0, "flap": "short"}
    assert design.unit == [0.25, 1.0]
    assert design.status == "pending"
    assert (design.stage, design.reason) == ("initial", "sobol point 1")
    cases = ledger.cases(design_id=design_id)
    assert [c.condition for c in cases] == CONDITIONS
    assert [c.condition_index for c in cases] == [0, 1, 2]
    assert all(c.state == "planned" and c.attempts == 0 and c.job_id is None for c in cases)
    assert [c.name for c in cases] == [case_name(design_id, i) for i in range(3)]
    assert case_name(7, 2) == "d0007-c2"
    assert ledger.events()[-1]["kind"] == "design"
    assert ledger.check_consistency() == []


def test_add_design_is_atomic_when_a_case_cannot_be_written(path, ledger):
    _design(ledger)
    bad_conditions = [{"mach": 0.8}, {"mach": object()}]  # the second cannot be stored
    with pytest.raises(TypeError):
        _design(ledger, bad_conditions)
    assert len(ledger.designs()) == 1
    assert len(ledger.cases()) == 3
    with _raw(path) as raw:
        assert raw.execute("SELECT COUNT(*) FROM designs").fetchone()[0] == 1
        assert raw.execute("SELECT COUNT(*) FROM cases").fetchone()[0] == 3


def test_case_lifecycle_updates_case_and_attempt_rows(tmp_path, ledger):
    design_id = _design(ledger)
    case = ledger.cases(design_id=design_id)[0]
    workdir = tmp_path / "cases" / case.name

    assert ledger.mark_submitting(case.id, workdir) == 1
    row = ledger.cases(states=["submitting"])[0]
    assert (row.id, row.attempts, row.workdir, row.job_id) == (case.id, 1, str(workdir), None)
    assert row.started_at is not None
    attempt = ledger.attempts()[0]
    assert (attempt["case_id"], attempt["number"], attempt["state"]) == (case.id, 1, "submitting")

    ledger.mark_running(case.id, "4242", pgid=4242)
    row = ledger.cases(states=["running"])[0]
    assert row.job_id == "4242"
    attempt = ledger.attempts()[0]
    assert (attempt["state"], attempt["job_id"], attempt["pgid"]) == ("running", "4242", 4242)

    ledger.finish_case(case.id, quantities={"fz": 1.5, "cd": 0.02})
    row = ledger.cases(states=["done"])[0]
    assert row.quantities == {"fz": 1.5, "cd": 0.02}
    assert row.failure_class is None
    assert row.ended_at is not None and row.ended_at >= row.started_at
    attempt = ledger.attempts()[0]
    assert attempt["state"] == "done"
    assert attempt["ended_at"] is not None
    assert ledger.check_consistency() == []


def test_failed_case_records_class_and_reason_on_case_attempt_and_event(tmp_path, ledger):
    case = ledger.cases(design_id=_design(ledger))[1]
    ledger.mark_submitting(case.id, tmp_path / case.name)
    ledger.mark_running(case.id, "77")
    ledger.finish_case(case.id, failure_class="timeout", reason="ran longer than timeout_s=10")
    row = ledger.cases(states=["failed"])[0]
    assert (row.failure_class, row.failure_reason, row.quantities) == ("timeout", "ran longer than timeout_s=10", None)
    attempt = ledger.attempts()[0]
    assert (attempt["state"], attempt["failure_class"], attempt["reason"]) == (
        "failed", "timeout", "ran longer than timeout_s=10")
    event = ledger.events()[-1]
    assert event["kind"] == "case-failed"
    assert "timeout" in event["message"]


def test_failed_case_ignores_quantities(tmp_path, ledger):
    case = ledger.cases(design_id=_design(ledger))[0]
    ledger.mark_submitting(case.id, tmp_path)
    ledger.finish_case(case.id, quantities={"fz": 1.0}, failure_class="output", reason="garbage")
    assert ledger.cases()[0].quantities is None


def test_mark_submitting_unknown_case_is_refused_and_writes_nothing(path, ledger):
    with pytest.raises(LedgerError, match="case 999 is not in the ledger"):
        ledger.mark_submitting(999, Path("/nowhere"))
    assert ledger.attempts() == []


def test_requeue_then_resubmit_starts_a_new_attempt(tmp_path, ledger):
    case = ledger.cases(design_id=_design(ledger))[0]
    ledger.mark_submitting(case.id, tmp_path / "a")
    ledger.mark_running(case.id, "100")
    ledger.requeue(case.id, why="lost", reason="job 100 is not known to the scheduler")
    row = ledger.cases()[0]
    assert (row.state, row.job_id, row.attempts) == ("planned", None, 1)
    first = ledger.attempts()[0]
    assert (first["state"], first["reason"]) == ("lost", "job 100 is not known to the scheduler")
    assert first["ended_at"] is not None
    assert ledger.events()[-1]["kind"] == "case-requeued"
    assert ledger.check_consistency() == []

    assert ledger.mark_submitting(case.id, tmp_path / "b") == 2
    ledger.mark_running(case.id, "101")
    ledger.finish_case(case.id, quantities={"fz": 2.0})
    attempts = ledger.attempts()
    assert [(a["number"], a["state"], a["job_id"]) for a in attempts] == [(1, "lost", "100"), (2, "done", "101")]
    assert ledger.cases()[0].attempts == 2
    assert ledger.check_consistency() == []


def test_finish_design_records_goal_values(tmp_path, ledger):
    design_id = _design(ledger)
    for case in ledger.cases(design_id=design_id):
        ledger.mark_submitting(case.id, tmp_path / case.name)
        ledger.finish_case(case.id, quantities={"cd": 0.02})
    ledger.finish_design(design_id, status="done", objective=0.06, constraints={"drag": -0.01}, feasible=True)
    design = ledger.design(design_id)
    assert (design.status, design.objective, design.constraints, design.feasible) == (
        "done", 0.06, {"drag": -0.01}, True)
    assert ledger.designs(status="done") == [design]
    assert ledger.designs(status="pending") == []
    assert ledger.check_consistency() == []


def test_finish_design_refuses_an_unknown_status(ledger):
    design_id = _design(ledger)
    with pytest.raises(ValueError, match="status must be one of"):
        ledger.finish_design(design_id, status="finished")
    assert ledger.design(design_id).status == "pending"


def test_unknown_design_is_a_ledger_error(ledger):
    with pytest.raises(LedgerError, match="design 5 is not in the ledger"):
        ledger.design(5)


# --------------------------------------------------------------------------- transactions and readers


def test_transaction_rolls_back_everything_on_exception(path, ledger):
    design_id = _design(ledger)
    with pytest.raises(RuntimeError, match="power cut"), ledger.transaction() as c:
        c.execute("UPDATE cases SET state = 'done' WHERE design_id = ?", (design_id,))
        c.execute("INSERT INTO events(at, kind, message) VALUES (0, 'x', 'half')")
        raise RuntimeError("power cut")
    assert {c.state for c in ledger.cases()} == {"planned"}
    assert all(e["message"] != "half" for e in ledger.events())
    # The connection is usable again at once.
    ledger.event("note", "after the rollback")
    assert ledger.events()[-1]["message"] == "after the rollback"


def test_readonly_reader_sees_committed_rows_while_writer_is_open(path, ledger):
    _design(ledger)
    with Ledger.open(path, readonly=True) as reader:
        assert len(reader.cases()) == 3
        with _raw(path) as raw:
            assert raw.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        # A writer in the middle of a transaction neither blocks the reader nor shows it half a write.
        with ledger.transaction() as c:
            c.execute("INSERT INTO designs(stage, reason, values_json, unit_json, created_at)"
                      " VALUES ('infill', 'ei', '{}', '[]', 0)")
            assert len(reader.designs()) == 1
        assert len(reader.designs()) == 2
        _design(ledger)
        assert len(reader.cases()) == 6


def test_readonly_ledger_cannot_write(path, ledger):
    _design(ledger)
    with Ledger.open(path, readonly=True) as reader, pytest.raises(sqlite3.OperationalError, match="readonly"):
        reader.event("note", "should not be written")
    assert all(e["kind"] != "note" for e in ledger.events())


@pytest.mark.parametrize("folder", ["run#2", "sweep?fast", "ramp%20v2"])
def test_readonly_open_works_in_folders_with_uri_characters(tmp_path, folder):
    path = ledger_path(tmp_path / folder)
    path.parent.mkdir()
    with Ledger.create(path, {}) as writer:
        _design(writer)
        with Ledger.open(path, readonly=True) as reader:
            assert len(reader.cases()) == 3
    assert sorted(p.name for p in tmp_path.iterdir()) == [folder]


# --------------------------------------------------------------------------- consistency


def test_check_consistency_is_empty_for_a_clean_ledger(tmp_path, ledger):
    assert ledger.check_consistency() == []
    _design(ledger)
    _design(ledger, [{"mach": 0.9}])
    assert ledger.check_consistency() == []


@pytest.mark.parametrize(("sql", "problem"), [
    ("UPDATE cases SET state = 'done' WHERE id = 1", "case 1 is done but has no quantities"),
    ("UPDATE cases SET state = 'failed' WHERE id = 2", "case 2 failed without a failure class"),
    ("UPDATE cases SET attempts = 3 WHERE id = 3", "case 3 has an attempt count that does not match its attempt rows"),
    ("UPDATE designs SET status = 'done', objective = 1.0 WHERE id = 1",
     "design 1 is done but lacks an objective or a finished case"),
    ("DELETE FROM cases WHERE design_id = 1", "design 1 has no cases"),
])
def test_check_consistency_finds_injected_inconsistency(path, ledger, sql, problem):
    _design(ledger)
    ledger.close()
    with _raw(path) as raw:
        raw.execute(sql)
    with Ledger.open(path, readonly=True) as reader:
        assert reader.check_consistency() == [problem]


# --------------------------------------------------------------------------- campaign folder


def test_writable_dir_creates_a_missing_folder(tmp_path):
    target = tmp_path / "a" / "b"
    writable_dir(target)
    assert target.is_dir()
    assert list(target.iterdir()) == []


def test_writable_dir_under_a_regular_file_is_one_sentence(tmp_path):
    blocker = tmp_path / "results.txt"
    blocker.write_text("a file, not a folder")
    target = blocker / "campaign"
    with pytest.raises(LedgerError) as info:
        writable_dir(target)
    message = str(info.value)
    assert message.startswith(f"{target}: the campaign folder cannot be written")
    assert "Not a directory" in message
    assert "--dir" in message
    assert "\n" not in message
    assert blocker.read_text() == "a file, not a folder"


# --------------------------------------------------------------------------- schema upgrade

_V2_INDEXES = {"designs_by_status", "designs_by_stage", "designs_by_score", "attempts_by_state"}


def _as_version_1(path: Path) -> None:
    """Make the ledger look like one written by schema version 1: without the per-event indexes."""
    with _raw(path) as conn:
        for name in _V2_INDEXES:
            conn.execute(f"DROP INDEX {name}")
        conn.execute("UPDATE meta SET value = '1' WHERE key = 'schema_version'")
    conn.close()


def _indexes(path: Path) -> set[str]:
    with _raw(path) as conn:
        names = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'index'")}
    conn.close()
    return names


def test_a_version_1_ledger_is_upgraded_in_place_when_opened_for_writing(path, ledger):
    design = _design(ledger)
    ledger.close()
    _as_version_1(path)
    assert not _V2_INDEXES & _indexes(path)
    with Ledger.open(path) as upgraded:
        assert upgraded.meta()["schema_version"] == str(SCHEMA_VERSION)
        assert [c.design_id for c in upgraded.cases()] == [design] * len(CONDITIONS)
        assert [e["kind"] for e in upgraded.events()][-1] == "ledger-upgraded"
    assert _indexes(path) >= _V2_INDEXES


def test_a_version_1_ledger_is_refused_read_only_with_the_command_that_upgrades_it(path, ledger):
    ledger.close()
    _as_version_1(path)
    with pytest.raises(LedgerError) as info:
        Ledger.open(path, readonly=True)
    message = str(info.value)
    assert f"sortie resume {path.parent}" in message
    assert "\n" not in message


def test_an_upgrade_that_fails_part_way_leaves_the_ledger_as_it_was(path, ledger, monkeypatch):
    import sortie.ledger as ledger_module

    ledger.close()
    _as_version_1(path)
    steps = (*ledger_module._MIGRATIONS[1], "CREATE INDEX broken ON no_such_table(x)")
    monkeypatch.setitem(ledger_module._MIGRATIONS, 1, steps)
    with pytest.raises(sqlite3.OperationalError):
        Ledger.open(path)
    assert not _V2_INDEXES & _indexes(path)
    with _raw(path) as conn:
        assert conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0] == "1"
    conn.close()


# --------------------------------------------------------------------------- aggregate reads

def test_data_version_changes_when_another_connection_commits_and_only_then(path, ledger):
    with Ledger.open(path, readonly=True) as reader:
        before = reader.data_version()
        assert reader.data_version() == before
        _design(ledger)
        after = reader.data_version()
        assert after != before
        assert reader.data_version() == after


def test_counts_and_tallies_equal_counting_the_rows(path, ledger):
    ids = [_design(ledger) for _ in range(4)]
    cases = ledger.cases()
    for c in cases[:5]:
        ledger.mark_submitting(c.id, path.parent / c.name)
    ledger.finish_case(cases[0].id, quantities={"lift": 0.1})
    ledger.finish_case(cases[1].id, failure_class="solver", reason="diverged")
    ledger.retry_case(cases[2].id, failure_class="transient", reason="node lost")
    ledger.mark_submitting(cases[2].id, path.parent / cases[2].name)
    ledger.finish_case(cases[2].id, failure_class="transient", reason="node lost again")
    ledger.mark_running(cases[3].id, "42")
    ledger.finish_design(ids[1], status="failed")
    rows = ledger.cases()
    assert ledger.count_cases() == {s: sum(c.state == s for c in rows) for s in ("planned", "submitting", "running",
                                                                                 "done", "failed")}
    assert ledger.count_designs() == 4 and ledger.count_designs(status="failed") == 1
    assert ledger.count_designs(stage="initial", status="pending") == 3
    assert ledger.tally("cases", "failure_class", where="state = 'failed'") == {"solver": 1, "transient": 1}
    assert ledger.case_ids(states=("planned",)) == [c.id for c in rows if c.state == "planned"]
    assert ledger.case_ids(states=("failed",), retried=True) == [c.id for c in rows if c.state == "failed"]
    stats = ledger.attempt_stats()
    attempts = ledger.attempts()
    assert stats["attempts_total"] == len(attempts) == 6
    assert stats["retries"] == 1  # the first attempt of the case tried twice
    assert stats["attempt_failures"] == {"solver": {"attempts": 1, "reasons": ["diverged"]},
                                         "transient": {"attempts": 2, "reasons": ["node lost", "node lost again"]}}
    assert ledger.unscored_design_ids() == [ids[0]]  # its three cases ended (done, failed, failed)


def test_best_design_is_the_best_feasible_else_the_least_violating(path, ledger):
    from sortie.status import best_design

    ids = [_design(ledger) for _ in range(4)]
    ledger.finish_design(ids[0], status="done", objective=3.0, constraints={"c": 0.5}, feasible=False)
    ledger.finish_design(ids[1], status="done", objective=5.0, constraints={"c": 0.2}, feasible=False)
    for sense in ("minimize", "maximize"):
        assert ledger.best_design(sense).id == best_design(ledger.designs(), sense).id == ids[1]
    ledger.finish_design(ids[2], status="done", objective=4.0, constraints={"c": -0.1}, feasible=True)
    ledger.finish_design(ids[3], status="done", objective=2.0, constraints={"c": -0.3}, feasible=True)
    for sense, expected in (("minimize", ids[3]), ("maximize", ids[2])):
        assert ledger.best_design(sense).id == best_design(ledger.designs(), sense).id == expected


def test_resume_upgrades_the_ledger_before_anything_reads_it(path, ledger):
    """``sortie resume`` calls campaign.upgrade under its lock, so its read-only config load then works."""
    from sortie import campaign

    ledger.close()
    _as_version_1(path)
    campaign.upgrade(path.parent)
    with Ledger.open(path, readonly=True) as reader:
        assert reader.meta()["schema_version"] == str(SCHEMA_VERSION)
