"""Tests that need a real Slurm: find out whether one is usable, skip (or fail) clearly if not.

On a laptop without Slurm these tests skip with the reason. In CI (``.ci/run`` starts a private
Slurm with ``scripts/slurm-local.sh`` and sets ``SORTIE_REQUIRE_SLURM=1``) a missing or broken
Slurm is a test *failure*, so the Slurm tests can never pass by silently skipping.

Use it from any test file in one of two ways::

    pytest_plugins = ["tests.slurm_support"]       # then ask for the fixtures by name

    def test_something(slurm: SlurmInfo, slurm_jobs: list[str]) -> None:
        ...  # slurm_jobs: append job ids; they are scancelled at teardown

or call ``require_slurm()`` at the top of a test (or a fixture of your own).
"""

from __future__ import annotations

import functools
import os
import shutil
import subprocess
from collections.abc import Iterator
from dataclasses import dataclass

import pytest

REQUIRE_ENV = "SORTIE_REQUIRE_SLURM"
START_HINT = "start one with `scripts/slurm-local.sh start` as root (needs apt packages slurmctld slurmd slurm-client munge)"
_READY_NODE_STATES = ("idle", "mixed", "allocated", "completing")


@dataclass(frozen=True)
class SlurmInfo:
    """What a test may want to know about the Slurm it runs against."""

    partition: str
    #: CPUTot summed over the partition's nodes (``scontrol show node``): no more one-CPU jobs run at once
    cpus: int


def _run(argv: list[str], timeout: float = 15.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run(argv, capture_output=True, text=True, timeout=timeout, check=False, stdin=subprocess.DEVNULL)


@functools.lru_cache(maxsize=1)
def _probe() -> tuple[SlurmInfo | None, str]:
    """Ask Slurm once per session: client tools present, controller answering, a node ready."""
    missing = [t for t in ("sbatch", "squeue", "scancel", "scontrol", "sinfo") if shutil.which(t) is None]
    if missing:
        return None, f"Slurm's {', '.join(missing)} not on PATH; {START_HINT}"
    try:
        result = _run(["sinfo", "-h", "-o", "%P|%T"])
    except subprocess.TimeoutExpired:
        return None, f"sinfo did not answer within 15 s (no Slurm controller?); {START_HINT}"
    if result.returncode != 0:
        message = (result.stderr.strip().splitlines() or ["no message"])[-1]
        return None, f"the Slurm controller does not answer ({message}); {START_HINT}"
    default = first = None
    for line in result.stdout.splitlines():
        partition, state = [*line.split("|"), "", ""][:2]
        if state.rstrip("*~#!%$@^-") not in _READY_NODE_STATES:
            continue
        name = partition.rstrip("*")
        first = first or name
        if partition.endswith("*"):
            default = name
    if first is None:
        return None, f"Slurm answers but no node is ready (sinfo: {result.stdout.strip() or 'nothing'}); {START_HINT}"
    partition = default or first
    cpus = _partition_cpus(partition)
    if cpus < 1:
        return None, f"scontrol show node gives no CPUTot for the nodes of partition {partition!r}; {START_HINT}"
    return SlurmInfo(partition=partition, cpus=cpus), ""


def _partition_cpus(partition: str) -> int:
    """CPUTot summed over the partition's nodes, from ``scontrol show node -o`` (one node a line)."""
    total = 0
    for line in _run(["scontrol", "show", "node", "-o"]).stdout.splitlines():
        fields = dict(f.split("=", 1) for f in line.split() if "=" in f)
        if partition in fields.get("Partitions", "").split(",") and fields.get("CPUTot", "").isdigit():
            total += int(fields["CPUTot"])
    return total


def slurm_available() -> tuple[bool, str]:
    """(True, "") when jobs can be submitted and will run; else (False, why not and how to fix it)."""
    info, reason = _probe()
    return info is not None, reason


def require_slurm() -> SlurmInfo:
    """Skip the calling test when Slurm is not usable; fail it instead when SORTIE_REQUIRE_SLURM=1."""
    info, reason = _probe()
    if info is None:
        if os.environ.get(REQUIRE_ENV) == "1":
            pytest.fail(f"{REQUIRE_ENV}=1 but Slurm is not usable: {reason}", pytrace=False)
        pytest.skip(f"Slurm is not usable: {reason}")
    return info


@pytest.fixture(scope="session")
def slurm() -> SlurmInfo:
    """A usable Slurm (or a skip / a failure, see :func:`require_slurm`)."""
    return require_slurm()


@pytest.fixture
def slurm_jobs(slurm: SlurmInfo) -> Iterator[list[str]]:
    """Job ids a test submitted; whatever of them is still queued or running is cancelled at teardown."""
    jobs: list[str] = []
    yield jobs
    if jobs:
        _run(["scancel", *jobs])
