"""The local command adapter: real processes in a real process group, killed whole.

Every solver here is a small Python script written into the test's template folder and run as
``[sys.executable, "-S", "<script>.py", ...]``; nothing depends on the mock solver.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import signal
import subprocess
import sys
import textwrap
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from sortie.adapters import registry
from sortie.adapters.base import CaseSpec, JobHandle, JobState
from sortie.adapters.command import STDERR, STDOUT, CommandAdapter, CommandOptions, kill_group
from sortie.config import QuantitySpec
from sortie.errors import AdapterError, ConfigError
from tests.adapters.tiny_campaign import write_template

PY = [sys.executable, "-S"]

# A solver that starts a child, which starts a grandchild; each records its pid, and the
# solver publishes all three in pids.txt once the whole tree is up. argv: mode level then
#   mode: "obey" (SIGTERM is recorded in term-<level>, then the default action kills) or
#         "ignore-term" (SIGTERM is ignored, so only SIGKILL ends it)
#   then: "sleep" (the solver sleeps forever) or "exit" (the solver writes out.txt and exits 0,
#         leaving its child and grandchild behind)
TREE = textwrap.dedent('''\
    import os, signal, subprocess, sys, time
    from pathlib import Path

    mode, level, then = sys.argv[1], int(sys.argv[2]), sys.argv[3]
    here = Path.cwd()

    def publish(name, text):
        tmp = here / (name + ".tmp")
        tmp.write_text(text)
        os.replace(tmp, here / name)

    if mode == "ignore-term":
        signal.signal(signal.SIGTERM, signal.SIG_IGN)
    else:
        def on_term(signum, frame):
            publish("term-%d" % level, "x")
            signal.signal(signal.SIGTERM, signal.SIG_DFL)
            os.kill(os.getpid(), signal.SIGTERM)
        signal.signal(signal.SIGTERM, on_term)

    publish("pid-%d" % level, str(os.getpid()))
    if level < 2:
        subprocess.Popen([sys.executable, "-S", __file__, mode, str(level + 1), then])
    if level == 0:
        while not all((here / ("pid-%d" % i)).exists() for i in range(3)):
            time.sleep(0.005)
        publish("pids.txt", " ".join((here / ("pid-%d" % i)).read_text() for i in range(3)))
        if then == "exit":
            (here / "out.txt").write_text("cd = 0.25\\n")
            sys.exit(0)
    while True:
        time.sleep(0.02)
''')


# --------------------------------------------------------------------------- helpers


def _alive(pid: int) -> bool:
    """True while ``pid`` exists and is not a zombie (a zombie has already died)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, ProcessLookupError, IndexError):
        return False
    return state not in ("Z", "X")


def _wait_gone(pids: list[int], within_s: float = 0.5) -> list[int]:
    """Pids still alive after ``within_s`` (SIGKILL is delivered asynchronously, so allow a moment)."""
    end = time.monotonic() + within_s
    while True:
        left = [p for p in pids if _alive(p)]
        if not left or time.monotonic() > end:
            return left
        time.sleep(0.01)


@pytest.fixture
def reaper() -> Iterator[list[int]]:
    """Pids the test started indirectly; any still alive at teardown are SIGKILLed by id."""
    pids: list[int] = []
    yield pids
    for pid in pids:
        if _alive(pid):
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)


def _template(base: Path, files: dict[str, str]) -> None:
    folder = base / "template"
    folder.mkdir(parents=True, exist_ok=True)
    for name, text in files.items():
        (folder / name).write_text(text)


def _adapter(base: Path, command: list[str], quantities: dict[str, QuantitySpec] | None = None,
             **options: object) -> CommandAdapter:
    opts = CommandOptions(adapter="command", template="template", command=command, **options)
    return CommandAdapter(opts, quantities or {}, base)


def _case(base: Path, case_id: int = 1, **condition: float) -> CaseSpec:
    name = f"d0001-c{case_id}"
    return CaseSpec(case_id=case_id, name=name, design_id=1, values={"ramp_angle": 8.0},
                    condition=condition or {"mach": 0.9}, workdir=base / "cases" / name)


def _run(adapter: CommandAdapter, handle: JobHandle, limit_s: float = 10.0) -> JobState:
    end = time.monotonic() + limit_s
    while True:
        state = adapter.poll(handle)
        if state in (JobState.DONE, JobState.FAILED):
            return state
        assert time.monotonic() < end, "the solver did not end within the test's limit"
        time.sleep(0.02)


