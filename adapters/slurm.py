"""Run each case as a Slurm batch job: render the case folder, write a batch script, submit, watch.

Why it looks the way it does:

* **Jobs outlive the orchestrator** (``detached = True``). A run that dies leaves its jobs
  queued or running; a resumed run finds them again (:meth:`SlurmAdapter.attach`) by the job id
  the ledger holds or, when the run died between ``sbatch`` and recording the id, by the job
  name. The name is the case name plus a tag of the case folder, so it is unique per campaign;
  ``--comment`` carries a submission token (also written to ``sortie.submit`` in the case
  folder) so that a job of an *earlier* attempt of the same case is never mistaken for the
  current one.
* **Polling is gentle.** Every case is polled from its own thread, but one ``squeue`` call
  refreshes the state of every job this adapter tracks, at most once per ``poll_interval_s``;
  the other threads read the cache. A scheduler that does not answer for a while is waited for
  (the last known state stands), never taken for a failed job.
* **Every end state is data.** COMPLETED is collected like the command adapter (quantities from
  output files); FAILED and OUT_OF_MEMORY are solver failures, CANCELLED is cancelled, TIMEOUT
  and DEADLINE are timeouts, and NODE_FAIL, PREEMPTED, BOOT_FAIL and a job the scheduler no
  longer knows are transient (worth running again).
* **Finished jobs may be forgotten** by the controller (``MinJobAge``, 300 s by default on real
  clusters). Then ``sacct`` is asked where accounting is on, and failing that the exit record
  the batch script writes itself (``sortie.exit``, with the submission token) tells a finished
  solver from a vanished job.

The batch script (``sortie.sbatch`` in the case folder) holds every resource as an ``#SBATCH``
line, so a user can read it and resubmit it by hand (``cd CASE && sbatch sortie.sbatch``).
"""

from __future__ import annotations

import hashlib
import logging
import math
import os
import re
import shlex
import shutil
import subprocess
import threading
import time
import uuid
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import ClassVar

from pydantic import BaseModel, ConfigDict, Field, field_validator

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
from sortie.adapters.template import TemplateError, render_folder, render_shell, render_text
from sortie.config import QuantitySpec
from sortie.errors import AdapterError

log = logging.getLogger(__name__)

SCRIPT = "sortie.sbatch"
SUBMIT_RECORD = "sortie.submit"  # the current attempt's submission token
EXIT_RECORD = "sortie.exit"  # "<token> <exit code>", written by the batch script when the solver ends
SLURM_TOOLS = ("sbatch", "squeue", "scancel")

#: Fields of one ``squeue -O`` line, separated by the ASCII unit separator (never in names or paths).
SEP = "\x1f"
SQUEUE_FIELDS = ("JobID", "State", "Reason", "exit_code", "Name", "Comment")
SQUEUE_FORMAT = ",".join(f"{f}:{SEP}" for f in SQUEUE_FIELDS)

PENDING_STATES = frozenset({"PENDING", "CONFIGURING", "REQUEUED", "REQUEUE_FED", "REQUEUE_HOLD", "RESV_DEL_HOLD"})
RUNNING_STATES = frozenset({"RUNNING", "COMPLETING", "SIGNALING", "STAGE_OUT", "RESIZING", "SUSPENDED", "STOPPED"})
#: Terminal Slurm states and the failure class of each (COMPLETED is the one success).
END_CLASSES: Mapping[str, str | None] = {
    "COMPLETED": None,
    "FAILED": "solver",
    "OUT_OF_MEMORY": "solver",
    "CANCELLED": "cancelled",
    "TIMEOUT": "timeout",
    "DEADLINE": "timeout",
    "NODE_FAIL": "transient",
    "PREEMPTED": "transient",
    "BOOT_FAIL": "transient",
    "SPECIAL_EXIT": "transient",
    "REVOKED": "transient",
    "VANISHED": "transient",  # ours: the scheduler no longer knows the job and nothing says how it ended
}
#: sbatch/squeue messages that mean "the controller did not answer", not "your request is wrong".
_UNREACHABLE = re.compile(r"timed out|unable to contact|connection refused|socket|temporarily unavailable|"
                          r"communication|could not establish|zero bytes", re.IGNORECASE)
