"""Run a case as an in-process Python function: cheap models, test functions, notebooks.

The function is named ``package.module:function`` or ``path/to/file.py:function`` (relative to
the config file) and is called as ``function(parameters, condition)`` with two dicts; it returns
a mapping of quantity names to numbers. An exception in the function is a *solver* failure (the
traceback is saved in the case folder), not a crash of the campaign.

A ``file.py`` is imported as a script run from its own folder would see the world: that folder
is put first on ``sys.path``, so the file can import a module that sits beside it. Anything the
import raises, ``SystemExit`` included, is one config line, never a silent exit or a traceback.
"""

from __future__ import annotations

import importlib
import importlib.util
import json
import sys
import time
import traceback
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ConfigDict

from sortie.adapters.base import CaseOutcome, CaseSpec, JobHandle, JobState, check_quantities
from sortie.config import QuantitySpec
from sortie.errors import AdapterError
from sortie.shown import clip, shown


class PythonOptions(BaseModel):
    """Config keys of ``solver:`` for ``adapter: python``."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    adapter: str
    function: str


class PythonAdapter:
    """Calls a Python function per case; see the module docstring."""

    Options = PythonOptions
    poll_interval_s = 0.0
    detached = False

    def __init__(self, options: PythonOptions, quantities: Mapping[str, QuantitySpec], base_dir: Path) -> None:
        self.options = options
        self.quantities = dict(quantities)
        self.base_dir = Path(base_dir)
        self._function = load_function(options.function, self.base_dir)
        self._outcomes: dict[int, CaseOutcome] = {}

    @classmethod
    def check(cls, options: PythonOptions, quantities: Mapping[str, QuantitySpec], base_dir: Path) -> list[str]:
        problems = []
        try:
            load_function(options.function, base_dir)
        except AdapterError as err:
            problems.append(str(err))
        for name, spec in quantities.items():
            if spec.file is not None:
                problems.append(f"quantities.{name}: the python adapter takes quantities from the function's return value; remove 'file' and its rule")
        return problems

    def start(self, case: CaseSpec) -> JobHandle:
        workdir = Path(case.workdir)
        workdir.mkdir(parents=True, exist_ok=True)
        try:
            returned = self._function(dict(case.values), dict(case.condition))
        except (Exception, SystemExit) as exc:  # the user's model failing is data, recorded with its traceback
            (workdir / "error.txt").write_text(traceback.format_exc())
            outcome = CaseOutcome.failed("solver", f"{self.options.function} raised {type(exc).__name__}: {exc}; see {workdir / 'error.txt'}")
        else:
            if not isinstance(returned, Mapping):
                outcome = CaseOutcome.failed("output", f"{self.options.function} returned {type(returned).__name__}; it must return a mapping of quantity names to numbers")
            else:
                outcome = check_quantities(returned, list(self.quantities), self.options.function)
                (workdir / "result.json").write_text(json.dumps({k: _plain(v) for k, v in returned.items()}, indent=1))
        self._outcomes[case.case_id] = outcome
        return JobHandle(case.case_id, f"py-{case.case_id}", time.time())

    def poll(self, handle: JobHandle) -> JobState:
        outcome = self._outcomes.get(handle.case_id)
        return JobState.DONE if outcome is not None and outcome.ok else JobState.FAILED

    def collect(self, handle: JobHandle, case: CaseSpec) -> CaseOutcome:
        return self._outcomes.pop(handle.case_id, CaseOutcome.failed("transient", "the in-process call was lost"))

    def cancel(self, handle: JobHandle) -> None:
        self._outcomes.pop(handle.case_id, None)

    def attach(self, case: CaseSpec, job_id: str | None, pgid: int | None) -> JobHandle | None:
        """An in-process call dies with its orchestrator; the case is always run again."""
        return None


def load_function(spec: str, base_dir: Path) -> Callable[..., Any]:
    """Import ``module:function`` or ``file.py:function``; one clear AdapterError if impossible."""
    target, sep, name = spec.rpartition(":")
    if not sep or not target or not name.isidentifier():
        raise AdapterError(f"solver.function: {shown(spec)} must look like 'package.module:function' or 'path/to/file.py:function'")
    try:
        module = _import_file(base_dir, target) if target.endswith(".py") else importlib.import_module(target)
    except AdapterError:
        raise
    except (Exception, SystemExit) as exc:  # any import-time failure of user code becomes one line
        if isinstance(exc, SystemExit):
            raise AdapterError(f"solver.function: cannot import {shown(target)} (it calls sys.exit({shown(exc.code, 60)}) "
                               f"while imported); a solver module must only define {name}(parameters, condition) "
                               f"at import") from None
        raise AdapterError(f"solver.function: cannot import {shown(target)} ({type(exc).__name__}: {clip(str(exc))})") from None
    function = getattr(module, name, None)
    if not callable(function):
        raise AdapterError(f"solver.function: {shown(target)} has no function {name!r}")
    return function


def _import_file(base_dir: Path, target: str) -> Any:
    """Import ``target`` (a .py path relative to ``base_dir``) with its own folder first on sys.path."""
    path = (base_dir / target).resolve()
    if not path.is_file():
        raise AdapterError(f"solver.function: file {clip(str(path))} does not exist")
    folder = str(path.parent)
    if folder not in sys.path:
        sys.path.insert(0, folder)  # kept: the function may import its neighbours lazily, at call time
    name = f"sortie_user_{path.stem}"
    module_spec = importlib.util.spec_from_file_location(name, path)
    assert module_spec is not None and module_spec.loader is not None
    module = importlib.util.module_from_spec(module_spec)
    sys.modules[name] = module  # as for any import: dataclasses and pickle look the module up here
    try:
        module_spec.loader.exec_module(module)
    except BaseException:
        sys.modules.pop(name, None)
        raise
    return module


def _plain(v: Any) -> Any:
    try:
        return float(v)
    except (TypeError, ValueError):
        return str(v)
