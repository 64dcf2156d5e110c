"""The Slurm adapter against a real scheduler, plus its state mapping and options without one.

Tests that submit jobs use the ``slurm`` fixture (``tests/slurm_support.py``): they skip with a
reason where Slurm is not usable, and fail instead under ``SORTIE_REQUIRE_SLURM=1`` (CI). Jobs
run the mock solver through the demo template, or a small Python script written into the test's
own template folder. ``scripts/slurm-local.sh start`` gives a private single-node Slurm.
"""

from __future__ import annotations

import contextlib
import os
import subprocess
import sys
import threading
import time
from collections import Counter
from datetime import datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest
import yaml
from pydantic import ValidationError

from sortie.adapters import registry
from sortie.adapters.base import FAILURE_CLASSES, CaseOutcome, CaseSpec, JobHandle, JobState
from sortie.adapters.command import STDERR
from sortie.adapters.slurm import (
    EXIT_RECORD,
    SCRIPT,
    SEP,
    SUBMIT_RECORD,
    SlurmAdapter,
    SlurmJob,
    SlurmOptions,
    end_outcome,
    job_name,
    job_state,
    parse_sacct,
    parse_squeue,
    run_tool,
    time_limit_seconds,
)
from sortie.config import QuantitySpec
from sortie.errors import AdapterError

if TYPE_CHECKING:
    from tests.slurm_support import SlurmInfo

# The fixtures `slurm` and `slurm_jobs`; imported as a plugin so pytest rewrites its asserts.
pytest_plugins = ["tests.slurm_support"]

ROOT = Path(__file__).resolve().parents[2]
DEMO_TEMPLATE = ROOT / "configs" / "cases" / "template"
MOCK_SOLVER = str(Path(sys.executable).parent / "sortie-mock-solver")
SLED = {"ramp_angle": 9.5, "boattail_length": 0.8, "diffuser_angle": 4.0, "strut_thickness": 0.05,
        "skirt_gap": 0.02, "fin_count": 3}
QUANTITIES = {"lift": QuantitySpec(file="result.out", pattern=r"lift\s*=\s*(?P<value>\S+)"),
              "drag": QuantitySpec(file="result.out", key="drag")}
TERMINAL = (JobState.DONE, JobState.FAILED)

# Sleeps for argv[1] seconds after writing its pid; the tests look for that pid after a cancel.
SLEEPER = "import os, sys, time\nopen('pid', 'w').write(str(os.getpid()))\ntime.sleep(float(sys.argv[1]))\n"


# --------------------------------------------------------------------------- helpers


class Counting:
    """A runner that records every Slurm command the adapter runs (thread-safe)."""

    def __init__(self) -> None:
        self.calls: list[list[str]] = []
        self._lock = threading.Lock()

    def __call__(self, argv: list[str], **kwargs: Any) -> subprocess.CompletedProcess[str]:
        with self._lock:
            self.calls.append(list(argv))
        return run_tool(argv, **kwargs)

    def count(self, tool: str) -> int:
        with self._lock:
            return sum(1 for c in self.calls if c[0] == tool)


def _sled_adapter(base: Path, runner: Any = run_tool, **options: Any) -> SlurmAdapter:
    """The mock solver through the demo template (its path is absolute, so ``base`` is only the config folder)."""
    opts = SlurmOptions(adapter="slurm", template=str(DEMO_TEMPLATE), command=[MOCK_SOLVER, "case.in", "result.out"],
                        poll_interval_s=options.pop("poll_interval_s", 0.2), time_limit_s=options.pop("time_limit_s", 300), **options)
    return SlurmAdapter(opts, QUANTITIES, base, runner=runner)


def _sleeper_adapter(base: Path, runner: Any = run_tool, **options: Any) -> SlurmAdapter:
    folder = base / "sleeper"
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "sleeper.py").write_text(SLEEPER)
    opts = SlurmOptions(adapter="slurm", template="sleeper", command=[sys.executable, "-S", "sleeper.py", "{{ seconds }}"],
                        poll_interval_s=options.pop("poll_interval_s", 0.2), time_limit_s=options.pop("time_limit_s", 600), **options)
    return SlurmAdapter(opts, {}, base, runner=runner)


