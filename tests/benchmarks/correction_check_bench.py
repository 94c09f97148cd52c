"""The correction check's time on the bundled sample survey, run on demand (never in the suite).

Times ``--check-corrections N`` (default N = 200: 200 simulated surveys per scenario, five
scenarios, each a whole analysis) on the sample survey (2,500 rows, 23 items, FIML as
``make demo`` runs it) on the local process pool and on a local Dask cluster of two worker
processes (one thread each). The floor, measured in the same run: one ordinary analysis of
the same survey, times the number of simulated surveys, divided by the workers: what the
check costs if it did nothing but the analyses themselves.

Writes the block between the ``correction check`` markers in docs/performance.md.

    python tests/benchmarks/correction_check_bench.py [--replicates 200] [--skip-dask]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time
from datetime import date
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT / "sample_surveys"))  # the simulator (sample_surveys/simulate.py)
sys.path.insert(0, str(HERE))
from scale import local_dask_executor  # noqa: E402

SURVEY = ROOT / "sample_surveys" / "staff_survey.csv"
DESIGN = ROOT / "sample_surveys" / "staff_survey_design.json"
BEGIN, END = "<!-- correction check: begin -->", "<!-- correction check: end -->"
WORKERS = 2


def child(replicates: int, dask_workers: int) -> dict:
    from samesource.pipeline import analyze

    design = json.loads(DESIGN.read_text())
    options = {"missing": "fiml", "check_corrections": replicates}
    with local_dask_executor(dask_workers) as executor:
        t0 = time.perf_counter()
        report = analyze(str(SURVEY), design, options, executor=executor).report
        wall = time.perf_counter() - t0
    check = report.get("correction_check") or {}
    runs = sum(1 for s in check.get("scenarios", []) if s.get("run"))
    return {"wall": wall, "check": report["timings"].get("check_corrections"), "timings": report["timings"],
            "surveys": runs * replicates, "lean_on": {f"{p['predictor']} -> {p['outcome']}": p["lean_on"]
                                                      for p in check.get("paths", [])},
            "failed": sum(s.get("failed_replicates") or 0 for s in check.get("scenarios", []))}


def run(replicates: int, dask_workers: int) -> dict:
    code = ("import json, sys; sys.path.insert(0, sys.argv[1]); import correction_check_bench as b; "
            "print('RESULT ' + json.dumps(b.child(int(sys.argv[2]), int(sys.argv[3]))))")
    proc = subprocess.run([sys.executable, "-c", code, str(HERE), str(replicates), str(dask_workers)],
                          capture_output=True, text=True, cwd=ROOT)
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(proc.stderr[-3000:])


def _commit() -> str:
    proc = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True, cwd=ROOT)
    return proc.stdout.strip() or "unknown"


def write(block: str, out: Path) -> None:
    text = out.read_text() if out.exists() else ""
    if BEGIN in text:
        head, rest = text.split(BEGIN, 1)
        text = head + block + rest.split(END, 1)[1]
    else:
        text = text.rstrip("\n") + "\n\n" + block + "\n"
    out.write_text(text)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--skip-dask", action="store_true")
    ap.add_argument("--local-result", type=Path,
                    help="the local phase's printed result (JSON) of an earlier run at the same commit: "
                         "the local phase is not run again")
    ap.add_argument("--out", type=Path, default=ROOT / "docs" / "performance.md")
    args = ap.parse_args()
    floor = run(0, 0)  # one ordinary analysis: the unit of work of the check
    print("one analysis", json.dumps(floor), flush=True)  # each phase whole: a stopped run keeps its figures
    local = json.loads(args.local_result.read_text()) if args.local_result else run(args.replicates, 0)
    print("local", json.dumps(local), flush=True)
    dask = None if args.skip_dask else run(args.replicates, WORKERS)
    if dask:
        print("dask", json.dumps(dask), flush=True)
    unit = floor["wall"]
    rows = [("local process pool (2 workers)", local)] + ([("local Dask cluster (2 workers)", dask)] if dask else [])
    lines = [BEGIN, "", "## The correction check (`--check-corrections`)", "",
             f"Measured by `tests/benchmarks/correction_check_bench.py` on {date.today().isoformat()} "
             f"({platform.processor() or platform.machine()}, {os.cpu_count()} cores, at commit {_commit()}, "
             f"niceness {os.nice(0)}, load average {os.getloadavg()[0]:.1f} at the end). The sample survey (2,500 rows, 23 items, FIML, as `make demo` runs it) with "
             f"N = {args.replicates}: five scenarios, {local['surveys']:,} simulated surveys, each a whole analysis "
             "(no bootstrap inside). Floor: one ordinary analysis of the survey, measured in the same run, times the "
             "number of simulated surveys, over the two workers.", "",
             "| where | whole run (s) | check stage (s) | per simulated survey (s) | floor (s) | check / floor | "
             "failed surveys |", "| --- | ---: | ---: | ---: | ---: | ---: | ---: |"]
    for name, r in rows:
        fl = unit * r["surveys"] / WORKERS
        lines.append(f"| {name} | {r['wall']:.0f} | {r['check']:.0f} | {WORKERS * r['check'] / r['surveys']:.2f} | "
                     f"{fl:.0f} | {r['check'] / fl:.2f} | {r['failed']} |")
    lines += ["", f"One ordinary analysis took {unit:.1f} s. The check leans on: "
              + "; ".join(f"{k}: {v}" for k, v in local["lean_on"].items()) + ".", "", END]
    write("\n".join(lines), args.out)
    print("\n".join(lines))


if __name__ == "__main__":
    main()
