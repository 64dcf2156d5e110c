"""The progress watcher reads the ledger again only when another connection has committed to it."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

import sortie.progress as progress
from sortie.ledger import Ledger, ledger_path


def test_an_unchanged_ledger_is_not_read_again(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    reads: list[int] = []

    def counting_summary(ledger: Ledger, config: Any) -> dict[str, Any]:
        reads.append(ledger.count_designs())
        return {"designs_total": reads[-1]}

    monkeypatch.setattr(progress, "summary", counting_summary)
    reader = progress.SummaryReader(tmp_path, config=None)  # type: ignore[arg-type]
    assert reader.read() is None  # no ledger yet: the watcher waits for one
    with Ledger.create(ledger_path(tmp_path), {"campaign": "sled-test"}) as writer:
        assert reader.read() == {"designs_total": 0}
        for _ in range(5):
            assert reader.read() == {"designs_total": 0}
        assert reads == [0]
        writer.add_design(stage="baseline", reason="baseline", values={"ramp_angle": 8.0}, unit=[0.5],
                          conditions=[{"mach": 0.9}])
        assert reader.read() == {"designs_total": 1}
        assert reader.read() == {"designs_total": 1}
    assert reads == [0, 1]
    reader.close()
