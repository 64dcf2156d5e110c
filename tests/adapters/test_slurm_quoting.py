"""Values placed into the Slurm batch script stay data: each placeholder in ``setup`` and
``sbatch_lines`` is one quoted shell word, and a line break or NUL is refused.

The choice values below are shell code if pasted unquoted: ``$(touch x)`` would create a file
``x`` and ``a;b`` would run a command ``b``. The script is checked as text, run by bash here,
and run by the real Slurm (``tests/slurm_support.py``; skipped with a reason where there is none).
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest
from pydantic import ValidationError

from sortie.adapters.base import CaseSpec, JobState
from sortie.adapters.slurm import SCRIPT, SlurmAdapter, SlurmOptions

if TYPE_CHECKING:
    from tests.slurm_support import SlurmInfo

pytest_plugins = ["tests.slurm_support"]

HOSTILE = {"shape": "$(touch x)", "tag": "a;b"}
# The solver writes what its environment holds, so the test sees what the #SBATCH line passed on.
SOLVER = "import os\nopen('from-env.txt', 'w').write(os.environ['SLED_SHAPE'])\n"


def _adapter(base: Path, **options: Any) -> SlurmAdapter:
    (base / "template").mkdir(parents=True, exist_ok=True)
    (base / "template" / "solver.py").write_text(SOLVER)
    settings: dict[str, Any] = {
        "adapter": "slurm", "template": "template", "command": [sys.executable, "-S", "solver.py"],
        "setup": ["echo {{ shape }} > from-setup.txt", "echo {{ tag }} >> from-setup.txt"],
        "sbatch_lines": ["--export=ALL,SLED_SHAPE={{ shape }}"], "poll_interval_s": 0.2, "time_limit_s": 120,
        **options}
    return SlurmAdapter(SlurmOptions(**settings), {}, base)


def _case(base: Path, values: dict[str, str]) -> CaseSpec:
    return CaseSpec(1, "d0001-c0", 1, values, {"mach": 0.9}, base / "campaign" / "cases" / "d0001-c0")


def test_placeholders_in_setup_and_sbatch_lines_are_quoted_shell_words(tmp_path: Path) -> None:
    adapter = _adapter(tmp_path)
    case = _case(tmp_path, HOSTILE)
    workdir = Path(case.workdir)
    workdir.mkdir(parents=True)
    text = adapter.batch_script(case, workdir, "d0001-c0-tag", "tok")
    lines = text.splitlines()
    assert "#SBATCH --export=ALL,SLED_SHAPE='$(touch x)'" in lines
    assert "echo '$(touch x)' > from-setup.txt" in lines
    assert "echo 'a;b' >> from-setup.txt" in lines

    # bash reads it as data: the set-up lines echo the values, and nothing named x or b runs.
    (workdir / "solver.py").write_text(SOLVER)
    (workdir / SCRIPT).write_text(text)
    result = subprocess.run(["bash", SCRIPT], cwd=workdir, capture_output=True, text=True, check=False,
                            env={"PATH": "/usr/bin:/bin", "SLED_SHAPE": HOSTILE["shape"]})
    assert result.returncode == 0, result.stderr
    assert (workdir / "from-setup.txt").read_text() == "$(touch x)\na;b\n"
    assert not (workdir / "x").exists()


def test_plain_values_are_left_as_they_are(tmp_path: Path) -> None:
    adapter = _adapter(tmp_path, setup=["module load solver/{{ version }}"], sbatch_lines=["--qos=case-{{ case_id }}"])
    case = _case(tmp_path, {"version": "2.1.0"})
    text = adapter.batch_script(case, Path(case.workdir), "n", "tok")
    assert "module load solver/2.1.0" in text.splitlines()
    assert "#SBATCH --qos=case-1" in text.splitlines()


@pytest.mark.parametrize("key", ["setup", "sbatch_lines", "command"])
@pytest.mark.parametrize("value", ["one\nsbatch --wrap='touch x'", "cr\rline", "nul\0byte"])
def test_a_value_with_a_line_break_or_nul_fails_the_case_in_one_line(key: str, value: str, tmp_path: Path) -> None:
    only_there = {"setup": [], "sbatch_lines": [], "command": [sys.executable, "-S", "solver.py"],
                  key: {"setup": ["echo {{ shape }}"], "sbatch_lines": ["--comment={{ shape }}"],
                        "command": [sys.executable, "-S", "solver.py", "{{ shape }}"]}[key]}
    adapter = _adapter(tmp_path, **only_there)
    case = _case(tmp_path, {"shape": value, "tag": "t"})
    handle = adapter.start(case)  # nothing is submitted: the script cannot be written
    assert handle.job_id == ""
    assert adapter.poll(handle) is JobState.FAILED
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "solver"
    assert outcome.reason is not None and "\n" not in outcome.reason and "\r" not in outcome.reason
    assert f"solver.{key}[" in outcome.reason and "holds a line break or NUL" in outcome.reason
    assert not (Path(case.workdir) / SCRIPT).exists()


@pytest.mark.parametrize(("key", "value"), [("setup", ["echo a\necho b"]), ("sbatch_lines", ["--qos=a\0"]),
                                            ("command", ["solve", "deck\n.in"]), ("env", {"TRACK": "north\nrail"})])
def test_a_literal_line_break_or_nul_in_the_options_is_refused(key: str, value: Any) -> None:
    with pytest.raises(ValidationError, match="line break or NUL"):
        SlurmOptions(**{"adapter": "slurm", "template": "t", "command": ["solve"], key: value})


@pytest.mark.slow
def test_real_slurm_runs_hostile_values_as_data(slurm: SlurmInfo, slurm_jobs: list[str], tmp_path: Path) -> None:
    adapter = _adapter(tmp_path)
    case = _case(tmp_path, HOSTILE)
    handle = adapter.start(case)
    slurm_jobs.append(handle.job_id)
    end = time.monotonic() + 60
    while adapter.poll(handle) not in (JobState.DONE, JobState.FAILED):
        assert time.monotonic() < end, f"job {handle.job_id} did not end within 60 s"
        time.sleep(0.2)
    outcome = adapter.collect(handle, case)
    workdir = Path(case.workdir)
    assert outcome.ok, outcome.reason
    assert (workdir / "from-setup.txt").read_text() == "$(touch x)\na;b\n"
    assert (workdir / "from-env.txt").read_text() == "$(touch x)"  # sbatch took the quoted word as one value
    assert not list(tmp_path.rglob("x"))