def _wait_for_pids(workdir: Path, reaper: list[int], limit_s: float = 5.0) -> list[int]:
    path = workdir / "pids.txt"
    end = time.monotonic() + limit_s
    while not path.exists():
        assert time.monotonic() < end, "the solver's process tree did not come up"
        time.sleep(0.01)
    pids = [int(p) for p in path.read_text().split()]
    reaper.extend(pids)
    assert len(pids) == 3
    return pids


def _run_tree(tmp_path: Path, reaper: list[int], mode: str, then: str, **options: object):
    _template(tmp_path, {"tree.py": TREE})
    quantities = {"cd": QuantitySpec(file="out.txt", key="cd")}
    adapter = _adapter(tmp_path, [*PY, "tree.py", mode, "0", then], quantities, **options)
    case = _case(tmp_path)
    handle = adapter.start(case)
    pids = _wait_for_pids(case.workdir, reaper)
    return adapter, case, handle, pids


def _poll_until_end(adapter: CommandAdapter, handle: JobHandle) -> tuple[JobState, float]:
    """Poll until the job ends; return the end state and how long the last (killing) poll took."""
    end = time.monotonic() + 10
    while True:
        t0 = time.monotonic()
        state = adapter.poll(handle)
        took = time.monotonic() - t0
        if state is not JobState.RUNNING:
            return state, took
        assert time.monotonic() < end
        time.sleep(0.02)


# --------------------------------------------------------------------------- killing


def test_timeout_kills_whole_process_group(tmp_path, reaper):
    adapter, case, handle, pids = _run_tree(tmp_path, reaper, "obey", "sleep", timeout_s=1.0, kill_grace_s=5.0)
    assert all(_alive(p) for p in pids)
    assert handle.pgid == os.getpgid(pids[0])  # the solver's group, led by the wrapper shell
    state, took = _poll_until_end(adapter, handle)
    assert state is JobState.FAILED
    assert _wait_gone(pids) == []
    # SIGTERM went to every member of the group, and they all went without waiting for SIGKILL.
    assert all((case.workdir / f"term-{level}").exists() for level in range(3))
    assert took < 4.0
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "timeout"
    assert "timeout_s=1" in outcome.reason
    assert str(case.workdir / STDOUT) in outcome.reason


def test_timeout_kills_group_that_ignores_sigterm(tmp_path, reaper):
    grace = 0.4
    adapter, case, handle, pids = _run_tree(tmp_path, reaper, "ignore-term", "sleep", timeout_s=1.0, kill_grace_s=grace)
    state, took = _poll_until_end(adapter, handle)
    assert state is JobState.FAILED
    # The adapter waited the grace period for SIGTERM to work, then had to send SIGKILL.
    assert took >= grace
    assert _wait_gone(pids) == []
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "timeout"
    assert str(case.workdir / STDOUT) in outcome.reason


def test_cancel_kills_whole_process_group(tmp_path, reaper):
    adapter, _case_spec, handle, pids = _run_tree(tmp_path, reaper, "ignore-term", "sleep", timeout_s=60, kill_grace_s=0.2)
    assert adapter.poll(handle) is JobState.RUNNING
    adapter.cancel(handle)
    assert _wait_gone(pids) == []
    # Cancelling again, or cancelling a case the adapter never tracked, is harmless.
    adapter.cancel(handle)


def test_children_left_behind_by_a_finished_solver_are_killed(tmp_path, reaper):
    adapter, case, handle, pids = _run_tree(tmp_path, reaper, "obey", "exit", timeout_s=30, kill_grace_s=5.0)
    leader, *children = pids
    assert _run(adapter, handle) is JobState.DONE
    assert not _alive(leader)
    assert _wait_gone(children) == []
    assert all((case.workdir / f"term-{level}").exists() for level in (1, 2))
    outcome = adapter.collect(handle, case)
    assert outcome.ok, outcome.reason
    assert outcome.quantities == {"cd": 0.25}


def test_children_left_behind_that_ignore_sigterm_are_killed(tmp_path, reaper):
    adapter, _case_spec, handle, pids = _run_tree(tmp_path, reaper, "ignore-term", "exit", timeout_s=30, kill_grace_s=0.2)
    assert _run(adapter, handle) is JobState.DONE
    assert _wait_gone(pids) == []


