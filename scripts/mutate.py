"""Apply named one-line mutations to a scratch copy of the project and see whether the fast tests catch each.

A tool, not a test: 25 mutations take about 9 minutes on a busy 2-core machine, so CI does not run
it (``tests/test_mutate_script.py`` only checks that every snippet below still matches the code
exactly once).

    .venv/bin/python scripts/mutate.py                      # every mutation, a table at the end
    .venv/bin/python scripts/mutate.py --only goal-mean-median --json out.json
    .venv/bin/python scripts/mutate.py --list

Why a scratch copy rather than editing the worktree in place: a mutation left behind by a killed
run (kill -9, a closed terminal) would silently become part of the next commit, and tests run by
hand in the worktree meanwhile would see mutated code. The copy is built once (without ``.venv``,
``.git`` and caches), each mutation is written into it and undone there, and the worktree is
never touched.

How the copy imports itself: the package is installed in editable mode with setuptools'
``package-dir`` mapping (``sortie.flows`` = ``flows/``, ``sortie.adapters`` = ``adapters/``,
``sortie.mock_solver`` = ``mock_solver/``), and the editable finder points at the worktree. In the
copy, ``sortie/flows``, ``sortie/adapters`` and ``sortie/mock_solver`` are made symlinks to the
copied top-level folders, and pytest runs there with ``PYTHONPATH`` set to the copy. The path
finder comes before the editable finder on ``sys.meta_path``, so ``sortie`` and its mapped
subpackages (also in solver subprocesses) are the copy's. Before any mutation the script checks
that, and runs each mutation's test selection on the unmutated copy: a mutation only counts as
caught if the same tests passed without it (otherwise it is reported ``error``). Bytecode is never written (``PYTHONDONTWRITEBYTECODE``), so a
mutation of the same length within the same second cannot be hidden by a stale ``.pyc``.

A snippet that no longer occurs is reported ``stale`` (and one that occurs more than once
``ambiguous``) instead of being skipped, so the list stays honest after a refactor: update the
snippet to the new code rather than deleting the mutation.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
MAPPED = ("flows", "adapters", "mock_solver")  # sortie.<name> lives in the top-level folder <name>
IGNORED = shutil.ignore_patterns(".venv", ".git", "__pycache__", ".pytest_cache", ".ruff_cache", "*.pyc", ".tools",
                                 "*.egg-info", "build", "dist")


@dataclass(frozen=True)
class Mutation:
    """One change to one line: ``original`` must occur exactly once in ``file``.

    ``tests`` are the test files (relative to the project) that should catch it, run with
    ``-m "not slow" -x``; ``keyword`` narrows them with ``-k`` when given.
    """

    name: str
    file: str
    original: str
    replacement: str
    tests: tuple[str, ...]
    keyword: str | None = None
    why: str = ""


MUTATIONS: tuple[Mutation, ...] = (
    # --- infill ---------------------------------------------------------------------------------
    Mutation("infill-no-believer", "sortie/infill.py",
             "objective = _believe(objective, history.pending)", "objective = objective",
             ("tests/test_infill.py",), why="pending designs no longer lower the std (Kriging believer removed)"),
    Mutation("infill-incumbent-over-infeasible", "sortie/infill.py",
             "best = _incumbent(history, _feasible_rows(history), models.objective",
             "best = _incumbent(history, history.usable(), models.objective",
             ("tests/test_infill.py",), why="EI's f_min taken over infeasible designs too"),
    Mutation("infill-optimistic-imputation", "sortie/infill.py",
             "objective = objective.condition(history.X[~ok], mu + sd)",
             "objective = objective.condition(history.X[~ok], mu - sd)",
             ("tests/test_infill.py", "tests/test_surrogate.py"), why="failed designs imputed optimistically"),
    Mutation("infill-local-box-too-wide", "sortie/infill.py",
             "upper = np.clip(centre + settings.local_radius, 0.0, 1.0)",
             "upper = np.clip(centre + 3 * settings.local_radius, 0.0, 1.0)",
             ("tests/test_infill.py",), why="the local step searches beyond its box"),
    Mutation("infill-refine-the-wrong-design", "sortie/infill.py",
             "acq.best_row is not None and acq.best_row == len(history.X) - 1:",
             "acq.best_row is not None and acq.best_row == len(history.X) - 2:",
             ("tests/test_infill.py",), why="a local refinement follows the design before the one that improved the best"),
    # --- acquisition ----------------------------------------------------------------------------
    Mutation("acquisition-ei-half-exploration", "sortie/acquisition.py",
             "gap * ndtr(z) + std * _normal_pdf(z)", "gap * ndtr(z) + 0.5 * std * _normal_pdf(z)",
             ("tests/test_acquisition.py",), why="the σφ(z) term of the EI closed form halved"),
    Mutation("acquisition-pf-sign", "sortie/acquisition.py",
             "pf = ndtr(-mean / np.where(positive, std, 1.0))", "pf = ndtr(mean / np.where(positive, std, 1.0))",
             ("tests/test_acquisition.py",)),
    Mutation("acquisition-maximize-keeps-worse-polish", "sortie/acquisition.py",
             "if values[i] >= best[1]:", "if values[i] >= best[1] - 1e9:", ("tests/test_acquisition.py",),
             why="a polished point replaces a better raw candidate"),
    # --- goal -----------------------------------------------------------------------------------
    Mutation("goal-mean-median", "sortie/goal.py", '"mean": np.mean,', '"mean": np.median,', ("tests/test_goal.py",)),
    Mutation("goal-margin-best-not-worst", "sortie/goal.py",
             "return float(np.max(diff))", "return float(np.min(diff))", ("tests/test_goal.py",)),
    Mutation("goal-subtract-adds", "sortie/goal.py", "ast.Sub: np.subtract,", "ast.Sub: np.add,", ("tests/test_goal.py",)),
    Mutation("goal-zero-margin-infeasible", "sortie/goal.py",
             "feasible = all(m <= 0.0 for m in margins.values())", "feasible = all(m < 0.0 for m in margins.values())",
             ("tests/test_goal.py",), why="a design exactly on a constraint boundary counted infeasible"),
    Mutation("goal-attribute-access-allowed", "sortie/goal.py",
             "if not (isinstance(node.value, ast.Name) and node.value.id == BASELINE):",
             "if not isinstance(node.value, ast.Name):", ("tests/test_goal.py",),
             why="any name.attribute is read as a baseline quantity instead of being refused"),
    # --- ledger ---------------------------------------------------------------------------------
    Mutation("ledger-attempt-number-not-incremented", "sortie/ledger.py",
             'number = int(row["attempts"]) + 1', 'number = int(row["attempts"])', ("tests/test_ledger.py",)),
    Mutation("ledger-retry-leaves-case-failed", "sortie/ledger.py",
             "UPDATE cases SET state = 'planned', job_id = NULL, ended_at = ?, failure_class = ?,",
             "UPDATE cases SET state = 'failed', job_id = NULL, ended_at = ?, failure_class = ?,",
             ("tests/test_ledger.py", "tests/test_ledger_retry.py"), why="a retried case is never due again"),
    Mutation("ledger-consistency-blind-to-missing-quantities", "sortie/ledger.py",
             "WHERE state = 'done' AND quantities_json IS NULL", "WHERE state = 'done' AND quantities_json = 'x'",
             ("tests/test_ledger.py",)),
    # --- the notebook API and the export table -------------------------------------------------
    Mutation("api-case-times-swapped", "sortie/api.py",
             '"started_at": c.started_at, "ended_at": c.ended_at', '"started_at": c.ended_at, "ended_at": c.started_at',
             ("tests/test_api.py",)),
    Mutation("export-feasible-unknown-becomes-false", "sortie/status.py",
             'row["feasible"] = d.feasible', 'row["feasible"] = bool(d.feasible)', ("tests/test_api.py",),
             why="a design not scored yet shows as infeasible"),
    # --- adapters -------------------------------------------------------------------------------
    Mutation("command-nonzero-exit-is-done", "adapters/command.py",
             "return JobState.DONE if code == 0 else JobState.FAILED", "return JobState.DONE",
             ("tests/adapters/test_command.py",)),
    Mutation("command-timeout-classed-as-solver", "adapters/command.py",
             'return CaseOutcome.failed("timeout", f"the solver ran longer',
             'return CaseOutcome.failed("solver", f"the solver ran longer', ("tests/adapters/test_command.py",)),
    Mutation("python-bad-return-classed-as-solver", "adapters/python_fn.py",
             'outcome = CaseOutcome.failed("output", f"{self.options.function} returned',
             'outcome = CaseOutcome.failed("solver", f"{self.options.function} returned',
             ("tests/adapters/test_python_fn.py",)),
    # --- sampling and screening -----------------------------------------------------------------
    Mutation("sampling-ccd-alpha-square-root", "sortie/sampling.py",
             "return float(n_factorial) ** 0.25", "return float(n_factorial) ** 0.5", ("tests/test_sampling.py",)),
    Mutation("sampling-lhs-unscrambled", "sortie/sampling.py",
             "engine = qmc.LatinHypercube(d=n_dims, scramble=True,", "engine = qmc.LatinHypercube(d=n_dims, scramble=False,",
             ("tests/test_sampling.py",), why="points at the stratum centres instead of random within them"),
    Mutation("screening-morris-delta", "sortie/screening.py",
             "return levels / (2.0 * (levels - 1))", "return 1.0 / (levels - 1)", ("tests/test_screening.py",)),
    Mutation("screening-mu-star-signed", "sortie/screening.py",
             "mean_abs = np.abs(filled).sum(axis=axis) / count", "mean_abs = filled.sum(axis=axis) / count",
             ("tests/test_screening.py",)),
)


@dataclass
class Result:
    name: str
    file: str
    status: str  # caught, survived, stale, ambiguous, error
    seconds: float
    detail: str = ""


def occurrences(mutation: Mutation, root: Path = ROOT) -> int:
    """How many times the mutation's snippet occurs in its file under ``root`` (0 if the file is gone)."""
    path = root / mutation.file
    return path.read_text(encoding="utf-8").count(mutation.original) if path.is_file() else 0


