"""Run a case as a local command: render the template, start the solver, enforce its timeout.

The solver runs as an argument list (never through a shell) in its own session, so that it
and every child it starts form one process group. A timeout, a cancel, or the end of the
solver kills that whole group: SIGTERM first, SIGKILL after ``kill_grace_s``. stdout and stderr
go to files in the case folder, and a failure reason always names the file to look at.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field

from sortie.adapters.base import CaseOutcome, CaseSpec, JobHandle, JobState
from sortie.adapters.files import (
    STDERR,
    STDOUT,
    folder_problems,
    last_line,
    read_case_quantities,
    rendering_problems,
    unrendered,
    unrendered_outcome,
    which_program,
)
from sortie.adapters.template import TemplateError, render_folder, render_text
from sortie.config import QuantitySpec
from sortie.errors import AdapterError

JOB_FILE = ".sortie-job"  # the solver's process group and start time, for a later orchestrator
EXIT_FILE = ".solver-exit"  # the solver's exit status, written by the wrapper shell when it ends
# The wrapper records the job itself before it runs the solver (then the exit status after it): an
# orchestrator killed between starting the wrapper and writing a record could otherwise leave a
# solver that finished with no record, and the case would run twice. Arguments: start time, program...
_WRAPPER = (f'started=$1; shift; printf \'{{"pgid": %s, "started_at": %s}}\\n\' "$$" "$started" > {JOB_FILE}.tmp '
            f'&& mv -f {JOB_FILE}.tmp {JOB_FILE}; "$@"; status=$?; echo $status > {EXIT_FILE}; exit $status')


class CommandOptions(BaseModel):
    """Config keys of ``solver:`` for ``adapter: command``."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    adapter: str
    template: str
    command: list[str] = Field(min_length=1)
    timeout_s: float = Field(default=3600.0, gt=0)
    kill_grace_s: float = Field(default=5.0, ge=0)
    render: list[str] | None = None
    env: dict[str, str] = Field(default_factory=dict)


@dataclass
class _Running:
    proc: subprocess.Popen[bytes] | None  # None for a solver re-attached after a restart
    pgid: int
    workdir: Path
    deadline: float
    timed_out: bool = False
    code: int | None = None


