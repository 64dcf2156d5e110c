"""How long a resumed run takes to find its Slurm jobs again, and what one round of polling costs.

Submits ``--jobs`` sleeping jobs through the Slurm adapter (on a 2-core test node most of them
wait in the queue), then, as a restarted orchestrator would, builds a fresh adapter and times
``attach()`` for every case by job id, and with another fresh adapter by name (the case whose id
was never recorded), then one ``poll()`` of every job. For scale it also times the naive way:
one ``squeue -j ID`` per job. The jobs are cancelled at the end, also on Ctrl-C.

Needs a usable Slurm (``scripts/slurm-local.sh start``).

    python -m benchmarks.slurm_attach --jobs 100 --json benchmarks/results/slurm_attach.json
"""

from __future__ import annotations

import argparse
import json
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from sortie.adapters.base import CaseSpec, JobHandle
from sortie.adapters.slurm import SlurmAdapter, SlurmOptions, run_tool

ROOT = Path(__file__).resolve().parents[1]


class _Counting:
    """Counts the Slurm commands an adapter runs, by tool."""

    def __init__(self) -> None:
        self.calls: list[str] = []

    def __call__(self, argv: list[str], **kwargs: Any) -> subprocess.CompletedProcess[str]:
        self.calls.append(argv[0])
        return run_tool(argv, **kwargs)


def _adapter(base: Path, poll_interval_s: float) -> tuple[SlurmAdapter, _Counting]:
    runner = _Counting()
    options = SlurmOptions(adapter="slurm", template="template", command=["sleep", "{{ seconds }}"],
                           time_limit_s=3600, poll_interval_s=poll_interval_s)
    return SlurmAdapter(options, {}, base, runner=runner), runner


def _timed(label: str, fn: Any) -> dict[str, Any]:
    t0 = time.perf_counter()
    value = fn()
    return {"step": label, "seconds": time.perf_counter() - t0, "value": value}


def run(n_jobs: int, sleep_s: int, poll_interval_s: float) -> dict[str, Any]:
    with tempfile.TemporaryDirectory(prefix="sortie-slurm-attach-") as tmp:
        base = Path(tmp)
        (base / "template").mkdir()
        (base / "template" / "README").write_text("sleeping job for the attach benchmark\n")
        cases = [CaseSpec(i, f"d{i:04d}-c0", i, {"seconds": sleep_s}, {}, base / "campaign" / "cases" / f"d{i:04d}-c0")
                 for i in range(1, n_jobs + 1)]
        submitter, _ = _adapter(base, poll_interval_s)
        handles: list[JobHandle] = []
        try:
            t0 = time.perf_counter()
            for case in cases:
                handles.append(submitter.start(case))
            submit_s = time.perf_counter() - t0

            rows = []
            by_id, calls_id = _adapter(base, poll_interval_s)
            step = _timed("attach by job id", lambda: [by_id.attach(c, h.job_id, None) for c, h in zip(cases, handles, strict=True)])
            attached = step.pop("value")
            assert [a.job_id for a in attached if a is not None] == [h.job_id for h in handles], "attach by id lost a job"
            rows.append({**step, "squeue_calls": calls_id.calls.count("squeue"), "found": sum(a is not None for a in attached)})

            by_name, calls_name = _adapter(base, poll_interval_s)
            step = _timed("attach by name (no job id)", lambda: [by_name.attach(c, None, None) for c in cases])
            found = step.pop("value")
            assert [a.job_id for a in found if a is not None] == [h.job_id for h in handles], "attach by name lost a job"
            rows.append({**step, "squeue_calls": calls_name.calls.count("squeue"), "found": sum(a is not None for a in found)})

            time.sleep(poll_interval_s)  # the attach snapshot ages out: the first poll must query
            calls_id.calls.clear()
            step = _timed("poll every job once", lambda: [by_id.poll(a) for a in attached if a is not None])
            states = step.pop("value")
            rows.append({**step, "squeue_calls": calls_id.calls.count("squeue"),
                         "found": len(states), "states": {s.value: states.count(s) for s in set(states)}})

            step = _timed("naive: one squeue -j ID per job", lambda: [
                run_tool(["squeue", "-h", "-t", "all", "-j", h.job_id, "-o", "%T"]).stdout.strip() for h in handles])
            naive = step.pop("value")
            rows.append({**step, "squeue_calls": len(handles), "found": sum(bool(s) for s in naive)})
        finally:
            ids = [h.job_id for h in handles]
            if ids:
                run_tool(["scancel", *ids])
    return {"machine": platform.platform(), "python": sys.version.split()[0], "jobs": n_jobs,
            "submit_s": submit_s, "poll_interval_s": poll_interval_s, "steps": rows}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=100)
    parser.add_argument("--sleep", type=int, default=600, help="seconds each job sleeps (they are cancelled at the end)")
    parser.add_argument("--poll-interval", type=float, default=5.0, help="the adapter's poll_interval_s")
    parser.add_argument("--json", type=Path, default=ROOT / "benchmarks" / "results" / "slurm_attach.json")
    args = parser.parse_args()
    result = run(args.jobs, args.sleep, args.poll_interval)
    n = result["jobs"]
    print(f"submitted {n} jobs in {result['submit_s']:.1f} s ({1000 * result['submit_s'] / n:.0f} ms per sbatch)")
    print("| step | jobs | wall s | ms per job | squeue calls |")
    print("|---|---|---|---|---|")
    for row in result["steps"]:
        print(f"| {row['step']} | {row['found']} | {row['seconds']:.3f} | {1000 * row['seconds'] / n:.1f} | {row['squeue_calls']} |")
    args.json.parent.mkdir(parents=True, exist_ok=True)
    args.json.write_text(json.dumps(result, indent=2))
    print(f"wrote {args.json}")


if __name__ == "__main__":
    main()