_TIME_LIMIT = re.compile(r"^(?:(?P<d>\d+)-(?=\d+:\d+:))?(?:(?P<h>\d+):(?=\d+:))?(?P<m>\d+):(?P<s>\d{2})$")
_MEMORY = re.compile(r"^\d+[KMGT]?$", re.IGNORECASE)

Runner = Callable[..., subprocess.CompletedProcess[str]]


def run_tool(argv: Sequence[str], *, cwd: Path | None = None, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
    """Run one Slurm client command and capture its text output (the adapter's only way out).

    Every scheduler call goes through here (``SlurmAdapter.runner``), so a test can count them.
    A command that hangs (controller unreachable) is stopped after ``timeout`` seconds and
    reported as a failed call, never as an exception.
    """
    try:
        return subprocess.run(list(argv), cwd=cwd, capture_output=True, text=True, timeout=timeout,
                              stdin=subprocess.DEVNULL, check=False)
    except subprocess.TimeoutExpired:
        return subprocess.CompletedProcess(list(argv), 124, "", f"{argv[0]}: timed out after {timeout:g} s")
    except OSError as exc:
        return subprocess.CompletedProcess(list(argv), 127, "", f"{argv[0]}: cannot be run ({exc.strerror})")


class SlurmOptions(BaseModel):
    """Config keys of ``solver:`` for ``adapter: slurm``."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    adapter: str
    template: str
    command: list[str] = Field(min_length=1)
    render: list[str] | None = None
    partition: str | None = None
    #: seconds, or "H:MM:SS" / "M:SS" / "D-H:MM:SS" (in seconds because YAML itself reads an
    #: unquoted 1:30:00 as the number 5400: seconds make quoted and unquoted forms agree)
    time_limit_s: int = 3600
    #: processes (MPI ranks) of the solver, Slurm's --ntasks; cpus is CPUs per process (--cpus-per-task)
    tasks: int = Field(default=1, ge=1)
    cpus: int = Field(default=1, ge=1)
    #: Slurm's --mem: a number of megabytes, or with a unit suffix K, M, G or T
    memory: str | None = None
    account: str | None = None
    sbatch_lines: list[str] = Field(default_factory=list)
    setup: list[str] = Field(default_factory=list)
    poll_interval_s: float = Field(default=5.0, gt=0)
    env: dict[str, str] = Field(default_factory=dict)

    @field_validator("time_limit_s", mode="before")
    @classmethod
    def _time_limit(cls, value: object) -> int:
        seconds = time_limit_seconds(value)
        if seconds <= 0:
            raise ValueError("must be more than zero")
        return seconds

    @field_validator("memory", mode="before")
    @classmethod
    def _memory(cls, value: object) -> object:
        if isinstance(value, int) and not isinstance(value, bool):
            value = str(value)
        if isinstance(value, str) and not _MEMORY.match(value.strip()):
            raise ValueError(f"{value!r} is not a Slurm memory size; give megabytes (4000) or a number with K, M, G or T (4G)")
        return value.strip() if isinstance(value, str) else value

    @field_validator("partition", "account")
    @classmethod
    def _word(cls, value: str | None) -> str | None:
        if value is not None and (not value or any(c.isspace() for c in value)):
            raise ValueError(f"{value!r} must be one name without spaces")
        return value

    @field_validator("env")
    @classmethod
    def _env_names(cls, env: dict[str, str]) -> dict[str, str]:
        for key, value in env.items():
            if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", key):
                raise ValueError(f"{key!r} is not an environment variable name (letters, digits, underscore)")
            if _breaks_line(value):
                raise ValueError(f"the value of {key} holds a line break or NUL, which the batch script cannot hold")
        return env

    @field_validator("sbatch_lines", "setup", "command")
    @classmethod
    def _single_lines(cls, lines: list[str]) -> list[str]:
        for line in lines:
            if _breaks_line(line):
                raise ValueError(f"{line[:60]!r} holds a line break or NUL; give one list item per line")
        return lines


def _breaks_line(text: str) -> bool:
    """A line break or NUL would end a line of the batch script early (or cut it)."""
    return any(c in text for c in "\n\r\0")


def time_limit_seconds(value: object) -> int:
    """Whole seconds of a ``time_limit_s``: a number of seconds, or ``H:MM:SS``, ``M:SS``, ``D-H:MM:SS``."""
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ValueError("must be seconds or a clock time such as '1:30:00'")
    if isinstance(value, int | float):
        if not math.isfinite(value):
            raise ValueError(f"{value} is not a time limit")
        return math.ceil(value)
    text = value.strip()
    if text.isdigit():
        return int(text)
    match = _TIME_LIMIT.match(text)
    if match is None:
        raise ValueError(f"{value!r} is not a time limit; give seconds (5400) or a clock time ('1:30:00', '90:00', '2-00:00:00')")
    d, h, m, s = (int(match[k] or 0) for k in ("d", "h", "m", "s"))
    if s >= 60 or (match["h"] is not None and m >= 60):
        raise ValueError(f"{value!r} has minutes or seconds of 60 or more")
    return ((d * 24 + h) * 60 + m) * 60 + s


def slurm_time(seconds: int) -> str:
    """``--time`` value for a number of seconds (Slurm counts whole minutes and rounds a partial one up)."""
    days, rest = divmod(seconds, 86400)
    hours, rest = divmod(rest, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{days}-{hours:02d}:{minutes:02d}:{secs:02d}" if days else f"{hours}:{minutes:02d}:{secs:02d}"


# --------------------------------------------------------------------------- job records


@dataclass(frozen=True)
class SlurmJob:
    """What the scheduler says about one job (one ``squeue -O`` line or one ``sacct`` line).

    ``exit_code`` and ``signal`` come from the wait status of the batch script: a solver that
    exits 3 has (3, 0); a job killed by SIGTERM (cancel, time limit) has (0, 15).
    """

    job_id: str
    state: str
    reason: str = ""
    exit_code: int | None = None
    signal: int | None = None
    name: str = ""
    comment: str = ""

    @property
    def job_state(self) -> JobState:
        return job_state(self.state)

    @property
    def token(self) -> str | None:
        """The submission token sortie put in ``--comment`` (None for jobs sortie did not submit)."""
        words = self.comment.split(maxsplit=2)
        return words[1] if len(words) >= 2 and words[0] == "sortie" else None


def job_state(state: str) -> JobState:
    """Map a Slurm job state (first word: ``CANCELLED by 0`` is CANCELLED) to the adapter's JobState."""
    word = state.split()[0].rstrip("+").upper() if state.strip() else ""
    if word in PENDING_STATES:
        return JobState.QUEUED
    if word in RUNNING_STATES:
        return JobState.RUNNING
    if word == "COMPLETED":
        return JobState.DONE
    if word in END_CLASSES:
        return JobState.FAILED
    log.warning("Slurm job state %r is not known to sortie; treating it as running", state)
    return JobState.RUNNING


def parse_squeue(text: str) -> dict[str, SlurmJob]:
    """Jobs from ``squeue -h -O`` output in :data:`SQUEUE_FORMAT` (fields end in :data:`SEP`).

    ``exit_code`` there is the raw wait status (768 = exit 3, 15 = killed by SIGTERM).
    """
    jobs: dict[str, SlurmJob] = {}
    for line in text.splitlines():
        fields = line.split(SEP)
        if len(fields) < len(SQUEUE_FIELDS):
            continue
        job_id, state, reason, status, name, comment = (f.strip() for f in fields[:len(SQUEUE_FIELDS)])
        code = sig = None
        if status.isdigit():
            raw = int(status)
            code, sig = (raw >> 8) & 0xFF, raw & 0x7F
        jobs[job_id] = SlurmJob(job_id, state.split()[0] if state else "", _null(reason), code, sig, _null(name), _null(comment))
    return jobs


def parse_sacct(text: str) -> dict[str, SlurmJob]:
    """Jobs from ``sacct -n -P -X -o JobID,State,ExitCode`` (ExitCode is ``code:signal``)."""
    jobs: dict[str, SlurmJob] = {}
    for line in text.splitlines():
        fields = line.strip().split("|")
        if len(fields) < 3 or not fields[0]:
            continue
        code = sig = None
        if re.fullmatch(r"\d+:\d+", fields[2]):
            code, sig = (int(x) for x in fields[2].split(":"))
        jobs[fields[0]] = SlurmJob(fields[0], fields[1].split()[0] if fields[1] else "", "", code, sig)
    return jobs


def _null(text: str) -> str:
    return "" if text in ("(null)", "None", "N/A") else text


def end_outcome(job: SlurmJob, workdir: Path, options: SlurmOptions) -> CaseOutcome | None:
    """The failed outcome of an ended job, or None when it COMPLETED (quantities are read next).

    Each reason names the job, what happened, what to change where the user can change it, and
    the file to look at.
    """
    state = job.state.split()[0].upper() if job.state else "VANISHED"
    failure_class = END_CLASSES.get(state, "transient")
    if failure_class is None:
        return None
    stdout, stderr = workdir / STDOUT, workdir / STDERR
    if state == "FAILED":
        if job.signal:
            what = f"was killed by signal {job.signal}"
        else:
            what = f"exited with code {job.exit_code}" if job.exit_code is not None else "failed"
        return CaseOutcome.failed(failure_class, f"the Slurm job {job.job_id} {what}{last_line(stderr)}; see {stderr}")
    asked = f" (memory={options.memory})" if options.memory else ""
    what, see = {
        "OUT_OF_MEMORY": (f"ran out of memory{asked}; raise solver.memory", stderr),
        "CANCELLED": ("was cancelled (scancel by sortie, the user or an administrator)", stdout),
        "TIMEOUT": (f"reached its time limit (time_limit_s={options.time_limit_s}, {slurm_time(options.time_limit_s)}) and was killed; raise solver.time_limit_s", stdout),
        "DEADLINE": ("reached its deadline before it could finish", stdout),
        "NODE_FAIL": ("ended because its node failed", stdout),
        "PREEMPTED": ("was preempted by the scheduler", stdout),
        "BOOT_FAIL": ("could not start because its node failed to boot", stdout),
        "VANISHED": (f"is no longer known to the scheduler and left no exit record in {workdir}", stdout),
    }.get(state, (f"ended in state {state}", stdout))
    return CaseOutcome.failed(failure_class, f"the Slurm job {job.job_id} {what}; see {see}")


# --------------------------------------------------------------------------- the adapter


class SlurmAdapter:
    """Runs each case as a Slurm batch job; see the module docstring.

    Parameters
    ----------
    options : SlurmOptions
        Validated ``solver:`` section.
    quantities : mapping of str to QuantitySpec
        Where each quantity is read after the job completes.
    base_dir : Path
        Folder of the config file; ``template`` is relative to it.
    runner : callable, optional
        Runs one Slurm command (``run_tool`` by default); tests pass a counting wrapper.
    """

    Options = SlurmOptions
    poll_interval_s: float = 5.0
    detached: ClassVar[bool] = True

    def __init__(self, options: SlurmOptions, quantities: Mapping[str, QuantitySpec], base_dir: Path,
                 runner: Runner = run_tool) -> None:
        self.options = options
        self.quantities = dict(quantities)
        self.base_dir = Path(base_dir)
        self.poll_interval_s = options.poll_interval_s
        self.runner = runner
        self._lock = threading.Lock()
        self._snapshot_lock = threading.Lock()
        self._jobs: dict[str, SlurmJob] = {}  # tracked jobs by id: the cache every poll reads
        self._workdirs: dict[str, Path] = {}
        self._refreshed_at = -float("inf")
        self._stale: set[str] = set()  # jobs whose next poll must query (after a cancel)
        self._snapshot: tuple[float, dict[str, SlurmJob]] | None = None  # all of the user's jobs, for attach

    # -- set-up ---------------------------------------------------------------------------------
    @classmethod
    def check(cls, options: SlurmOptions, quantities: Mapping[str, QuantitySpec], base_dir: Path) -> list[str]:
        """Set-up problems: Slurm's tools missing, template missing, resources the cluster refuses."""
        problems = folder_problems("slurm", options.template, quantities, base_dir)
        template = (base_dir / options.template).resolve()
        missing = [tool for tool in SLURM_TOOLS if shutil.which(tool) is None]
        if missing:
            problems.append(f"solver.adapter: Slurm's {', '.join(missing)} not found on PATH; run sortie where Slurm's client commands work (a login node) or use adapter 'command'")
        program = options.command[0]
        if not options.setup and "{{" not in program and which_program(program, template) is None:
            problems.append(f"solver.command: program {program!r} is not found on PATH or beside this Python; give an installed program, a path, or setup lines (module load) that provide it")
        if not missing:
            refused = cls._test_resources(options)
            if refused:
                problems.append(refused)
        return problems

    @classmethod
    def check_cases(cls, options: SlurmOptions, cases: list[CaseSpec], base_dir: Path) -> list[str]:
        """Problems rendering the template folder and the batch script for ``cases`` (the baseline at every condition)."""
        adapter = cls(options, {}, base_dir)
        template = (base_dir / options.template).resolve()
        return rendering_problems(template, options.render, cases, lambda case: adapter.script_parts(case.context()))

    @classmethod
    def _test_resources(cls, options: SlurmOptions) -> str | None:
        """Ask ``sbatch --test-only`` whether the cluster accepts the resources (nothing is submitted).

        An unreachable controller is not a config problem and is not reported here.
        """
        argv = ["sbatch", "--test-only", *resource_args(options), "--wrap=true"]
        result = run_tool(argv, timeout=12)
        if result.returncode == 0 or _UNREACHABLE.search(result.stderr):
            return None
        return f"solver: Slurm refuses these resources ({_first_error(result.stderr)}); check partition, account, time_limit_s, tasks, cpus, memory and sbatch_lines"

    # -- the contract ---------------------------------------------------------------------------
    def start(self, case: CaseSpec) -> JobHandle:
        """Render the case folder, write ``sortie.sbatch`` and submit it; returns once Slurm has the job."""
        workdir = Path(case.workdir).resolve()
        if workdir.exists():
            shutil.rmtree(workdir)  # a fresh attempt starts from the template, never from leftovers
        workdir.mkdir(parents=True)
        context = case.context()
        token = uuid.uuid4().hex[:12]
        name = job_name(case.name, workdir)
        try:
            render_folder((self.base_dir / self.options.template).resolve(), workdir, context, self.options.render)
            script = self.batch_script(case, workdir, name, token)
        except TemplateError as err:
            return unrendered(case, err)
        (workdir / SUBMIT_RECORD).write_text(f"{token}\n")  # before sbatch: a resume compares it with the job's comment
        (workdir / SCRIPT).write_text(script)
        job_id = self._submit(case, workdir, name, token)
        job = SlurmJob(job_id, "PENDING", name=name, comment=_comment(token, workdir))
        with self._lock:
            self._jobs[job_id] = job
            self._workdirs[job_id] = workdir
        return JobHandle(case.case_id, job_id, time.time(), extra={"job_name": name, "workdir": str(workdir)})

    def poll(self, handle: JobHandle) -> JobState:
        """The job's state from the shared cache, refreshed by one query when it is older than the interval."""
        if unrendered_outcome(handle) is not None:
            return JobState.FAILED
        job_id = handle.job_id
        with self._lock:
            if job_id not in self._jobs:  # a handle from elsewhere (another instance): track it from now on
                self._jobs[job_id] = SlurmJob(job_id, "PENDING")
                self._workdirs.setdefault(job_id, Path(str(handle.extra.get("workdir", "."))))
                self._stale.add(job_id)
            if job_id in self._stale or time.monotonic() - self._refreshed_at >= self.poll_interval_s:
                self._refresh_locked()
            return self._jobs[job_id].job_state

    def collect(self, handle: JobHandle, case: CaseSpec) -> CaseOutcome:
        """The case's outcome: quantities read from its folder if the job COMPLETED, else why not."""
        not_rendered = unrendered_outcome(handle)
        if not_rendered is not None:
            return not_rendered
        job_id = handle.job_id
        with self._lock:
            job = self._jobs.get(job_id)
            if job is None or job.job_state not in (JobState.DONE, JobState.FAILED):
                self._jobs.setdefault(job_id, SlurmJob(job_id, "PENDING"))
                self._workdirs.setdefault(job_id, Path(case.workdir).resolve())
                self._refresh_locked(only=[job_id])
                job = self._jobs[job_id]
            self._jobs.pop(job_id, None)
            self._workdirs.pop(job_id, None)
            self._stale.discard(job_id)
        workdir = Path(case.workdir)
        if job.job_state not in (JobState.DONE, JobState.FAILED):
            return CaseOutcome.failed("transient", f"the Slurm job {job_id} is still {job.state.lower()}; it was collected before it ended")
        failed = end_outcome(job, workdir, self.options)
        if failed is not None:
            return failed
        return read_case_quantities(workdir, self.quantities)

    def cancel(self, handle: JobHandle) -> None:
        """``scancel`` the job; its end (CANCELLED) is seen by the next poll."""
        if unrendered_outcome(handle) is not None:
            return  # nothing was submitted
        result = self.runner(["scancel", handle.job_id])
        if result.returncode != 0 and "already completing or completed" not in result.stderr \
                and "Invalid job id" not in result.stderr:
            log.warning("scancel %s failed: %s", handle.job_id, _first_error(result.stderr))
        with self._lock:
            if handle.job_id in self._jobs:
                self._stale.add(handle.job_id)

    def attach(self, case: CaseSpec, job_id: str | None, pgid: int | None) -> JobHandle | None:
        """Find the case's job after a restart: by its recorded id, else by name and submission token.

        Returns a handle for a job that is queued, running or has ended with a result (completed,
        failed, timed out ...); the run then waits for it and collects it. Returns None when there
        is nothing to wait for: no job was submitted for the current attempt, the job was
        cancelled (most likely by the orchestrator that stopped), or the scheduler forgot it and
        it left no exit record. A stale job of an earlier attempt that still runs is cancelled,
        so the case never runs twice at once. Raises AdapterError when Slurm cannot be asked:
        guessing would risk submitting a job that still runs.

        All of the user's jobs are read by one ``squeue`` per poll interval and shared by the
        attach calls of a resume, so re-attaching many cases costs one query, not one per case.
        """
        workdir = Path(case.workdir).resolve()
        name = job_name(case.name, workdir)
        token = _read_token(workdir)
        snapshot = self._user_jobs()
        job = None
        if job_id:
            job = snapshot.get(job_id) or self._query([job_id], workdirs={job_id: workdir}).get(job_id)
            if job is not None and job.name and job.name != name:  # the id was given out again (controller reset)
                log.warning("Slurm job %s is now %r, not case %s's job; looking for it by name", job_id, job.name, case.name)
                job = None
        if job is None:
            mine = [j for j in snapshot.values() if j.name == name]
            for stale in (j for j in mine if j.token != token and j.job_state in (JobState.QUEUED, JobState.RUNNING)):
                log.warning("cancelling Slurm job %s: it belongs to an earlier attempt of case %s", stale.job_id, case.name)
                self.runner(["scancel", stale.job_id])
            current = [j for j in mine if token is not None and j.token == token]
            if not current:
                return None
            job = max(current, key=lambda j: int(j.job_id) if j.job_id.isdigit() else -1)
        if job.state.upper() == "CANCELLED" or job.state == "VANISHED":
            return None
        with self._lock:
            self._jobs[job.job_id] = job
            self._workdirs[job.job_id] = workdir
        return JobHandle(case.case_id, job.job_id, time.time(), extra={"job_name": name, "workdir": str(workdir)})

    # -- batch script -----------------------------------------------------------------------------
    def batch_script(self, case: CaseSpec, workdir: Path, name: str, token: str) -> str:
        """The text of ``sortie.sbatch``: resources as ``#SBATCH`` lines, set-up, the solver, an exit record.

        Set-up lines run under ``set -e`` (a failing ``module load`` fails the job with its own
        exit code instead of starting the solver in a wrong environment). The solver's exit code
        is written to ``sortie.exit`` with the submission token and returned as the job's.
        """
        argv, extra_lines, setup = self.script_parts(case.context())
        program = which_program(argv[0], workdir)
        if program is None and not self.options.setup:
            raise AdapterError(f"solver.command: program {argv[0]!r} is not found on PATH; give an installed program, a path, or setup lines that provide it")
        argv[0] = program or argv[0]  # else found on the compute node after the set-up lines
        lines = ["#!/bin/bash", f"#SBATCH --job-name={name}"]
        lines += [f"#SBATCH {arg}" for arg in resource_args(self.options)]
        lines += [f"#SBATCH --output={STDOUT}", f"#SBATCH --error={STDERR}"]
        lines += [text if text.startswith("#SBATCH") else f"#SBATCH {text}" for text in extra_lines]
        lines += [
            f"# Written by sortie for case {case.name} (submission {token}); resubmit by hand with: sbatch {SCRIPT}",
            "set -e",
            f"cd {shlex.quote(str(workdir))}",
        ]
        lines += setup
        lines += [f"export {key}={shlex.quote(value)}" for key, value in self.options.env.items()]
        lines += [
            "set +e",
            f"rm -f {EXIT_RECORD}",
            shlex.join(argv) + " </dev/null",
            "code=$?",
            f'printf "%s %s\\n" {token} "$code" > {EXIT_RECORD}.tmp && mv -f {EXIT_RECORD}.tmp {EXIT_RECORD}',
            "exit $code",
        ]
        return "\n".join(lines) + "\n"

    def script_parts(self, context: Mapping[str, object]) -> tuple[list[str], list[str], list[str]]:
        """The solver's arguments, the extra ``#SBATCH`` lines and the set-up lines of one case.

        Placeholders in ``sbatch_lines`` and ``setup`` become one quoted shell word each, so a
        value such as ``$(touch x)`` or ``a;b`` stays data; a value with a line break or NUL is
        refused (:class:`TemplateError`), as is a command argument holding one (it is quoted
        when the command line is written).
        """
        argv = [render_text(a, context, where=f"solver.command[{i}]") for i, a in enumerate(self.options.command)]
        for i, arg in enumerate(argv):
            if _breaks_line(arg):
                raise TemplateError(f"solver.command[{i}]: the rendered argument {arg[:60]!r} holds a line break or NUL, which the batch script cannot hold")
        extra = [render_shell(s, context, where=f"solver.sbatch_lines[{i}]").strip() for i, s in enumerate(self.options.sbatch_lines)]
        setup = [render_shell(s, context, where=f"solver.setup[{i}]") for i, s in enumerate(self.options.setup)]
        return argv, extra, setup

    # -- scheduler queries ------------------------------------------------------------------------
    def _submit(self, case: CaseSpec, workdir: Path, name: str, token: str) -> str:
        """``sbatch --parsable``; a controller that does not answer is retried, after checking by name
        that the job did not get in anyway (so a retry never submits it twice)."""
        argv = ["sbatch", "--parsable", f"--job-name={name}", f"--chdir={workdir}",
                f"--comment={_comment(token, workdir)}", str(workdir / SCRIPT)]
        delay = 2.0
        for attempt in range(4):
            result = self.runner(argv, cwd=workdir)
            out = result.stdout.strip()
            if result.returncode == 0 and out:
                return out.split(";")[0].splitlines()[-1].strip()
            if not _UNREACHABLE.search(result.stderr) or attempt == 3:
                break
            got_in = [j for j in self._query_user().values() if j.name == name and j.token == token]
            if got_in:
                return got_in[0].job_id
            log.warning("sbatch for case %s: %s; retrying in %g s", case.name, _first_error(result.stderr), delay)
            time.sleep(delay)
            delay *= 2
        raise AdapterError(f"sbatch refused the job of case {case.name} ({_first_error(result.stderr or result.stdout)}); check solver.partition, account, time_limit_s, tasks, cpus, memory and sbatch_lines, or see {workdir / SCRIPT}")

    def _refresh_locked(self, only: Iterable[str] | None = None) -> None:
        """One query for every tracked job that has not ended (caller holds the lock)."""
        ids = list(only) if only is not None else [
            j for j, job in self._jobs.items() if j in self._stale or job.job_state not in (JobState.DONE, JobState.FAILED)]
        if ids:
            found = self._query(ids, workdirs=self._workdirs)
            for job_id in ids:
                if job_id in found:
                    old = self._jobs.get(job_id)
                    new = found[job_id]
                    self._jobs[job_id] = replace(new, name=new.name or (old.name if old else ""),
                                                 comment=new.comment or (old.comment if old else ""))
                    self._stale.discard(job_id)
        if only is None:
            self._refreshed_at = time.monotonic()

    def _query(self, ids: Sequence[str], workdirs: Mapping[str, Path]) -> dict[str, SlurmJob]:
        """States of ``ids``: one ``squeue``; for jobs it no longer knows, ``sacct`` and then the exit
        record. Jobs missing from the answer are left out when the scheduler could not be asked."""
        result = self.runner(["squeue", "-h", "-t", "all", "-j", ",".join(ids), "-O", SQUEUE_FORMAT])
        if result.returncode != 0 and "Invalid job id" not in result.stderr:
            log.warning("squeue failed (%s); keeping the last known job states", _first_error(result.stderr))
            return {}
        found = parse_squeue(result.stdout) if result.returncode == 0 else {}
        missing = [j for j in ids if j not in found]
        if missing:
            found.update(self._forgotten(missing, workdirs))
        return found

    def _forgotten(self, ids: Sequence[str], workdirs: Mapping[str, Path]) -> dict[str, SlurmJob]:
        """End states of jobs the controller has forgotten: accounting, else the exit record, else VANISHED."""
        result = self.runner(["sacct", "-n", "-P", "-X", "-j", ",".join(ids), "-o", "JobID,State,ExitCode"])
        known = parse_sacct(result.stdout) if result.returncode == 0 else {}
        found = {}
        for job_id in ids:
            job = known.get(job_id)
            if job is None or job.job_state in (JobState.QUEUED, JobState.RUNNING):
                job = _from_exit_record(job_id, workdirs.get(job_id))
            found[job_id] = job
        return found

    def _user_jobs(self) -> dict[str, SlurmJob]:
        """All of this user's jobs Slurm still knows, by id; one query shared for a poll interval."""
        with self._snapshot_lock:
            if self._snapshot is None or time.monotonic() - self._snapshot[0] >= self.poll_interval_s:
                self._snapshot = (time.monotonic(), self._query_user())
            return self._snapshot[1]

    def _query_user(self) -> dict[str, SlurmJob]:
        result = self.runner(["squeue", "-h", "-t", "all", "-u", str(os.getuid()), "-O", SQUEUE_FORMAT])
        if result.returncode != 0:
            raise AdapterError(f"cannot read the Slurm queue ({_first_error(result.stderr)}); try again when the Slurm controller answers, so that no job is submitted twice")
        return parse_squeue(result.stdout)


# --------------------------------------------------------------------------- helpers


def job_name(case_name: str, workdir: Path) -> str:
    """``<case name>-<8 hex of the case folder>``: readable in squeue, unique across campaigns."""
    tag = hashlib.sha1(str(Path(workdir).resolve()).encode()).hexdigest()[:8]
    safe = re.sub(r"[^A-Za-z0-9._-]", "_", case_name)
    return f"{safe}-{tag}"


def resource_args(options: SlurmOptions) -> list[str]:
    """``sbatch`` options for the configured resources (also written as ``#SBATCH`` lines)."""
    args = [f"--time={slurm_time(options.time_limit_s)}", f"--ntasks={options.tasks}",
            f"--cpus-per-task={options.cpus}"]
    if options.partition:
        args.append(f"--partition={options.partition}")
    if options.account:
        args.append(f"--account={options.account}")
    if options.memory:
        args.append(f"--mem={options.memory}")
    return args


def _comment(token: str, workdir: Path) -> str:
    return f"sortie {token} {workdir}"


def _read_token(workdir: Path) -> str | None:
    try:
        return (workdir / SUBMIT_RECORD).read_text().strip() or None
    except OSError:
        return None


def _from_exit_record(job_id: str, workdir: Path | None) -> SlurmJob:
    """COMPLETED/FAILED from the batch script's own exit record, if it is this attempt's; else VANISHED."""
    if workdir is not None:
        try:
            token, code = (workdir / EXIT_RECORD).read_text().split()
        except (OSError, ValueError):
            token = code = ""
        if token and token == _read_token(workdir) and code.isdigit():
            return SlurmJob(job_id, "COMPLETED" if code == "0" else "FAILED", "exit record", int(code), 0)
    return SlurmJob(job_id, "VANISHED")


def _first_error(text: str) -> str:
    """The most telling line of a Slurm tool's stderr (the last 'error:' line, without the prefix)."""
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    errors = [ln for ln in lines if "error" in ln.lower()] or lines
    if not errors:
        return "no message"
    return re.sub(r"^(sbatch|squeue|scancel|sacct): (error: )?", "", errors[-1])[:300]