# --------------------------------------------------------------------------- failures are data


def _one_shot(tmp_path: Path, script: str, quantities: dict[str, QuantitySpec] | None = None):
    _template(tmp_path, {"solver.py": textwrap.dedent(script)})
    adapter = _adapter(tmp_path, [*PY, "solver.py"], quantities, timeout_s=30, kill_grace_s=1)
    case = _case(tmp_path)
    handle = adapter.start(case)
    state = _run(adapter, handle)
    return state, adapter.collect(handle, case), case


def test_nonzero_exit_is_a_solver_failure_naming_code_last_stderr_line_and_file(tmp_path):
    state, outcome, case = _one_shot(tmp_path, """\
        import sys
        print("reading mesh", file=sys.stderr)
        print("FATAL: cell 1204 has negative volume", file=sys.stderr)
        print("", file=sys.stderr)
        sys.exit(3)
    """, {"cd": QuantitySpec(file="out.txt", key="cd")})
    assert state is JobState.FAILED
    assert outcome.failure_class == "solver"
    assert "exited with code 3" in outcome.reason
    assert "FATAL: cell 1204 has negative volume" in outcome.reason
    assert "reading mesh" not in outcome.reason
    assert str(case.workdir / STDERR) in outcome.reason


def test_solver_killed_by_a_signal_is_reported_as_a_signal(tmp_path):
    state, outcome, case = _one_shot(tmp_path, """\
        import os, signal
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    assert state is JobState.FAILED
    assert outcome.failure_class == "solver"
    assert f"killed by signal {int(signal.SIGKILL)}" in outcome.reason
    assert str(case.workdir / STDERR) in outcome.reason


def test_missing_output_file_is_an_output_failure_naming_the_file(tmp_path):
    state, outcome, case = _one_shot(tmp_path, "print('converged')\n",
                                     {"cd": QuantitySpec(file="forces.dat", key="cd")})
    assert state is JobState.DONE
    assert outcome.failure_class == "output"
    assert str(case.workdir / "forces.dat") in outcome.reason
    assert "not written" in outcome.reason


def test_unparsable_value_is_an_output_failure(tmp_path):
    state, outcome, _ = _one_shot(tmp_path, """\
        open("forces.dat", "w").write("cd = diverged\\n")
    """, {"cd": QuantitySpec(file="forces.dat", key="cd")})
    assert state is JobState.DONE
    assert outcome.failure_class == "output"
    assert "'diverged'" in outcome.reason
    assert "not a number" in outcome.reason


def test_pattern_that_matches_nothing_is_an_output_failure(tmp_path):
    state, outcome, case = _one_shot(tmp_path, """\
        open("log.txt", "w").write("iteration 1 residual 1e-3\\n")
    """, {"cd": QuantitySpec(file="log.txt", pattern=r"Cd = (?P<value>\S+)")})
    assert state is JobState.DONE
    assert outcome.failure_class == "output"
    assert str(case.workdir / "log.txt") in outcome.reason


@pytest.mark.parametrize("text", ["nan", "inf", "-inf", "NaN"])
def test_non_finite_value_is_an_output_failure(tmp_path, text):
    state, outcome, _ = _one_shot(tmp_path, f"""\
        open("forces.dat", "w").write("cd = {text}\\n")
    """, {"cd": QuantitySpec(file="forces.dat", key="cd")})
    assert state is JobState.DONE
    assert outcome.failure_class == "output"
    assert "finite" in outcome.reason


def test_success_reads_each_quantity_by_its_rule(tmp_path):
    _template(tmp_path, {"solver.py": textwrap.dedent("""\
        import json, sys
        mach = float(sys.argv[1])
        with open("log.txt", "w") as f:
            for it, cd in enumerate([0.5, 0.4, 0.31]):
                f.write("iter %d  Cd = %s\\n" % (it, cd))
        with open("forces.dat", "w") as f:
            f.write("# integrated forces\\nfz = 10.0\\nfz = 12.5\\nmoment = 3\\n")
        with open("history.csv", "w") as f:
            f.write("iter,cl,cm\\n1,0.1,0.01\\n2,0.2,0.02\\n3,0.3,-0.03\\n")
        with open("result.json", "w") as f:
            json.dump(dict(forces=dict(fz=[1.0, 2.0, mach * 10]), solver="x"), f)
        print("done")
    """)})
    quantities = {
        "cd": QuantitySpec(file="log.txt", pattern=r"Cd = (?P<value>\S+)"),
        "fz": QuantitySpec(file="forces.dat", key="fz"),
        "cm": QuantitySpec(file="history.csv", column="cm"),
        "fz_json": QuantitySpec(file="result.json", json_path="forces.fz.2"),
    }
    adapter = _adapter(tmp_path, [*PY, "solver.py", "{{ mach }}"], quantities, timeout_s=30)
    case = _case(tmp_path, mach=0.9)
    handle = adapter.start(case)
    assert _run(adapter, handle) is JobState.DONE
    outcome = adapter.collect(handle, case)
    assert outcome.ok, outcome.reason
    assert outcome.quantities == {"cd": 0.31, "fz": 12.5, "cm": -0.03, "fz_json": pytest.approx(9.0)}
    assert math.isfinite(outcome.quantities["fz_json"])
    assert (case.workdir / STDOUT).read_text() == "done\n"


def test_start_again_begins_from_a_fresh_case_folder(tmp_path):
    _template(tmp_path, {"solver.py": "open('out.txt', 'w').write('cd = 1\\n')\n"})
    adapter = _adapter(tmp_path, [*PY, "solver.py"], {"cd": QuantitySpec(file="out.txt", key="cd")})
    case = _case(tmp_path)
    case.workdir.mkdir(parents=True)
    (case.workdir / "stale.txt").write_text("from an earlier attempt")
    handle = adapter.start(case)
    assert _run(adapter, handle) is JobState.DONE
    assert adapter.collect(handle, case).quantities == {"cd": 1.0}
    assert not (case.workdir / "stale.txt").exists()


def test_collect_of_an_untracked_job_is_transient(tmp_path):
    _template(tmp_path, {"solver.py": "pass\n"})
    adapter = _adapter(tmp_path, [*PY, "solver.py"])
    case = _case(tmp_path)
    handle = JobHandle(case.case_id, "999999", time.time(), pgid=None)
    assert adapter.poll(handle) is JobState.FAILED
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "transient"


def test_program_missing_at_start_is_an_adapter_error(tmp_path):
    _template(tmp_path, {"deck.in": "x\n"})
    adapter = _adapter(tmp_path, ["sortie-no-such-solver-program"])
    with pytest.raises(AdapterError, match="sortie-no-such-solver-program"):
        adapter.start(_case(tmp_path))


def test_run_script_shipped_in_the_template_can_be_the_command(tmp_path):
    template = tmp_path / "template"
    template.mkdir()
    script = template / "run.sh"
    script.write_text("#!/bin/sh\necho \"cd = 0.5\" > out.txt\n")
    script.chmod(0o755)
    quantities = {"cd": QuantitySpec(file="out.txt", key="cd")}
    options = CommandOptions(adapter="command", template="template", command=["./run.sh"])
    assert CommandAdapter.check(options, quantities, tmp_path) == []
    adapter = CommandAdapter(options, quantities, tmp_path)
    case = _case(tmp_path)
    handle = adapter.start(case)
    assert _run(adapter, handle) is JobState.DONE
    assert adapter.collect(handle, case).quantities == {"cd": 0.5}


# --------------------------------------------------------------------------- registry and checks


def test_unknown_adapter_name_suggests_the_closest_one():
    with pytest.raises(AdapterError) as info:
        registry.adapter_class("comand")
    message = str(info.value)
    assert "did you mean 'command'?" in message
    assert message.startswith("solver.adapter: 'comand'")
    assert "\n" not in message


def test_installed_adapters_load_through_the_entry_point_group():
    assert registry.adapter_class("command") is CommandAdapter
    assert {"command", "python"} <= set(registry.available())


def test_check_solver_reports_unknown_option_keys_under_solver(tmp_path):
    (tmp_path / "template").mkdir()
    problems = registry.check_solver({"adapter": "command", "template": "template", "command": [sys.executable],
                                      "timeout": 10}, tmp_path)
    assert len(problems) == 1
    assert problems[0].startswith("solver.timeout:")
    assert "unknown key" in problems[0]
    assert "timeout_s" in problems[0]


def test_check_solver_reports_missing_template_folder(tmp_path):
    problems = registry.check_solver({"adapter": "command", "template": "no-such-folder", "command": [sys.executable]},
                                     tmp_path)
    assert len(problems) == 1
    assert problems[0].startswith("solver.template:")
    assert str(tmp_path / "no-such-folder") in problems[0]


def test_check_solver_reports_program_not_on_path(tmp_path):
    (tmp_path / "template").mkdir()
    problems = registry.check_solver({"adapter": "command", "template": "template",
                                      "command": ["sortie-no-such-solver-program", "-in", "deck"]}, tmp_path)
    assert len(problems) == 1
    assert problems[0].startswith("solver.command:")
    assert "'sortie-no-such-solver-program'" in problems[0]
    assert "PATH" in problems[0]


def test_check_solver_reports_quantity_without_file_for_command_adapter(tmp_path):
    (tmp_path / "template").mkdir()
    problems = registry.check_solver({"adapter": "command", "template": "template", "command": [sys.executable]},
                                     tmp_path, {"cd": {}})
    assert problems == [p for p in problems if p.startswith("quantities.cd:")]
    assert len(problems) == 1


def test_check_solver_lists_every_problem_together(tmp_path):
    problems = registry.check_solver({"adapter": "command", "template": "missing",
                                      "command": ["sortie-no-such-solver-program"]}, tmp_path,
                                     {"cd": {}})
    assert sorted(p.split(":")[0] for p in problems) == ["quantities.cd", "solver.command", "solver.template"]


def test_check_solver_of_a_good_section_is_clean_and_builds(tmp_path):
    (tmp_path / "template").mkdir()
    section = {"adapter": "command", "template": "template", "command": [sys.executable, "solver.py"]}
    quantities = {"cd": QuantitySpec(file="out.txt", key="cd")}
    assert registry.check_solver(section, tmp_path, quantities) == []
    adapter = registry.build_adapter(section, quantities, tmp_path)
    assert isinstance(adapter, CommandAdapter)


def test_build_adapter_raises_config_error_with_all_problems(tmp_path):
    with pytest.raises(ConfigError) as info:
        registry.build_adapter({"adapter": "comand"}, {}, tmp_path)
    assert len(info.value.problems) == 1
    assert "did you mean 'command'?" in info.value.problems[0]


# --------------------------------------------------------------------------- re-attaching after a restart

SLOW_SOLVER = textwrap.dedent('''\
    import sys, time
    from pathlib import Path
    Path("started").write_text("x")
    while not Path("go").exists():
        time.sleep(0.01)
    Path("out.txt").write_text("cd = 0.31\\n")
    sys.exit(int(sys.argv[1]))
''')


def _slow(tmp_path: Path, code: int = 0, **options: object) -> tuple[CommandAdapter, CaseSpec, JobHandle]:
    _template(tmp_path, {"slow.py": SLOW_SOLVER})
    adapter = _adapter(tmp_path, [*PY, "slow.py", str(code)], {"cd": QuantitySpec(file="out.txt", key="cd")}, **options)
    case = _case(tmp_path)
    handle = adapter.start(case)
    end = time.monotonic() + 5
    while not (case.workdir / "started").exists():
        assert time.monotonic() < end
        time.sleep(0.01)
    return adapter, case, handle


def test_a_new_orchestrator_waits_for_a_solver_still_running_and_collects_it(tmp_path: Path) -> None:
    first, case, handle = _slow(tmp_path)
    second = _adapter(tmp_path, first.options.command, first.quantities)  # as after a restart: knows nothing
    attached = second.attach(case, None, None)  # even without the ledger's job id: the case folder knows
    assert attached is not None and attached.pgid == handle.pgid
    assert second.poll(attached) is JobState.RUNNING
    (case.workdir / "go").write_text("x")
    assert _run(second, attached) is JobState.DONE
    assert second.collect(attached, case).quantities == {"cd": 0.31}


def test_a_solver_that_ended_while_no_orchestrator_watched_is_collected_with_its_exit_status(tmp_path: Path) -> None:
    first, case, handle = _slow(tmp_path, code=3)
    (case.workdir / "go").write_text("x")
    assert _run(first, handle) is JobState.FAILED  # the first orchestrator sees it end, then "dies"
    second = _adapter(tmp_path, first.options.command, first.quantities)
    attached = second.attach(case, handle.job_id, handle.pgid)
    assert attached is not None
    assert _run(second, attached) is JobState.FAILED
    outcome = second.collect(attached, case)
    assert outcome.failure_class == "solver" and "exited with code 3" in outcome.reason


def test_a_solver_whose_orchestrator_died_right_after_starting_it_is_collected_not_run_again(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # The orchestrator "dies" the instant the solver's process exists, before it can write
    # anything: the wrapper itself must have recorded the job, or the finished solver would leave
    # no record and its case would run twice.
    real_popen = subprocess.Popen

    def popen_then_die(*args: object, **kwargs: object) -> subprocess.Popen:
        real_popen(*args, **kwargs)
        raise KeyboardInterrupt("killed right after starting the solver")

    _template(tmp_path, {})
    adapter = _adapter(tmp_path, ["/bin/sh", "-c", "echo 'cd = 0.5' > out.txt"], {"cd": QuantitySpec(file="out.txt", key="cd")})
    case = _case(tmp_path)
    monkeypatch.setattr("sortie.adapters.command.subprocess.Popen", popen_then_die)
    with pytest.raises(KeyboardInterrupt):
        adapter.start(case)
    monkeypatch.undo()
    end = time.monotonic() + 5
    while not (case.workdir / ".solver-exit").exists():
        assert time.monotonic() < end, "the orphaned solver did not finish"
        time.sleep(0.01)
    second = _adapter(tmp_path, adapter.options.command, adapter.quantities)  # a restart that knows no job id
    attached = second.attach(case, None, None)
    assert attached is not None, "the finished orphan was found from its own record"
    assert _run(second, attached) is JobState.DONE
    assert second.collect(attached, case).quantities == {"cd": 0.5}


def test_a_case_folder_without_a_job_record_is_cleaned_and_run_again(tmp_path: Path, reaper: list[int]) -> None:
    adapter, case, handle = _slow(tmp_path)
    (case.workdir / ".sortie-job").unlink()  # as if the orchestrator died before writing it
    assert adapter.attach(case, None, None) is None
    assert _wait_gone([handle.pgid], within_s=2.0) == [], "the stray solver was killed"


def test_a_reused_process_id_is_never_killed(tmp_path: Path, reaper: list[int]) -> None:
    adapter, case, handle = _slow(tmp_path)
    other = subprocess.Popen([sys.executable, "-S", "-c", "import time; time.sleep(30)"], start_new_session=True,
                             cwd=tmp_path)
    reaper.append(other.pid)
    (case.workdir / ".sortie-job").write_text(json.dumps({"pgid": other.pid, "started_at": time.time()}))
    kill_group(handle.pgid, 0.5, None)
    assert adapter.attach(case, str(other.pid), other.pid) is None  # that group does not work in the case folder
    assert _alive(other.pid)
    other.kill()
    other.wait()


def test_a_reattached_solver_keeps_its_original_deadline(tmp_path: Path) -> None:
    first, case, handle = _slow(tmp_path, timeout_s=1.0, kill_grace_s=0.2)
    time.sleep(1.1)
    second = _adapter(tmp_path, first.options.command, first.quantities, timeout_s=1.0, kill_grace_s=0.2)
    attached = second.attach(case, handle.job_id, handle.pgid)
    assert attached is not None
    assert second.poll(attached) is JobState.FAILED  # already past its timeout: killed at the first poll
    assert second.collect(attached, case).failure_class == "timeout"


# --------------------------------------------------------------------------- relative campaign folders


@pytest.mark.parametrize("campaign", ["campaigns/tiny", "./runs/../campaigns/tiny"])
def test_a_solver_shipped_in_the_template_runs_under_a_relative_campaign_folder(
        campaign: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """``command: [./solver.py, ...]`` with the case folder relative to our working directory (the
    default ``campaigns/<name>``): the solver starts in its case folder and is found there."""
    write_template(tmp_path / "template")
    monkeypatch.chdir(tmp_path)
    adapter = _adapter(tmp_path, ["./solver.py", "out.txt"], {"lift": QuantitySpec(file="out.txt", key="lift")})
    case = CaseSpec(1, "d0001-c0", 1, {"ramp_angle": 8.0}, {"mach": 0.5}, Path(campaign) / "cases" / "d0001-c0")
    handle = adapter.start(case)
    assert _run(adapter, handle) is JobState.DONE, (Path(case.workdir) / STDERR).read_text()
    outcome = adapter.collect(handle, case)
    assert outcome.ok, outcome.reason
    assert outcome.quantities == {"lift": 4.0}