def make_scratch(destination: Path) -> Path:
    """Copy the project to ``destination/project`` with the package-dir folders linked under ``sortie/``."""
    copy = destination / "project"
    shutil.copytree(ROOT, copy, ignore=IGNORED, symlinks=True)
    for name in MAPPED:
        link = copy / "sortie" / name
        if not link.exists():
            link.symlink_to(Path("..") / name, target_is_directory=True)
    return copy


def _env(copy: Path) -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(copy), *filter(None, [env.get("PYTHONPATH")])])
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    return env


def check_imports(copy: Path) -> None:
    """Fail loudly unless the copy, not the worktree, provides ``sortie`` and its mapped subpackages."""
    probe = ("import importlib, sys\n"
             f"names = ['sortie', *('sortie.' + n for n in {MAPPED!r})]\n"
             "print('\\n'.join(importlib.import_module(n).__file__ for n in names))\n")
    out = subprocess.run([sys.executable, "-c", probe], cwd=copy, env=_env(copy), capture_output=True, text=True,
                         check=True).stdout.split()
    outside = [f for f in out if not Path(f).resolve().is_relative_to(copy.resolve())]
    if outside:
        raise SystemExit(f"the scratch copy imports {', '.join(outside)} from outside itself; mutations would not be tested")


def run_tests(copy: Path, tests: tuple[str, ...], keyword: str | None) -> tuple[bool, str]:
    """Run the fast tests in the copy; True if they all pass, and the last lines of the output."""
    command = [sys.executable, "-m", "pytest", "-q", "-x", "-m", "not slow", "-p", "no:cacheprovider",
               "-o", "addopts=", *tests]
    if keyword:
        command += ["-k", keyword]
    proc = subprocess.run(command, cwd=copy, env=_env(copy), capture_output=True, text=True)
    tail = "\n".join((proc.stdout + proc.stderr).strip().splitlines()[-3:])
    if proc.returncode not in (0, 1):  # 2-5: interrupted, internal error, usage, nothing collected
        raise RuntimeError(f"pytest exited {proc.returncode}: {tail}")
    return proc.returncode == 0, tail