def _case(base: Path, case_id: int = 1, values: dict[str, Any] | None = None, mach: float = 0.9) -> CaseSpec:
    name = f"d{case_id:04d}-c0"
    return CaseSpec(case_id, name, case_id, values or SLED, {"mach": mach}, base / "campaign" / "cases" / name)


def _wait(adapter: SlurmAdapter, handle: JobHandle, until: tuple[JobState, ...] = TERMINAL, within_s: float = 60.0) -> JobState:
    end = time.monotonic() + within_s
    while True:
        state = adapter.poll(handle)
        if state in until:
            return state
        assert time.monotonic() < end, f"job {handle.job_id} still {state} after {within_s:g} s"
        time.sleep(0.1)


def _squeue(job_id: str, field: str) -> str:
    out = subprocess.run(["squeue", "-h", "-t", "all", "-j", job_id, "-O", f"{field}:{SEP}"], capture_output=True,
                         text=True, check=True).stdout
    return out.split(SEP)[0].strip()


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state not in ("Z", "X")


def _read_out(path: Path) -> dict[str, float]:
    """``key = value`` lines of a mock-solver output file, read without sortie's quantity code."""
    values = {}
    for line in path.read_text().splitlines():
        key, sep, value = line.partition("=")
        if sep and not line.startswith("#"):
            with contextlib.suppress(ValueError):
                values[key.strip()] = float(value)
    return values


# --------------------------------------------------------------------------- real Slurm: end states


@pytest.mark.slow
def test_completed_job_reads_quantities_like_the_solver_wrote_them(slurm: SlurmInfo, slurm_jobs: list[str],
                                                                   tmp_path: Path) -> None:
    adapter = _sled_adapter(tmp_path)
    case = _case(tmp_path)
    handle = adapter.start(case)
    slurm_jobs.append(handle.job_id)
    assert _wait(adapter, handle) is JobState.DONE
    outcome = adapter.collect(handle, case)
    assert outcome.ok, outcome.reason

    # The same deck run here, outside Slurm, must give the same numbers.
    workdir = Path(case.workdir)
    reference = tmp_path / "reference.out"
    subprocess.run([MOCK_SOLVER, str(workdir / "case.in"), str(reference)], check=True)
    expected = _read_out(reference)
    assert outcome.quantities == {"lift": expected["lift"], "drag": expected["drag"]}

    # The job is findable: its name carries the case name, its comment the submission token and folder.
    token = (workdir / SUBMIT_RECORD).read_text().strip()
    assert _squeue(handle.job_id, "Name") == job_name(case.name, workdir)
    assert _squeue(handle.job_id, "Comment") == f"sortie {token} {workdir.resolve()}"
    assert (workdir / EXIT_RECORD).read_text().split() == [token, "0"]


@pytest.mark.slow
def test_failed_job_is_a_solver_failure_naming_its_exit_code(slurm: SlurmInfo, slurm_jobs: list[str], tmp_path: Path) -> None:
    # env reaches the job: without it the mock solver would not crash.
    adapter = _sled_adapter(tmp_path, env={"SORTIE_MOCK_CRASH_RATE": "1", "SORTIE_MOCK_CRASH_EXIT_CODE": "7"})
    case = _case(tmp_path)
    handle = adapter.start(case)
    slurm_jobs.append(handle.job_id)
    assert _wait(adapter, handle) is JobState.FAILED
    assert _squeue(handle.job_id, "State") == "FAILED"
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "solver"
    assert "exited with code 7" in outcome.reason
    assert str(Path(case.workdir).resolve() / STDERR) in outcome.reason
    assert "crashed" in outcome.reason  # the last line of the solver's stderr


@pytest.mark.slow
def test_cancel_ends_the_job_and_kills_the_solver(slurm: SlurmInfo, slurm_jobs: list[str], tmp_path: Path) -> None:
    adapter = _sleeper_adapter(tmp_path)
    case = _case(tmp_path, values={"seconds": 300})
    handle = adapter.start(case)
    slurm_jobs.append(handle.job_id)
    assert _wait(adapter, handle, until=(JobState.RUNNING,)) is JobState.RUNNING
    pid_file = Path(case.workdir) / "pid"
    end = time.monotonic() + 10
    while not pid_file.exists():
        assert time.monotonic() < end, "the solver never wrote its pid"
        time.sleep(0.05)
    pid = int(pid_file.read_text())
    assert _alive(pid)

    adapter.cancel(handle)
    assert _wait(adapter, handle) is JobState.FAILED
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "cancelled", outcome.reason
    end = time.monotonic() + 10
    while _alive(pid):
        assert time.monotonic() < end, f"solver pid {pid} survived the cancel"
        time.sleep(0.1)


