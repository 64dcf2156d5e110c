"""How big a campaign's own Prefect folder gets over many runs, and what a run leaves in HOME.

Runs one tiny campaign (Branin through the in-process python adapter, 9 designs at 2
conditions) with the real ``sortie`` command and its own Prefect API server, then runs it again
``--runs - 1`` times (each later run continues the finished campaign: Prefect start-up, one flow
run, no case). HOME points at an empty folder throughout. After each run it records the size of
``DIR/.prefect``, the flow runs its database holds, and the files under HOME.

    python -m benchmarks.prefect_home --runs 40 --json benchmarks/results/prefect_home.json
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import yaml

ROOT = Path(__file__).resolve().parents[1]


def _config(work: Path) -> Path:
    config = {
        "campaign": {"name": "prefect-home", "seed": 3},
        "parameters": {"x1": {"lower": -5.0, "upper": 10.0, "baseline": 0.0},
                       "x2": {"lower": 0.0, "upper": 15.0, "baseline": 5.0}},
        "conditions": {"scale": [1.0, 2.0]},
        "solver": {"adapter": "python", "function": f"{ROOT / 'tests' / 'fixtures' / 'models.py'}:branin"},
        "quantities": {"f": {}, "g": {}},
        "goal": {"minimize": "mean(f)"},
        "plan": {"initial": {"method": "lhs", "designs": 8}},
        "budget": {"designs": 9},
        "slots": 2,
    }
    path = work / "campaign.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def _size(folder: Path) -> int:
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())


def _flow_runs(database: Path) -> int | None:
    if not database.exists():
        return None
    with sqlite3.connect(f"{database.as_uri()}?mode=ro", uri=True) as conn:
        return int(conn.execute("SELECT COUNT(*) FROM flow_run").fetchone()[0])


def measure(runs: int) -> dict[str, Any]:
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        home = work / "home"
        home.mkdir()
        config = _config(work)
        directory = work / "camp"
        env = {k: v for k, v in os.environ.items()
               if k not in ("PREFECT_HOME", "PREFECT_API_URL") and not k.startswith("XDG_")}
        env["HOME"] = str(home)
        rows = []
        for n in range(1, runs + 1):
            t0 = time.perf_counter()
            result = subprocess.run([sys.executable, "-m", "sortie.cli", "run", str(config), "--dir", str(directory)],
                                    capture_output=True, text=True, env=env, cwd=work, timeout=600)
            wall = time.perf_counter() - t0
            if result.returncode != 0:
                raise SystemExit(f"run {n} failed ({result.returncode}): {result.stderr.strip()[-500:]}")
            prefect = directory / ".prefect"
            rows.append({"run": n, "wall_s": round(wall, 2), "prefect_dir_bytes": _size(prefect),
                         "flow_runs_in_db": _flow_runs(prefect / "prefect.db"),
                         "campaign_dir_bytes": _size(directory),
                         "files_under_home": sorted(str(p.relative_to(home)) for p in home.rglob("*"))})
            print(f"{n:4d} {wall:7.1f} s  .prefect {rows[-1]['prefect_dir_bytes'] / 1e6:6.2f} MB  "
                  f"flow runs in db {rows[-1]['flow_runs_in_db']}  files under HOME {len(rows[-1]['files_under_home'])}",
                  flush=True)
    return {"runs": rows, "python": platform.python_version(), "machine": platform.machine()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=40)
    parser.add_argument("--json", type=Path, help="also write the measurements here")
    args = parser.parse_args()
    print(" run    wall  campaign's Prefect folder")
    result = measure(args.runs)
    sizes = [r["prefect_dir_bytes"] for r in result["runs"]]
    print(f"largest .prefect: {max(sizes) / 1e6:.2f} MB; after the last run: {sizes[-1] / 1e6:.2f} MB; "
          f"files ever under HOME: {sum(len(r['files_under_home']) for r in result['runs'])}")
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