def failing_selections(copy: Path, mutations: list[Mutation]) -> set[tuple[tuple[str, ...], str | None]]:
    """The test selections that fail on the unmutated copy (run exactly as for a mutation).

    Each selection is run alone, not all together: a test can depend on what an earlier file
    imported, and a mutation counts as caught only if the very same run passed without it.
    """
    failing = set()
    for selection in dict.fromkeys((m.tests, m.keyword) for m in mutations):
        passed, tail = run_tests(copy, *selection)
        if not passed:
            print(f"unmutated copy fails {' '.join(selection[0])}: {tail}", file=sys.stderr)
            failing.add(selection)
    return failing


def run_mutation(copy: Path, mutation: Mutation) -> Result:
    """Apply one mutation in the copy, run its tests, undo it (always)."""
    count = occurrences(mutation, copy)
    if count != 1:
        status = "stale" if count == 0 else "ambiguous"
        return Result(mutation.name, mutation.file, status, 0.0, f"snippet found {count} times: {mutation.original!r}")
    path = copy / mutation.file
    source = path.read_text(encoding="utf-8")
    start = time.perf_counter()
    try:
        path.write_text(source.replace(mutation.original, mutation.replacement), encoding="utf-8")
        passed, tail = run_tests(copy, mutation.tests, mutation.keyword)
        status = "survived" if passed else "caught"
    except RuntimeError as exc:
        status, tail = "error", str(exc)
    finally:
        path.write_text(source, encoding="utf-8")
    return Result(mutation.name, mutation.file, status, time.perf_counter() - start, tail.splitlines()[-1] if tail else "")