@pytest.mark.slow
def test_time_limit_reached_is_a_timeout(slurm: SlurmInfo, slurm_jobs: list[str], tmp_path: Path) -> None:
    """Slurm checks limits about every 30 s: shorten a running job's end and wait (~30-60 s)."""
    adapter = _sleeper_adapter(tmp_path, time_limit_s="0:10:00", poll_interval_s=1.0)
    case = _case(tmp_path, values={"seconds": 600})
    handle = adapter.start(case)
    slurm_jobs.append(handle.job_id)
    _wait(adapter, handle, until=(JobState.RUNNING,))
    end_time = (datetime.now() + timedelta(seconds=2)).strftime("%Y-%m-%dT%H:%M:%S")
    subprocess.run(["scontrol", "update", f"JobId={handle.job_id}", f"EndTime={end_time}"], check=True)
    assert _wait(adapter, handle, within_s=150) is JobState.FAILED
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "timeout", outcome.reason
    assert "time_limit_s=600" in outcome.reason


# --------------------------------------------------------------------------- real Slurm: attach


@pytest.mark.slow
def test_fresh_adapter_attaches_by_id_and_by_name(slurm: SlurmInfo, slurm_jobs: list[str], tmp_path: Path) -> None:
    first = _sleeper_adapter(tmp_path)
    case = _case(tmp_path, values={"seconds": 300})
    handle = first.start(case)
    slurm_jobs.append(handle.job_id)
    _wait(first, handle, until=(JobState.QUEUED, JobState.RUNNING))

    # A restarted orchestrator: new adapter objects that know nothing of the job.
    by_id = _sleeper_adapter(tmp_path).attach(case, handle.job_id, None)
    by_name = _sleeper_adapter(tmp_path).attach(case, None, None)
    assert by_id is not None and by_id.job_id == handle.job_id
    assert by_name is not None and by_name.job_id == handle.job_id

    again = _sleeper_adapter(tmp_path)
    attached = again.attach(case, None, None)
    assert attached is not None
    assert again.poll(attached) in (JobState.QUEUED, JobState.RUNNING)
    again.cancel(attached)
    assert _wait(again, attached) is JobState.FAILED
    assert again.collect(attached, case).failure_class == "cancelled"
    # A cancelled job is nothing to wait for: the case runs again.
    assert _sleeper_adapter(tmp_path).attach(case, handle.job_id, None) is None


@pytest.mark.slow
def test_attach_to_a_job_that_completed_while_nobody_watched(slurm: SlurmInfo, slurm_jobs: list[str], tmp_path: Path) -> None:
    first = _sled_adapter(tmp_path)
    case = _case(tmp_path)
    handle = first.start(case)
    slurm_jobs.append(handle.job_id)
    _wait(first, handle)  # finished; never collected (the orchestrator "died")
    later = _sled_adapter(tmp_path)
    attached = later.attach(case, None, None)
    assert attached is not None and attached.job_id == handle.job_id
    assert later.poll(attached) is JobState.DONE
    outcome = later.collect(attached, case)
    assert outcome.ok and set(outcome.quantities) == {"lift", "drag"}


@pytest.mark.slow
def test_attach_finds_nothing_for_a_case_never_submitted(slurm: SlurmInfo, tmp_path: Path) -> None:
    adapter = _sleeper_adapter(tmp_path)
    case = _case(tmp_path, case_id=5, values={"seconds": 1})
    assert adapter.attach(case, None, None) is None
    Path(case.workdir).mkdir(parents=True)
    (Path(case.workdir) / SUBMIT_RECORD).write_text("0123456789ab\n")  # rendered, then the run died before sbatch
    assert adapter.attach(case, None, None) is None
    assert adapter.attach(case, "987654321", None) is None  # an id Slurm never gave out


