"""How much time sortie adds around each solver run, and how long a campaign takes to start.

Runs small campaigns on a no-op in-process model (pure orchestration cost) and on the mock
solver as a real process (orchestration plus process start-up), for several slot counts, and
reports wall time per case and slot utilisation. Prefect's start-up is measured separately.

    python -m benchmarks.overhead --designs 32 --json benchmarks/results/overhead.json

With ``--scale``, it measures how that cost grows with the campaign instead: for each size, a
real ``sortie run`` process runs a no-op Python function (8 slots, 4 conditions, initial designs
only) against one shared Prefect API server, and the table gives milliseconds per case after
start-up, the run's peak resident memory, the API server's CPU time per case and the wall time
of ``sortie status DIR --json`` on the finished campaign.

    python -m benchmarks.overhead --scale 100,1000,10000 --json benchmarks/results/overhead-scale.json
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import yaml

ROOT = Path(__file__).resolve().parents[1]


def _config(adapter: str, designs: int, slots: int, workdir: Path) -> dict[str, Any]:
    base = yaml.safe_load((ROOT / "configs" / "sled-aftbody.yaml").read_text())
    base["campaign"]["name"] = f"overhead-{adapter}-{slots}"
    base["plan"] = {"initial": {"method": "lhs", "designs": designs}}
    base["budget"] = {"designs": designs + 1}
    base["slots"] = slots
    if adapter == "python":
        model = workdir / "noop.py"
        model.write_text("def noop(p, c):\n    return {'lift': 0.1 * c['mach'], 'drag': 0.2}\n")
        base["solver"] = {"adapter": "python", "function": f"{model}:noop"}
        base["quantities"] = {"lift": {}, "drag": {}}
    else:
        base["solver"]["template"] = str(ROOT / "configs" / "cases" / "template")
    return base


def _run(adapter: str, designs: int, slots: int) -> dict[str, Any]:
    from sortie import campaign
    from sortie.adapters.registry import check_solver
    from sortie.config import load_config
    from sortie.flows.campaign import run_campaign
    from sortie.ledger import Ledger, ledger_path

    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        path = work / "c.yaml"
        path.write_text(yaml.safe_dump(_config(adapter, designs, slots, work)))
        cfg = load_config(path, check_solver=check_solver)
        campaign.prepare(path, cfg, work / "camp")
        t0 = time.perf_counter()
        run_campaign(work / "camp")
        wall = time.perf_counter() - t0
        with Ledger.open(ledger_path(work / "camp"), readonly=True) as ledger:
            cases = ledger.cases()
    busy = sum((c.ended_at or 0) - (c.started_at or 0) for c in cases)
    n = len(cases)
    return {"adapter": adapter, "slots": slots, "cases": n, "wall_s": wall, "ms_per_case": 1000 * wall / n,
            "solver_s_per_case": busy / n, "utilisation": busy / (wall * slots)}


SCALE_SLOTS = 8


def _cpu_s(pid: int) -> float:
    """CPU seconds (user + system) a live process has used so far, from /proc."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _sortie(args: list[str], env: dict[str, str]) -> tuple[float, float, Any]:
    """Run ``sortie ARGS`` as its own process: when it started (epoch s), its wall time and resource usage."""
    started = time.time()
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "sortie.cli", *args], env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    assert proc.stderr is not None
    err = proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise RuntimeError(f"sortie {' '.join(args)} exited with {proc.returncode}: {err.decode()[-2000:]}")
    return started, wall, usage


