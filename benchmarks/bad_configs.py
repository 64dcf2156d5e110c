"""Time and peak memory of ``sortie check`` on every broken config of the corpus.

The issue's target: each broken config ends in under 2 s and under 300 MB. The test
(``tests/test_bad_configs.py``) holds only generous hang and memory limits, since a timed test
fails on a busy machine; this script measures each case one at a time (no parallel runs, so
the figures are not inflated by contention) and prints a table and writes JSON. Peak RSS is the
child's own, from ``os.wait4``.

    python -m benchmarks.bad_configs --json benchmarks/results/bad_configs.json

Measured on the shared 2-core development machine under a load average of about 10: 111 cases
(98 files, 13 generated), every one exit code 2 with one stderr line of at most 180 characters;
wall time median 1.33 s, slowest 1.92 s; CPU time median 0.68 s, most 0.77 s (nearly all of it
interpreter and library start-up); peak RSS at most 57 MB.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import tempfile
from pathlib import Path

from tests.bad_config_corpus import generated_cases, run_check, static_cases

ROOT = Path(__file__).resolve().parents[1]
TARGET_S = 2.0
TARGET_MB = 300.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", type=Path, default=ROOT / "benchmarks" / "results" / "bad_configs.json")
    parser.add_argument("--only", default="", help="run only cases whose name contains this text")
    args = parser.parse_args()
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        cases = [c for c in static_cases() + generated_cases(Path(tmp)) if args.only in c.name]
        print(f"{'case':48} {'exit':>4} {'wall s':>7} {'CPU s':>6} {'RSS MB':>7} {'line':>5}")
        for case in cases:
            outcome = run_check(case)
            lines = outcome.stderr.splitlines()
            row = {"case": case.name, "exit": outcome.returncode, "wall_s": round(outcome.wall_s, 3),
                   "cpu_s": round(outcome.cpu_s, 3),
                   "max_rss_mb": round(outcome.max_rss_mb, 1), "stderr_lines": len(lines),
                   "longest_line": max((len(line) for line in lines), default=0)}
            rows.append(row)
            print(f"{case.name[:48]:48} {row['exit']:>4} {row['wall_s']:>7.2f} {row['cpu_s']:>6.2f} {row['max_rss_mb']:>7.1f} "
                  f"{row['longest_line']:>5}")
    walls = [r["wall_s"] for r in rows]
    cpus = [r["cpu_s"] for r in rows]
    rss = [r["max_rss_mb"] for r in rows]
    summary = {"cases": len(rows), "median_wall_s": statistics.median(walls), "max_wall_s": max(walls),
               "median_cpu_s": statistics.median(cpus), "max_cpu_s": max(cpus),
               "over_2s_cpu": [r["case"] for r in rows if r["cpu_s"] > TARGET_S],
               "max_rss_mb": max(rss), "over_2s": [r["case"] for r in rows if r["wall_s"] > TARGET_S],
               "over_300mb": [r["case"] for r in rows if r["max_rss_mb"] > TARGET_MB],
               "not_exit_2": [r["case"] for r in rows if r["exit"] != 2]}
    print(f"\n{summary['cases']} cases: wall median {summary['median_wall_s']:.2f} s, slowest {summary['max_wall_s']:.2f} s; "
          f"CPU median {summary['median_cpu_s']:.2f} s, most {summary['max_cpu_s']:.2f} s; "
          f"peak RSS {summary['max_rss_mb']:.0f} MB; over {TARGET_S:g} s: {len(summary['over_2s'])}, "
          f"over {TARGET_MB:g} MB: {len(summary['over_300mb'])}, exit code not 2: {len(summary['not_exit_2'])}")
    args.json.parent.mkdir(parents=True, exist_ok=True)
    args.json.write_text(json.dumps({"machine": platform.platform(), "cpus": os.cpu_count(),
                                     "load_avg": os.getloadavg(), "summary": summary, "runs": rows}, indent=2))
    print(f"wrote {args.json}")


if __name__ == "__main__":
    main()