def print_table(results: list[Result]) -> None:
    widths = [max(len(h), *(len(getattr(r, a)) for r in results)) for h, a in (("mutation", "name"), ("file", "file"))]
    print(f"{'mutation':<{widths[0]}}  {'file':<{widths[1]}}  {'result':<9}  seconds")
    for r in results:
        print(f"{r.name:<{widths[0]}}  {r.file:<{widths[1]}}  {r.status:<9}  {r.seconds:7.1f}")
    counts = {s: sum(r.status == s for r in results) for s in ("caught", "survived", "stale", "ambiguous", "error")}
    print(", ".join(f"{n} {s}" for s, n in counts.items() if n) or "no mutations run")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--only", action="append", default=[], metavar="NAME", help="run only this mutation (repeatable)")
    parser.add_argument("--json", type=Path, metavar="PATH", help="write the results here as JSON")
    parser.add_argument("--list", action="store_true", help="list the mutations and whether each snippet matches")
    parser.add_argument("--no-baseline", action="store_true", help="skip running the tests on the unmutated copy first")
    parser.add_argument("--keep", action="store_true", help="keep the scratch copy and print where it is")
    args = parser.parse_args(argv)
    chosen = [m for m in MUTATIONS if not args.only or m.name in args.only]
    unknown = set(args.only) - {m.name for m in MUTATIONS}
    if unknown:
        parser.error(f"unknown mutation(s) {', '.join(sorted(unknown))}; --list shows the names")
    if args.list:
        for m in chosen:
            print(f"{m.name:<48} {m.file:<24} matches {occurrences(m)}x  {m.why}")
        return 0
    scratch = Path(tempfile.mkdtemp(prefix="sortie-mutate-"))
    try:
        copy = make_scratch(scratch)
        check_imports(copy)
        broken = set() if args.no_baseline else failing_selections(copy, chosen)
        results = []
        for m in chosen:
            if (m.tests, m.keyword) in broken:
                results.append(Result(m.name, m.file, "error", 0.0, "its tests fail on the unmutated copy"))
            else:
                results.append(run_mutation(copy, m))
            print(f"{m.name}: {results[-1].status} ({results[-1].seconds:.1f} s)", file=sys.stderr, flush=True)
    finally:
        if args.keep:
            print(f"scratch copy kept in {scratch}", file=sys.stderr)
        else:
            shutil.rmtree(scratch, ignore_errors=True)
    print_table(results)
    if args.json:
        args.json.write_text(json.dumps([asdict(r) for r in results], indent=2) + "\n", encoding="utf-8")
    return 0 if all(r.status == "caught" for r in results) else 1


if __name__ == "__main__":
    raise SystemExit(main())