def _scale_run(cases: int, work: Path, env: dict[str, str], server_pid: int) -> dict[str, Any]:
    """One campaign of ``cases`` cases (4 conditions, so cases/4 designs) run by ``sortie run``.

    Besides the wall time: ``first_case_s``, from launching ``sortie run`` to its first case
    starting (imports, the flow run, recording the plan); ``conduct_ms_per_case``, from the first
    case starting to the last ending, per case; ``tail_s``, from the last case ending to the exit
    (the end-of-plan Sobol' indices and shutdown). The last three are read from the ledger.
    """
    from sortie.ledger import Ledger, ledger_path

    designs = max(cases // 4, 2)
    work.mkdir()
    config = _config("python", designs - 1, SCALE_SLOTS, work)
    config["budget"] = {"designs": designs}
    path = work / "c.yaml"
    path.write_text(yaml.safe_dump(config))
    server_cpu = _cpu_s(server_pid)
    started, wall, usage = _sortie(["run", str(path), "--dir", str(work / "camp")], env)
    server_cpu = _cpu_s(server_pid) - server_cpu
    _, status_s, status_usage = _sortie(["status", str(work / "camp"), "--json"], env)
    first, last, n = math.inf, -math.inf, 0
    with Ledger.open(ledger_path(work / "camp"), readonly=True) as ledger:
        for case in ledger.iter_cases():
            first, last, n = min(first, case.started_at or math.inf), max(last, case.ended_at or -math.inf), n + 1
    return {"cases": n, "wall_s": wall, "first_case_s": first - started, "tail_s": started + wall - last,
            "conduct_ms_per_case": 1000 * (last - first) / n,
            "peak_rss_mb": usage.ru_maxrss / 1024, "run_cpu_s": usage.ru_utime + usage.ru_stime,
            "server_ms_per_case": 1000 * server_cpu / n, "status_s": status_s,
            "status_cpu_s": status_usage.ru_utime + status_usage.ru_stime}


def scale(sizes: list[int], out: Path) -> None:
    """Cost per case against campaign size (see the module docstring); writes ``out``."""
    from sortie.flows.runtime import configure_prefect
    from sortie.flows.server import start_local_api

    configure_prefect()  # the server gets the settings a `sortie run` would give its own
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        start_local_api(work)  # one server for every run, as a site's own server would be
        server_pid = int((work / "prefect-server.pid").read_text())
        # An installed sortie has compiled bytecode; without it every process compiles Prefect anew.
        env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
        _scale_run(8, work / "warm-up", env, server_pid)  # compiles and caches bytecode, warms the server
        startup = _scale_run(8, work / "start-up", env, server_pid)["wall_s"]  # 2 designs: start-up and exit
        rows = []
        for n in sizes:
            rows.append(_scale_run(n, work / f"n{n}", env, server_pid))
            rows[-1]["ms_per_case"] = 1000 * (rows[-1]["wall_s"] - startup) / rows[-1]["cases"]
            print(f"{rows[-1]['cases']} cases: {rows[-1]['ms_per_case']:.1f} ms per case", flush=True)
    load = os.getloadavg()
    print(f"start-up (wall time of an 8-case campaign): {startup:.1f} s; load average at the end: {load[0]:.2f} "
          f"({os.cpu_count()} CPUs)")
    print("| cases | wall s | to first case s | ms per case | conducting ms per case | end s | peak RSS MB | run CPU s |"
          " API server CPU ms per case | status s (CPU s) |")
    print("|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['cases']} | {r['wall_s']:.1f} | {r['first_case_s']:.1f} | {r['ms_per_case']:.1f} | "
              f"{r['conduct_ms_per_case']:.1f} | {r['tail_s']:.1f} | {r['peak_rss_mb']:.0f} | {r['run_cpu_s']:.1f} | "
              f"{r['server_ms_per_case']:.1f} | {r['status_s']:.2f} ({r['status_cpu_s']:.2f}) |")
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"machine": platform.platform(), "cpus": os.cpu_count(), "load_average": load,
                               "slots": SCALE_SLOTS, "startup_s": startup, "scale": rows}, indent=2))
    print(f"wrote {out}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--designs", type=int, default=32)
    parser.add_argument("--slots", type=int, nargs="+", default=[1, 4])
    parser.add_argument("--scale", type=lambda s: [int(v) for v in s.split(",")], default=None,
                        help="comma-separated campaign sizes in cases, e.g. 100,1000,10000")
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args()
    if args.scale:
        scale(args.scale, args.json or ROOT / "benchmarks" / "results" / "overhead-scale.json")
        return
    args.json = args.json or ROOT / "benchmarks" / "results" / "overhead.json"

    from sortie.flows.runtime import configure_prefect

    configure_prefect()
    t0 = time.perf_counter()
    _run("python", 1, 1)  # the first flow starts Prefect's temporary API
    startup = time.perf_counter() - t0
    rows = [_run(adapter, args.designs, slots) for adapter in ("python", "command") for slots in args.slots]

    print(f"first campaign including Prefect start-up: {startup:.1f} s")
    print("| adapter | slots | cases | wall s | ms per case | solver s per case | slot utilisation |")
    print("|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['adapter']} | {r['slots']} | {r['cases']} | {r['wall_s']:.1f} | {r['ms_per_case']:.0f} | "
              f"{r['solver_s_per_case']:.3f} | {100 * r['utilisation']:.0f} % |")
    args.json.parent.mkdir(parents=True, exist_ok=True)
    args.json.write_text(json.dumps({"machine": platform.platform(), "startup_s": startup, "runs": rows}, indent=2))
    print(f"wrote {args.json}")


if __name__ == "__main__":
    main()