@pytest.mark.slow
def test_attach_by_name_cancels_a_job_of_an_earlier_attempt(slurm: SlurmInfo, slurm_jobs: list[str], tmp_path: Path) -> None:
    first = _sleeper_adapter(tmp_path)
    case = _case(tmp_path, values={"seconds": 300})
    old = first.start(case)
    slurm_jobs.append(old.job_id)
    # The next attempt rendered the case folder afresh (new token), then the run died before sbatch.
    (Path(case.workdir) / SUBMIT_RECORD).write_text("feedfacecafe\n")
    assert _sleeper_adapter(tmp_path).attach(case, None, None) is None
    watcher = _sleeper_adapter(tmp_path)
    assert _wait(watcher, JobHandle(case.case_id, old.job_id, 0.0)) is JobState.FAILED
    assert _squeue(old.job_id, "State") == "CANCELLED"


# --------------------------------------------------------------------------- real Slurm: gentle polling


@pytest.mark.slow
def test_one_squeue_per_refresh_for_all_jobs_polled_from_many_threads(slurm: SlurmInfo, slurm_jobs: list[str],
                                                                      tmp_path: Path) -> None:
    runner = Counting()
    interval = 0.5
    adapter = _sleeper_adapter(tmp_path, runner=runner, poll_interval_s=interval)
    # More one-CPU jobs than the partition has CPUs (CPUTot from `scontrol show node`), so once one
    # runs, some must still wait, whatever the host's size and whoever else shares the Slurm.
    n_jobs = slurm.cpus + 4
    handles = []
    for i in range(n_jobs):
        handles.append(adapter.start(_case(tmp_path, case_id=i + 1, values={"seconds": 120})))
        slurm_jobs.append(handles[-1].job_id)
    assert runner.count("sbatch") == n_jobs
    end = time.monotonic() + 60
    while JobState.RUNNING not in {adapter.poll(h) for h in handles}:
        assert time.monotonic() < end, "no job started within 60 s"
        time.sleep(interval)
    runner.calls.clear()

    window_s = 2.0
    stop = time.monotonic() + window_s
    states: Counter[JobState] = Counter()
    lock = threading.Lock()

    def poll_loop(handle: JobHandle) -> None:
        while time.monotonic() < stop:
            state = adapter.poll(handle)
            with lock:
                states[state] += 1
            time.sleep(0.01)  # far more often than the interval: the cache must absorb it

    threads = [threading.Thread(target=poll_loop, args=(h,)) for h in handles]
    for t in threads:
        t.start()
    for t in threads:
        t.join()

    queries = [c for c in runner.calls if c[0] == "squeue"]
    assert set(c[0] for c in runner.calls) == {"squeue"}
    assert 2 <= len(queries) <= window_s / interval + 1, f"{len(queries)} squeue calls in {window_s} s"
    wanted = {h.job_id for h in handles}
    for query in queries:
        assert set(query[query.index("-j") + 1].split(",")) == wanted  # every query covers every job
    assert sum(states.values()) > 10 * len(queries)  # many polls per query
    assert states[JobState.RUNNING] > 0 and states[JobState.QUEUED] > 0  # more jobs than CPUs: some run, some wait
    for h in handles:
        adapter.cancel(h)


# --------------------------------------------------------------------------- real Slurm: set-up errors


@pytest.mark.slow
def test_invalid_partition_is_a_check_problem_and_a_clear_start_error(slurm: SlurmInfo, tmp_path: Path) -> None:
    adapter = _sled_adapter(tmp_path, partition="no_such_partition")
    problems = SlurmAdapter.check(adapter.options, QUANTITIES, tmp_path)
    assert len(problems) == 1 and "partition" in problems[0].lower(), problems
    with pytest.raises(AdapterError) as err:
        adapter.start(_case(tmp_path))
    message = str(err.value)
    assert "partition" in message.lower() and "\n" not in message
    assert SlurmAdapter.check(_sled_adapter(tmp_path, partition=slurm.partition).options, QUANTITIES, tmp_path) == []


# --------------------------------------------------------------------------- no Slurm needed