class CommandAdapter:
    """Runs each case as a local process group; see the module docstring.

    Parameters
    ----------
    options : CommandOptions
        Validated ``solver:`` section.
    quantities : mapping of str to QuantitySpec
        Where each quantity is read after the solver ends.
    base_dir : Path
        Folder of the config file; ``template`` is relative to it.
    """

    Options = CommandOptions
    poll_interval_s = 0.1
    detached = False

    def __init__(self, options: CommandOptions, quantities: Mapping[str, QuantitySpec], base_dir: Path) -> None:
        self.options = options
        self.quantities = dict(quantities)
        self.base_dir = Path(base_dir)
        self._running: dict[int, _Running] = {}

    @classmethod
    def check(cls, options: CommandOptions, quantities: Mapping[str, QuantitySpec], base_dir: Path) -> list[str]:
        """Set-up problems found without running anything."""
        problems = folder_problems("command", options.template, quantities, base_dir)
        if "{{" not in options.command[0] and which_program(options.command[0], (base_dir / options.template).resolve()) is None:
            problems.append(f"solver.command: program {options.command[0]!r} is not found on PATH or in {Path(sys.executable).parent}; give an installed program or a path")
        return problems

    @classmethod
    def check_cases(cls, options: CommandOptions, cases: list[CaseSpec], base_dir: Path) -> list[str]:
        """Problems rendering the template folder and the command for ``cases`` (the baseline at every condition)."""
        template = (base_dir / options.template).resolve()
        return rendering_problems(template, options.render, cases, lambda case: _argv(options, case.context()))

    def start(self, case: CaseSpec) -> JobHandle:
        workdir = Path(case.workdir)  # absolute (CaseSpec), so the solver finds ./solver.py from its folder
        if workdir.exists():
            shutil.rmtree(workdir)  # a fresh attempt starts from the template, never from leftovers
        workdir.mkdir(parents=True)
        context = case.context()
        try:
            render_folder((self.base_dir / self.options.template).resolve(), workdir, context, self.options.render)
            argv = _argv(self.options, context)
        except TemplateError as err:
            return unrendered(case, err)
        program = which_program(argv[0], workdir)
        if program is None:
            raise AdapterError(f"solver.command: program {argv[0]!r} is not found on PATH; give an installed program or a path")
        env = {**os.environ, **self.options.env}
        with open(workdir / STDOUT, "wb") as out, open(workdir / STDERR, "wb") as err:
            try:
                # sh runs the solver as an argument list ("$@", never parsed as shell) and writes
                # its exit status to a file, so a later orchestrator can collect a solver that
                # outlived the one that started it.
                now = time.time()
                proc = subprocess.Popen(["/bin/sh", "-c", _WRAPPER, "sortie-case", f"{now:.6f}", program, *argv[1:]],
                                        cwd=workdir, stdin=subprocess.DEVNULL, stdout=out, stderr=err, env=env,
                                        start_new_session=True)
            except OSError as exc:
                raise AdapterError(f"solver.command: {program} cannot be started ({exc.strerror}); check it is an executable program") from None
        self._running[case.case_id] = _Running(proc, proc.pid, workdir, time.monotonic() + self.options.timeout_s)
        return JobHandle(case.case_id, str(proc.pid), now, pgid=proc.pid)

    def poll(self, handle: JobHandle) -> JobState:
        if unrendered_outcome(handle) is not None:
            return JobState.FAILED
        run = self._running.get(handle.case_id)
        if run is None:
            return JobState.FAILED
        if run.proc is not None:
            code = run.proc.poll()
            alive = code is None
        else:  # re-attached: not our child, so watch its group and its exit-status file
            alive = _group_works_in(run.pgid, run.workdir)
            code = None if alive else _exit_status(run.workdir)
        if alive:
            if time.monotonic() < run.deadline:
                return JobState.RUNNING
            run.timed_out = True
            kill_group(run.pgid, self.options.kill_grace_s, run.proc)
            return JobState.FAILED
        kill_group(run.pgid, self.options.kill_grace_s, None)  # children left behind by the solver
        run.code = code
        return JobState.DONE if code == 0 else JobState.FAILED

    def collect(self, handle: JobHandle, case: CaseSpec) -> CaseOutcome:
        not_rendered = unrendered_outcome(handle)
        if not_rendered is not None:
            return not_rendered
        run = self._running.pop(handle.case_id, None)
        workdir = Path(case.workdir)
        stderr = workdir / STDERR
        if run is None:
            return CaseOutcome.failed("transient", f"the solver process {handle.job_id} is no longer tracked by this orchestrator")
        if run.timed_out:
            return CaseOutcome.failed("timeout", f"the solver ran longer than timeout_s={self.options.timeout_s:g} and its process group was killed; see {workdir / STDOUT}")
        code = run.code
        if code is None:
            return CaseOutcome.failed("transient", f"the solver ended while no orchestrator watched it and left no exit status in {workdir / EXIT_FILE}")
        if code != 0:
            how = f"was killed by signal {code - 128}" if code > 128 else f"exited with code {code}"
            return CaseOutcome.failed("solver", f"the solver {how}{last_line(stderr)}; see {stderr}")
        return read_case_quantities(workdir, self.quantities)

    def cancel(self, handle: JobHandle) -> None:
        run = self._running.pop(handle.case_id, None)
        if unrendered_outcome(handle) is not None:
            return  # nothing was started
        kill_group(int(handle.pgid or handle.job_id), self.options.kill_grace_s, run.proc if run else None)

    def attach(self, case: CaseSpec, job_id: str | None, pgid: int | None) -> JobHandle | None:
        """Take over a solver started by an orchestrator that has since died.

        The solver runs in its own session, so it survives its orchestrator. If its group still
        works in this case's folder it is watched until it ends (its timeout counted from its
        real start); if it has ended, its exit-status file says how. A process id is trusted only
        while one of its processes works in the case folder, so a reused id is never hit. If
        nothing usable is left (no job file, or no exit status), leftovers are killed and None
        is returned: the case runs again.
        """
        workdir = Path(case.workdir)
        try:
            job = json.loads((workdir / JOB_FILE).read_text())
            group, started_at = int(job["pgid"]), float(job["started_at"])
        except (OSError, ValueError, KeyError, TypeError):
            for stray in _groups_working_in(workdir):  # started, but killed before its job file was written
                kill_group(stray, self.options.kill_grace_s, None)
            return None
        if not _group_works_in(group, workdir) and _exit_status(workdir) is None:
            return None
        deadline = time.monotonic() + self.options.timeout_s - max(time.time() - started_at, 0.0)
        self._running[case.case_id] = _Running(None, group, workdir, deadline)
        return JobHandle(case.case_id, str(group), started_at, pgid=group)


def _argv(options: CommandOptions, context: Mapping[str, object]) -> list[str]:
    """The solver's argument list for one case (each item a template)."""
    return [render_text(a, context, where=f"solver.command[{i}]") for i, a in enumerate(options.command)]


def _exit_status(workdir: Path) -> int | None:
    try:
        return int((workdir / EXIT_FILE).read_text().strip())
    except (OSError, ValueError):
        return None


def _groups_working_in(folder: Path) -> set[int]:
    """Process groups with a live process whose working directory is inside ``folder``."""
    folder = folder.resolve()
    groups = set()
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            if fields[0] == "Z":
                continue
            cwd = Path(os.readlink(entry / "cwd"))
        except (OSError, ValueError, IndexError):
            continue
        if cwd == folder or folder in cwd.parents:
            groups.add(int(fields[2]))
    return groups


def _group_works_in(pgid: int, folder: Path) -> bool:
    """True if a live process of group ``pgid`` has its working directory inside ``folder``."""
    return pgid in _groups_working_in(folder)


def kill_group(pgid: int, grace_s: float, proc: subprocess.Popen[bytes] | None) -> None:
    """SIGTERM the process group, wait up to ``grace_s`` for it to go, then SIGKILL what is left."""
    try:
        os.killpg(pgid, signal.SIGTERM)
    except (ProcessLookupError, PermissionError):
        return
    deadline = time.monotonic() + grace_s
    while time.monotonic() < deadline:
        if proc is not None:
            proc.poll()  # reap the leader so the group can empty
        if not _group_alive(pgid):
            return
        time.sleep(0.05)
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(pgid, signal.SIGKILL)
    if proc is not None:
        proc.wait()
    deadline = time.monotonic() + 2.0  # SIGKILL is delivered asynchronously; wait until the group is gone
    while _group_alive(pgid) and time.monotonic() < deadline:
        time.sleep(0.01)


def _group_alive(pgid: int) -> bool:
    try:
        os.killpg(pgid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    # A group whose only members are zombies still answers signal 0; look for a live member.
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[2]) == pgid and fields[0] != "Z":
                return True
    return False
