"""The contract between sortie and a solver: start a case, poll it, collect it, cancel it.

The contract is small and free of Prefect so that adapters can be written and tested alone. Each
method is safe to call again on the same case folder. Solver trouble (a crash, a timeout, output
that cannot be read) is *data*: it comes back as a failed :class:`CaseOutcome` with a class and
a reason, never as an exception. Exceptions are for a broken set-up (a missing template).

Adapters are found through the ``sortie.adapters`` entry-point group (see ``registry.py``); a
class there provides ``Options`` (a pydantic model of its config keys, ``extra="forbid"``) and
a constructor ``Adapter(options, quantities, base_dir)``.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar, Protocol

from pydantic import BaseModel

FAILURE_CLASSES = ("solver", "output", "timeout", "transient", "cancelled")


class JobState(enum.Enum):
    """Where a case's job is; DONE and FAILED are terminal."""

    QUEUED = "queued"
    RUNNING = "running"
    DONE = "done"
    FAILED = "failed"


@dataclass(frozen=True)
class CaseSpec:
    """Everything an adapter needs to run one case (a design at one condition).

    ``workdir`` is made absolute here, once: a solver runs with its case folder as working
    directory, so a folder given relative to the orchestrator's (the default
    ``campaigns/<name>``, any relative ``--dir``) would lead nowhere from there.
    """

    case_id: int
    name: str
    design_id: int
    values: Mapping[str, Any]
    condition: Mapping[str, float]
    workdir: Path

    def __post_init__(self) -> None:
        object.__setattr__(self, "workdir", Path(self.workdir).resolve())

    def context(self) -> dict[str, Any]:
        """Template placeholders: parameters, conditions, and ``case_name``/``case_id``/``design_id``."""
        return {**self.values, **self.condition, "case_name": self.name, "case_id": self.case_id,
                "design_id": self.design_id}


@dataclass(frozen=True)
class JobHandle:
    """What identifies a started job: the scheduler job id or the process id, plus extras."""

    case_id: int
    job_id: str
    started_at: float
    pgid: int | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class CaseOutcome:
    """The end of a case: its quantities, or why it failed (``failure_class`` in FAILURE_CLASSES)."""

    quantities: Mapping[str, float] = field(default_factory=dict)
    failure_class: str | None = None
    reason: str | None = None

    @property
    def ok(self) -> bool:
        return self.failure_class is None

    @classmethod
    def failed(cls, failure_class: str, reason: str) -> CaseOutcome:
        if failure_class not in FAILURE_CLASSES:
            raise ValueError(f"failure_class must be one of {FAILURE_CLASSES}, got {failure_class!r}")
        return cls(failure_class=failure_class, reason=reason)


class SolverAdapter(Protocol):
    """What every adapter provides. Implementations live in this package or in plug-ins."""

    Options: ClassVar[type[BaseModel]]
    poll_interval_s: float
    #: True when jobs outlive the orchestrator (a batch scheduler's jobs): an interrupted run
    #: leaves them running and a resumed run re-attaches them. False for local processes, which
    #: an interrupted run kills and a resumed run starts again.
    detached: ClassVar[bool]

    def start(self, case: CaseSpec) -> JobHandle: ...

    def poll(self, handle: JobHandle) -> JobState: ...

    def collect(self, handle: JobHandle, case: CaseSpec) -> CaseOutcome: ...

    def cancel(self, handle: JobHandle) -> None: ...

    def attach(self, case: CaseSpec, job_id: str | None, pgid: int | None) -> JobHandle | None:
        """Find a case's job again after the orchestrator stopped without recording its end.

        Called on resume for each case the ledger holds as submitting (``job_id`` None: the job
        may or may not have been submitted) or running. Returns a handle when the job still
        exists (queued, running, or ended with its output in place), so the run waits for it
        and collects it instead of starting it again; returns None when nothing of it can be
        used, after removing leftovers (an orphaned local process group is killed), so the case
        is run again.
        """
        ...


def check_quantities(values: Mapping[str, Any], expected: list[str], where: str) -> CaseOutcome:
    """Turn raw quantity values into an outcome: every expected one present, a finite number."""
    quantities: dict[str, float] = {}
    for name in expected:
        if name not in values:
            return CaseOutcome.failed("output", f"{where} gave no value for quantity {name!r}")
        try:
            number = float(values[name])
        except (TypeError, ValueError):
            return CaseOutcome.failed("output", f"{where} gave {values[name]!r} for {name!r}, which is not a number")
        if not math.isfinite(number):
            return CaseOutcome.failed("output", f"{where} gave {number} for {name!r}; quantities must be finite")
        quantities[name] = number
    return CaseOutcome(quantities=quantities)
