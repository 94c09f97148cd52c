"""CPU time of the paths stage (and of the bootstrap inside it), run on demand; never part of the suite.

The whole analysis runs on a synthetic survey (tests/benchmarks/workload.py, 5-point items)
read from a CSV file written once; each stage's CPU seconds (``time.process_time`` of this
process, so the bootstrap runs on the serial executor: its replicates' CPU is counted here)
are taken at the pipeline's progress calls, beside wall seconds. CPU time, because the
machines these run on are shared: wall time there says how busy the machine was.

    python tests/benchmarks/paths_cpu.py --rows 1000000 [--replicates 0] [--csv /tmp/survey.csv]

With ``--csv`` the file is kept (and reused when it exists) so two versions of the code can be
measured on the same file. Prints one JSON line per run.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

ITEMS = 60


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--replicates", type=int, default=0)
    ap.add_argument("--csv", default=None)
    args = ap.parse_args()
    from workload import survey

    path = args.csv or f"/tmp/samesource-paths-{args.rows}.csv"
    _, design, _ = survey(200, ITEMS)  # the design does not depend on the rows
    if not os.path.exists(path):
        df, design, _ = survey(args.rows, ITEMS)
        df.to_csv(path, index=False)
        del df

    from samesource.executor import SerialExecutor
    from samesource.pipeline import analyze

    cpu: dict[str, float] = {}
    wall: dict[str, float] = {}
    at = {"stage": None, "cpu": time.process_time(), "wall": time.perf_counter()}

    def progress(stage: str, done: int, total: int) -> None:
        if stage == "bootstrap":
            stage = "paths"  # a sub-stage of paths
        if stage != at["stage"]:
            c, w = time.process_time(), time.perf_counter()
            if at["stage"] is not None:
                cpu[at["stage"]] = cpu.get(at["stage"], 0.0) + c - at["cpu"]
                wall[at["stage"]] = wall.get(at["stage"], 0.0) + w - at["wall"]
            at.update(stage=stage, cpu=c, wall=w)

    opts = {"bootstrap": args.replicates, "seed": 1} if args.replicates else {}
    c0, w0 = time.process_time(), time.perf_counter()
    analyze(path, design, opts, executor=SerialExecutor(), progress=progress)
    progress("end", 0, 0)
    print(json.dumps({"rows": args.rows, "replicates": args.replicates,
                      "cpu_total": round(time.process_time() - c0, 2), "wall_total": round(time.perf_counter() - w0, 2),
                      "cpu": {k: round(v, 2) for k, v in cpu.items()},
                      "wall": {k: round(v, 2) for k, v in wall.items()}}), flush=True)


if __name__ == "__main__":
    main()
