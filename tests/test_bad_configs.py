"""The broken-config corpus through the real ``sortie check``: exit 2, one short line, no traceback.

Each config in ``tests/bad_configs`` (and each generated one: a 50 MB file, 100,000 levels of
nesting, an alias bomb, a 900 kB value, a folder, a FIFO, a device, ...) must end with exit code
2, exactly one ``error:`` line on stderr of at most 200 characters that starts with the key the
file's ``# error:`` comment names, nothing on stdout, and no traceback. The time and memory
limits below are generous hard limits that catch a hang or a blow-up (the issue saw hangs and
gigabytes); the measured figures per case come from ``python -m benchmarks.bad_configs``.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest

from tests.bad_config_corpus import CORPUS, Case, Outcome, generated_cases, run_check, static_cases

MAX_LINE = 200
HANG_S = 60.0  # a hard limit for hangs only; a quiet machine takes well under 2 s (see the benchmark)
MAX_RSS_MB = 300.0
SECTIONS = ("campaign", "parameter", "choices", "baseline", "condition", "solver", "quantity", "goal", "constraint",
            "plan", "budget", "slots", "retries", "yaml")
STATIC = static_cases()


def check_outcome(case: Case, outcome: Outcome) -> list[str]:
    """Everything wrong with one outcome, as readable strings (empty when the case passed)."""
    wrong = []
    if outcome.killed:
        return [f"{case.name}: still running after {HANG_S:.0f} s"]
    text = outcome.stdout + outcome.stderr
    if "Traceback" in text:
        wrong.append(f"{case.name}: printed a traceback: {outcome.stderr[-400:]!r}")
    if outcome.returncode != 2:
        wrong.append(f"{case.name}: exit code {outcome.returncode}, expected 2")
    if outcome.stdout:
        wrong.append(f"{case.name}: wrote to stdout: {outcome.stdout[:200]!r}")
    lines = outcome.stderr.splitlines()
    if len(lines) != 1:
        wrong.append(f"{case.name}: {len(lines)} lines on stderr, expected 1: {outcome.stderr[:400]!r}")
    elif len(lines[0]) > MAX_LINE:
        wrong.append(f"{case.name}: a line of {len(lines[0])} characters: {lines[0][:300]!r}")
    else:
        expected = "error: " + case.key.format(file=case.path)
        if not lines[0].startswith(expected):
            wrong.append(f"{case.name}: {lines[0]!r} does not start with {expected!r}")
    if outcome.max_rss_mb > MAX_RSS_MB:
        wrong.append(f"{case.name}: peak RSS {outcome.max_rss_mb:.0f} MB over {MAX_RSS_MB:.0f} MB")
    return wrong


def _run_all(cases: list[Case]) -> dict[str, Outcome]:
    with ThreadPoolExecutor(max_workers=2) as pool:  # two cores, shared: more workers only queue
        return dict(zip((c.name for c in cases), pool.map(lambda c: run_check(c, kill_after_s=HANG_S), cases),
                        strict=True))


@pytest.fixture(scope="module")
def static_outcomes() -> dict[str, Outcome]:
    return _run_all(STATIC)


def test_corpus_has_sixty_cases_across_every_section() -> None:
    names = [case.name for case in STATIC]
    assert len(names) >= 60, len(names)
    for section in SECTIONS:
        assert sum(section in name for name in names) >= 2, f"fewer than two cases for {section}"
    texts = [(CORPUS / case.path).read_text(encoding="utf-8").split("\n", 2)[2] for case in STATIC]
    assert len(set(texts)) == len(texts), "two corpus files break the config the same way"


def test_generated_cases_are_made_at_run_time(tmp_path: Path) -> None:
    cases = generated_cases(tmp_path)
    sizes = {case.name: (tmp_path / case.path).stat().st_size for case in cases if (tmp_path / case.path).is_file()}
    assert sizes["gen-huge-file-50mb"] > 50 << 20
    assert sizes["gen-value-of-900kb"] > 900_000
    assert not any(path.stat().st_size > 1 << 20 for path in CORPUS.rglob("*") if path.is_file()), \
        "big cases are generated, never committed"


@pytest.mark.slow
@pytest.mark.parametrize("case", STATIC, ids=[case.name for case in STATIC])
def test_sortie_check_refuses_each_corpus_config_in_one_line(case: Case, static_outcomes: dict[str, Outcome]) -> None:
    assert check_outcome(case, static_outcomes[case.name]) == []


@pytest.mark.slow
def test_sortie_check_refuses_huge_deep_and_unreadable_inputs_in_one_line(tmp_path: Path) -> None:
    cases = generated_cases(tmp_path)
    outcomes = _run_all(cases)
    wrong = [problem for case in cases for problem in check_outcome(case, outcomes[case.name])]
    assert wrong == []
