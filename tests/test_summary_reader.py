"""The progress watcher reads the ledger again only when another connection has committed to it."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

import sortie.progress as progress
from sortie.ledger import Ledger, ledger_path


def test_an_unchanged_ledger_is_not_read_again(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    reads: list[int] = []

    states: list[bool] = []

    def counting_summary(ledger: Ledger, config: Any) -> dict[str, Any]:
        reads.append(ledger.count_designs())
        return {"designs_total": reads[-1], "designs_planned": 1, "designs_pending": 0, "state": "running"}

    def fake_state(directory: Path, ledger: Ledger, *, plan_done: bool) -> str:
        states.append(plan_done)
        return "running"

    monkeypatch.setattr(progress, "summary", counting_summary)
    # the state is asked again on every read (an orchestrator can die without writing), the rest is not
    monkeypatch.setattr(progress, "campaign_state", fake_state)
    reader = progress.SummaryReader(tmp_path, config=None)  # type: ignore[arg-type]
    assert reader.read() is None  # no ledger yet: the watcher waits for one
    with Ledger.create(ledger_path(tmp_path), {"campaign": "sled-test"}) as writer:
        assert reader.read()["designs_total"] == 0
        for _ in range(5):
            assert reader.read()["designs_total"] == 0
        assert reads == [0]
        assert states == [False] * 5
        writer.add_design(stage="baseline", reason="baseline", values={"ramp_angle": 8.0}, unit=[0.5],
                          conditions=[{"mach": 0.9}])
        assert reader.read()["designs_total"] == 1
        assert reader.read()["designs_total"] == 1
    assert reads == [0, 1]
    assert states[-1] is True  # one design of one planned, none pending: the plan is done
    reader.close()