def test_missing_sbatch_is_one_clear_check_problem(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    opts = SlurmOptions(adapter="slurm", template=str(DEMO_TEMPLATE), command=[MOCK_SOLVER, "case.in", "result.out"])
    problems = SlurmAdapter.check(opts, QUANTITIES, tmp_path)
    assert len(problems) == 1, problems
    assert "sbatch" in problems[0] and "PATH" in problems[0]
    adapter = SlurmAdapter(opts, QUANTITIES, tmp_path)
    with pytest.raises(AdapterError, match="sbatch"):
        adapter.start(_case(tmp_path))


def test_check_reports_a_missing_template_and_quantities_without_files(tmp_path: Path) -> None:
    opts = SlurmOptions(adapter="slurm", template="nowhere", command=[MOCK_SOLVER], partition="x", setup=["true"])
    problems = SlurmAdapter.check(opts, {"cd": QuantitySpec()}, tmp_path)
    assert any(p.startswith("solver.template:") and "nowhere" in p for p in problems), problems
    assert any(p.startswith("quantities.cd:") for p in problems), problems


@pytest.mark.parametrize(("changes", "key"), [
    ({"time_limit_s": "1:75:00"}, "time_limit_s"),
    ({"time_limit_s": "soon"}, "time_limit_s"),
    ({"time_limit_s": 0}, "time_limit_s"),
    ({"time_limit": 60}, "time_limit"),
    ({"memory": "4 GB"}, "memory"),
    ({"cpus": 0}, "cpus"),
    ({"partition": "two words"}, "partition"),
    ({"env": {"1BAD": "x"}}, "env"),
    ({"sbatch_lines": ["--exclusive\n--qos=high"]}, "sbatch_lines"),
    ({"poll_interval_s": 0}, "poll_interval_s"),
    ({"timeout_s": 60}, "timeout_s"),  # the command adapter's key: Slurm's is time_limit_s
    ({"command": []}, "command"),
])
def test_bad_options_are_config_lines_naming_the_key(tmp_path: Path, changes: dict[str, Any], key: str) -> None:
    section = {"adapter": "slurm", "template": str(DEMO_TEMPLATE), "command": [MOCK_SOLVER], **changes}
    with pytest.raises(ValidationError):
        SlurmOptions.model_validate(section)
    problems = registry.check_solver(section, tmp_path)
    assert any(p.startswith(f"solver.{key}") for p in problems), problems


def test_time_limits_in_seconds_and_clock_form_agree_quoted_or_not() -> None:
    assert time_limit_seconds(5400) == time_limit_seconds("5400") == time_limit_seconds("1:30:00") == 90 * 60
    assert time_limit_seconds("90:00") == time_limit_seconds(89.2 * 60 + 47.5) == 90 * 60  # M:SS; fractions round up
    assert time_limit_seconds("2-01:00:05") == 2 * 86400 + 3600 + 5
    # YAML reads an unquoted clock time as base-60 seconds: the same number as the quoted text.
    unquoted = yaml.safe_load("a: 1:30:00\nb: 90:00")
    assert SlurmOptions(adapter="slurm", template="t", command=["x"], time_limit_s=unquoted["a"]).time_limit_s == 5400
    assert SlurmOptions(adapter="slurm", template="t", command=["x"], time_limit_s=unquoted["b"]).time_limit_s == 5400
    ok = SlurmOptions(adapter="slurm", template="t", command=["x"], time_limit_s="2-01:00:05", memory=4000)
    assert ok.time_limit_s == 2 * 86400 + 3600 + 5 and ok.memory == "4000"


def test_batch_script_holds_resources_setup_and_env_and_records_the_exit(tmp_path: Path) -> None:
    """The script is plain bash: run it here (no Slurm) and check what it leaves behind."""
    folder = tmp_path / "tpl"
    folder.mkdir()
    (folder / "solve.py").write_text("import os, sys\nprint(os.environ['SLED_TRACK'])\nsys.exit(int(sys.argv[1]))\n")
    opts = SlurmOptions(adapter="slurm", template="tpl", command=[sys.executable, "-S", "solve.py", "{{ code }}"],
                        partition="short", account="sled-lab", memory="2G", cpus=4, tasks=2, time_limit_s=5400,
                        sbatch_lines=["--exclusive", "#SBATCH --qos=case-{{ case_id }}"],
                        setup=["echo setup for {{ case_name }}"], env={"SLED_TRACK": "north rail"})
    adapter = SlurmAdapter(opts, {}, tmp_path)
    case = CaseSpec(3, "d0003-c1", 3, {"code": 5}, {"mach": 1.1}, tmp_path / "case")
    Path(case.workdir).mkdir()
    text = adapter.batch_script(case, Path(case.workdir), "d0003-c1-abc", "tok123")
    for line in ("#SBATCH --partition=short", "#SBATCH --account=sled-lab", "#SBATCH --mem=2G",
                 "#SBATCH --cpus-per-task=4", "#SBATCH --ntasks=2", "#SBATCH --time=1:30:00",
                 "#SBATCH --exclusive", "#SBATCH --qos=case-3", "#SBATCH --job-name=d0003-c1-abc",
                 "echo setup for d0003-c1"):
        assert line in text.splitlines(), line
    # every #SBATCH line comes before the first command (sbatch stops reading directives there)
    first_command = next(i for i, ln in enumerate(text.splitlines()) if ln and not ln.startswith("#"))
    assert all(i < first_command for i, ln in enumerate(text.splitlines()) if ln.startswith("#SBATCH"))

    (Path(case.workdir) / "solve.py").write_text((folder / "solve.py").read_text())
    script = Path(case.workdir) / SCRIPT
    script.write_text(text)
    result = subprocess.run(["bash", str(script)], cwd=tmp_path, capture_output=True, text=True, check=False)
    assert result.returncode == 5
    assert result.stdout.splitlines() == ["setup for d0003-c1", "north rail"]
    assert (Path(case.workdir) / EXIT_RECORD).read_text().split() == ["tok123", "5"]


def test_a_failing_setup_line_stops_the_script_before_the_solver(tmp_path: Path) -> None:
    opts = SlurmOptions(adapter="slurm", template="t", command=["touch", "solver-ran"], setup=["exit 9"])
    case = CaseSpec(1, "d0001-c0", 1, {}, {}, tmp_path)
    (tmp_path / SCRIPT).write_text(SlurmAdapter(opts, {}, tmp_path).batch_script(case, tmp_path, "n", "tok"))
    result = subprocess.run(["bash", SCRIPT], cwd=tmp_path, check=False)
    assert result.returncode == 9
    assert not (tmp_path / "solver-ran").exists()


# Lines recorded from `squeue -h -t all -j ID -O JobID:<US>,State:<US>,Reason:<US>,exit_code:<US>,Name:<US>,Comment:<US>`
# on Slurm 22.05.8 (scripts/slurm-local.sh) for: `echo hi`, `exit 3` with a line on stderr, scancel
# of a running job, and a time limit reached (EndTime shortened).
RECORDED = {
    "COMPLETED": "1\x1fCOMPLETED\x1fNone\x1f0\x1ft-ok\x1f(null)\x1f",
    "FAILED": "2\x1fFAILED\x1fNonZeroExitCode\x1f768\x1ft-fail\x1f(null)\x1f",
    "CANCELLED": "3\x1fCANCELLED\x1fNone\x1f15\x1ft-long\x1f(null)\x1f",
    "TIMEOUT": "4\x1fTIMEOUT\x1fTimeLimit\x1f15\x1ft-to\x1fsortie abc /tmp/x y\x1f",
}
# States a single test node cannot produce on demand, written in the same shape by hand.
CONSTRUCTED = {
    "OUT_OF_MEMORY": "5\x1fOUT_OF_MEMORY\x1fOutOfMemory\x1f0\x1fsolve\x1f(null)\x1f",
    "NODE_FAIL": "6\x1fNODE_FAIL\x1fNodeDown\x1f0\x1fsolve\x1f(null)\x1f",
    "PREEMPTED": "7\x1fPREEMPTED\x1fNone\x1f15\x1fsolve\x1f(null)\x1f",
    "BOOT_FAIL": "8\x1fBOOT_FAIL\x1fNone\x1f0\x1fsolve\x1f(null)\x1f",
    "DEADLINE": "9\x1fDEADLINE\x1fDeadLine\x1f0\x1fsolve\x1f(null)\x1f",
}
EXPECTED_CLASS = {"COMPLETED": None, "FAILED": "solver", "OUT_OF_MEMORY": "solver", "CANCELLED": "cancelled",
                  "TIMEOUT": "timeout", "DEADLINE": "timeout", "NODE_FAIL": "transient", "PREEMPTED": "transient",
                  "BOOT_FAIL": "transient"}


@pytest.mark.parametrize("state", list(EXPECTED_CLASS))
def test_every_end_state_maps_to_its_failure_class(state: str, tmp_path: Path) -> None:
    line = {**RECORDED, **CONSTRUCTED}[state]
    (job,) = parse_squeue(line + "\n").values()
    assert job.state == state
    assert job.job_state is (JobState.DONE if state == "COMPLETED" else JobState.FAILED)
    opts = SlurmOptions(adapter="slurm", template="t", command=["x"], memory="1G")
    outcome = end_outcome(job, tmp_path, opts)
    if EXPECTED_CLASS[state] is None:
        assert outcome is None
    else:
        assert outcome is not None and outcome.failure_class == EXPECTED_CLASS[state]
        assert outcome.failure_class in FAILURE_CLASSES and f"job {job.job_id}" in outcome.reason


def test_failed_and_out_of_memory_reasons_say_what_to_look_at(tmp_path: Path) -> None:
    (tmp_path / STDERR).write_text("reading mesh\nsegment 4: pressure diverged\n")
    (failed,) = parse_squeue(RECORDED["FAILED"]).values()
    assert (failed.exit_code, failed.signal) == (3, 0)  # raw status 768 is exit 3
    opts = SlurmOptions(adapter="slurm", template="t", command=["x"], memory="1G")
    reason = end_outcome(failed, tmp_path, opts).reason
    assert "exited with code 3" in reason and "pressure diverged" in reason and str(tmp_path / STDERR) in reason
    (oom,) = parse_squeue(CONSTRUCTED["OUT_OF_MEMORY"]).values()
    assert "raise solver.memory" in end_outcome(oom, tmp_path, opts).reason
    (timeout,) = parse_squeue(RECORDED["TIMEOUT"]).values()
    assert timeout.token == "abc" and timeout.comment == "sortie abc /tmp/x y"
    assert "raise solver.time_limit_s" in end_outcome(timeout, tmp_path, opts).reason


@pytest.mark.parametrize(("state", "expected"), [
    ("PENDING", JobState.QUEUED), ("REQUEUED", JobState.QUEUED), ("CONFIGURING", JobState.QUEUED),
    ("RUNNING", JobState.RUNNING), ("COMPLETING", JobState.RUNNING), ("SUSPENDED", JobState.RUNNING),
    ("COMPLETED", JobState.DONE), ("CANCELLED by 0", JobState.FAILED), ("VANISHED", JobState.FAILED),
])
def test_scheduler_states_map_to_job_states(state: str, expected: JobState) -> None:
    assert job_state(state) is expected


def test_sacct_lines_give_exit_code_and_signal() -> None:
    jobs = parse_sacct("11|FAILED|3:0\n12|CANCELLED by 0|0:15\n13|COMPLETED|0:0\n")
    assert (jobs["11"].state, jobs["11"].exit_code, jobs["11"].signal) == ("FAILED", 3, 0)
    assert (jobs["12"].state, jobs["12"].signal) == ("CANCELLED", 15)
    assert jobs["13"].job_state is JobState.DONE


class FakeSlurm:
    """A scripted scheduler for what a real one cannot be made to do on demand (forget a job, go silent)."""

    def __init__(self) -> None:
        self.squeue: subprocess.CompletedProcess[str] | None = None
        self.calls: list[list[str]] = []

    def __call__(self, argv: list[str], **kwargs: Any) -> subprocess.CompletedProcess[str]:
        self.calls.append(list(argv))
        if argv[0] == "sbatch":
            return subprocess.CompletedProcess(argv, 0, "4242\n", "")
        if argv[0] == "squeue":
            assert self.squeue is not None
            return self.squeue
        if argv[0] == "sacct":
            return subprocess.CompletedProcess(argv, 1, "", "sacct: error: Slurm accounting storage is disabled\n")
        return subprocess.CompletedProcess(argv, 0, "", "")


def _fake_started(tmp_path: Path) -> tuple[SlurmAdapter, FakeSlurm, CaseSpec, JobHandle]:
    fake = FakeSlurm()
    adapter = _sled_adapter(tmp_path, runner=fake, poll_interval_s=0.01)
    case = _case(tmp_path)
    return adapter, fake, case, adapter.start(case)


def _collect_after(adapter: SlurmAdapter, handle: JobHandle, case: CaseSpec) -> CaseOutcome:
    time.sleep(0.02)
    assert adapter.poll(handle) in TERMINAL
    return adapter.collect(handle, case)


def test_a_forgotten_job_with_this_attempts_exit_record_is_collected(tmp_path: Path) -> None:
    adapter, fake, case, handle = _fake_started(tmp_path)
    workdir = Path(case.workdir)
    subprocess.run([MOCK_SOLVER, "case.in", "result.out"], cwd=workdir, check=True)  # the job ran ...
    token = (workdir / SUBMIT_RECORD).read_text().strip()
    (workdir / EXIT_RECORD).write_text(f"{token} 0\n")
    fake.squeue = subprocess.CompletedProcess([], 1, "", "slurm_load_jobs error: Invalid job id specified\n")  # ... and was forgotten
    outcome = _collect_after(adapter, handle, case)
    assert outcome.ok and set(outcome.quantities) == {"lift", "drag"}
    assert [c[0] for c in fake.calls] == ["sbatch", "squeue", "sacct"]


def test_a_forgotten_job_without_an_exit_record_is_transient(tmp_path: Path) -> None:
    adapter, fake, case, handle = _fake_started(tmp_path)
    (Path(case.workdir) / EXIT_RECORD).write_text("an-earlier-attempt 0\n")
    fake.squeue = subprocess.CompletedProcess([], 0, "", "")
    outcome = _collect_after(adapter, handle, case)
    assert outcome.failure_class == "transient" and "no longer known" in outcome.reason


def test_a_silent_scheduler_keeps_the_last_state_and_attach_refuses_to_guess(tmp_path: Path) -> None:
    adapter, fake, case, handle = _fake_started(tmp_path)
    fake.squeue = subprocess.CompletedProcess([], 1, "", "squeue: error: Socket timed out on send/recv operation\n")
    time.sleep(0.02)
    assert adapter.poll(handle) is JobState.QUEUED
    fake.squeue = subprocess.CompletedProcess([], 0, f"4242{SEP}RUNNING{SEP}None{SEP}0{SEP}x{SEP}(null){SEP}\n", "")
    time.sleep(0.02)
    assert adapter.poll(handle) is JobState.RUNNING
    fake.squeue = subprocess.CompletedProcess([], 1, "", "squeue: error: Unable to contact slurm controller\n")
    with pytest.raises(AdapterError, match="Slurm controller"):
        _sled_adapter(tmp_path, runner=fake).attach(case, None, None)


def test_slurm_job_token_only_from_sortie_comments() -> None:
    assert SlurmJob("1", "RUNNING", comment="sortie 0a1b /x y").token == "0a1b"
    assert SlurmJob("1", "RUNNING", comment="user note").token is None
    assert SlurmJob("1", "RUNNING").token is None


def test_registered_as_a_detached_adapter() -> None:
    cls = registry.adapter_class("slurm")
    assert cls is SlurmAdapter and cls.detached is True
    assert os.path.basename(MOCK_SOLVER) == "sortie-mock-solver"


def test_attach_ignores_a_recorded_id_now_given_to_another_job(tmp_path: Path) -> None:
    """After a controller reset job ids start again: the recorded id may name someone else's job."""
    _, fake, case, _ = _fake_started(tmp_path)
    token = (Path(case.workdir) / SUBMIT_RECORD).read_text().strip()
    ours = job_name(case.name, Path(case.workdir))
    fake.squeue = subprocess.CompletedProcess([], 0, f"4242{SEP}RUNNING{SEP}None{SEP}0{SEP}wing-sweep{SEP}(null){SEP}\n", "")
    assert _sled_adapter(tmp_path, runner=fake).attach(case, "4242", None) is None
    fake.squeue = subprocess.CompletedProcess([], 0, f"4242{SEP}RUNNING{SEP}None{SEP}0{SEP}wing-sweep{SEP}(null){SEP}\n"
                                                     f"77{SEP}PENDING{SEP}Resources{SEP}0{SEP}{ours}{SEP}sortie {token} /x{SEP}\n", "")
    found = _sled_adapter(tmp_path, runner=fake).attach(case, "4242", None)
    assert found is not None and found.job_id == "77"
