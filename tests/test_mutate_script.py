"""The mutation script's list (scripts/mutate.py) stays in step with the code it mutates.

The script itself takes minutes and is not run here; this only checks that every mutation is
well formed and that its snippet still occurs exactly once, so a refactor that moves the code
shows up as a failing test instead of a mutation the script would report as stale.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _load_script() -> Any:
    spec = importlib.util.spec_from_file_location("sortie_mutate_script", ROOT / "scripts" / "mutate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look the module up while the class is built
    spec.loader.exec_module(module)
    return module


mutate = _load_script()


def test_the_list_is_well_formed_and_wide_enough() -> None:
    names = [m.name for m in mutate.MUTATIONS]
    assert len(names) == len(set(names)) >= 15
    for m in mutate.MUTATIONS:
        assert m.original != m.replacement and "\n" not in m.original + m.replacement, m.name
        assert m.tests and all((ROOT / t).is_file() for t in m.tests), m.name
    areas = {m.file for m in mutate.MUTATIONS}
    assert {"sortie/infill.py", "sortie/acquisition.py", "sortie/goal.py", "sortie/ledger.py",
            "sortie/sampling.py"} <= areas and any(f.startswith("adapters/") for f in areas)


@pytest.mark.parametrize("mutation", mutate.MUTATIONS, ids=lambda m: m.name)
def test_every_snippet_matches_the_code_exactly_once(mutation: Any) -> None:
    assert mutate.occurrences(mutation) == 1, f"update the snippet of {mutation.name!r} in scripts/mutate.py"


def test_a_snippet_that_is_gone_is_reported_stale_not_skipped(tmp_path: Path) -> None:
    (tmp_path / "sortie").mkdir()
    (tmp_path / "sortie" / "goal.py").write_text("nothing to mutate here\n")
    gone = mutate.Mutation("gone", "sortie/goal.py", "np.mean", "np.median", ("tests/test_goal.py",))
    result = mutate.run_mutation(tmp_path, gone)
    assert result.status == "stale" and "found 0 times" in result.detail
