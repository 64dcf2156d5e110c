"""What the adapters that run a solver in a case folder share: finding the program, checking the
template, and reading quantities and error lines from the folder after the solver ends.

The command and Slurm adapters differ only in how the solver is started and watched; what they
read back must be the same, so a campaign can move from a workstation to a cluster unchanged.
"""

from __future__ import annotations

import os
import shutil
import sys
from collections.abc import Mapping
from pathlib import Path

from sortie.adapters.base import CaseOutcome, check_quantities
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
