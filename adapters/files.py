"""What the adapters that run a solver in a case folder share: finding the program, checking the
template (and rendering it for the baseline before a run), a case whose folder could not be
rendered, and reading quantities and error lines from the folder after the solver ends.

The command and Slurm adapters differ only in how the solver is started and watched; what they
read back must be the same, so a campaign can move from a workstation to a cluster unchanged.
"""

from __future__ import annotations

import os
import shutil
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

from sortie.adapters.base import CaseOutcome, CaseSpec, JobHandle, check_quantities
from sortie.adapters.template import TemplateError, template_problems
from sortie.config import QuantitySpec
from sortie.quantities import QuantityNotFound, read_quantity

STDOUT = "solver.stdout"
STDERR = "solver.stderr"


def which_program(program: str, folder: Path) -> str | None:
    """Find ``program``: a path relative to the case folder (a run script shipped in the template),
    else on PATH, else beside this Python (a venv's console scripts)."""
    if os.sep in program:
        path = Path(folder) / program
        return str(path) if os.access(path, os.X_OK) else None
    return shutil.which(program) or shutil.which(program, path=str(Path(sys.executable).parent))


def last_line(path: Path) -> str:
    """`` (<last non-empty line>)`` of a log file, to quote in a failure reason; empty if none."""
    try:
        lines = [ln.strip() for ln in path.read_text(errors="replace").splitlines() if ln.strip()]
    except OSError:
        return ""
    return f" ({lines[-1][:200]})" if lines else ""


def folder_problems(adapter: str, template: str, quantities: Mapping[str, QuantitySpec], base_dir: Path) -> list[str]:
    """Set-up problems of a template-folder adapter: the template is missing, or a quantity has no file rule."""
    problems = []
    folder = (base_dir / template).resolve()
    if not folder.is_dir():
        problems.append(f"solver.template: {folder} is not a folder; give the folder holding the solver's input files (relative to the config file)")
    for name, spec in quantities.items():
        if spec.file is None:
            problems.append(f"quantities.{name}: the {adapter} adapter reads quantities from files; give 'file' and one of pattern, key, column, json_path")
    return problems


def case_label(case: CaseSpec) -> str:
    """Which case a check rendered: ``baseline design at mach=0.9``."""
    where = ", ".join(f"{k}={v:g}" if isinstance(v, float) else f"{k}={v}" for k, v in case.condition.items())
    return f"baseline design at {where}" if where else "baseline design"


def rendering_problems(template: Path, render: Sequence[str] | None, cases: Sequence[CaseSpec],
                       render_other: Callable[[CaseSpec], object]) -> list[str]:
    """Render the template folder and ``render_other`` (command, batch script) for each case, before a run.

    Each problem is one line, reported once (for the first case it happens in).
    """
    problems = template_problems(template, render, [(case_label(case), case.context()) for case in cases])
    seen: set[str] = set()
    for case in cases:
        try:
            render_other(case)
        except TemplateError as err:
            if str(err) not in seen:
                seen.add(str(err))
                problems.append(f"{err} ({case_label(case)})")
    return problems


def unrendered(case: CaseSpec, err: TemplateError) -> JobHandle:
    """The handle of a case whose input could not be rendered: nothing started, its poll says FAILED.

    A template that fails only for some designs (an expression that divides by a parameter, a
    value refused in shell code) fails that case with a reason, like a solver that fails on it;
    the run goes on. The job id is empty, so a resumed run finds no job and renders it again.
    """
    return JobHandle(case.case_id, "", time.time(), extra={"unrendered": str(err)})


def unrendered_outcome(handle: JobHandle) -> CaseOutcome | None:
    """The failed outcome of an :func:`unrendered` handle; None for a handle of a started job."""
    reason = handle.extra.get("unrendered")
    return None if reason is None else CaseOutcome.failed("solver", f"the case's input could not be rendered: {reason}")


def read_case_quantities(workdir: Path, quantities: Mapping[str, QuantitySpec]) -> CaseOutcome:
    """Every quantity from the case folder after a clean end, or an ``output`` failure naming the file."""
    values: dict[str, float] = {}
    for name, spec in quantities.items():
        try:
            raw = read_quantity(workdir, name, spec)
        except QuantityNotFound as err:
            return CaseOutcome.failed("output", f"{err}; see {workdir / STDOUT}")
        outcome = check_quantities({name: raw}, [name], f"output file {workdir / str(spec.file)}")
        if not outcome.ok:
            return outcome
        values.update(outcome.quantities)
    return CaseOutcome(quantities=values)
