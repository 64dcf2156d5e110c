"""How much time sortie adds around each solver run, and how long a campaign takes to start.

Runs small campaigns on a no-op in-process model (pure orchestration cost) and on the mock
solver as a real process (orchestration plus process start-up), for several slot counts, and
reports wall time per case and slot utilisation. Prefect's start-up is measured separately.

    python -m benchmarks.overhead --designs 32 --json benchmarks/results/overhead.json
"""

from __future__ import annotations

import argparse
import json
import platform
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--designs", type=int, default=32)
    parser.add_argument("--slots", type=int, nargs="+", default=[1, 4])
    parser.add_argument("--json", type=Path, default=ROOT / "benchmarks" / "results" / "overhead.json")
    args = parser.parse_args()

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
