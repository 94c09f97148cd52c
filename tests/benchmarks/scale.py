"""Benchmarks at scale, run on demand (`make bench`); never part of the suite.

1. The full report (no bootstrap) on 60-item surveys of 10,000 / 100,000 / 1,000,000 rows
   against the floor measured in the same run: reading the same CSV file with pandas and
   forming its covariance matrix. Each run is its own process, so its peak memory (VmHWM)
   is its own; the report's seconds per stage are report.json's `timings`. Then 10,000,000
   rows (``--big-rows``), a file beyond memory for pandas (1.3 GB of CSV, with an id and a team
   column: tests/benchmarks/beyond_memory.py writes it), which the report reads a block at a
   time; its floor reads the file in chunks of 1,000,000 rows and merges their covariances.
2. The bootstrap at 100,000 x 60 with 1,000 replicates (weighted cross-products), on the
   local process pool; forming replicate covariance matrices by resampling rows versus by
   weighted cross-products, timed alone; and the same bootstrap on a local Dask cluster of one
   and of two workers (one thread each).

Writes the block between the `scale` markers in docs/performance.md (run_all.py keeps it).

    python tests/benchmarks/scale.py [--rows 10000,100000,1000000] [--big-rows 10000000] [--replicates 1000]
                                     [--repeat 3] [--skip-big] [--skip-bootstrap] [--skip-dask] [--out docs/performance.md]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(ROOT / "sample_surveys"))  # the simulator (sample_surveys/simulate.py)

BEGIN, END = "<!-- scale: begin -->", "<!-- scale: end -->"
ITEMS = 60


def _peak_mb() -> float:
    """This process's peak resident memory in MB (10^6 bytes). On Linux from VmHWM, the high-water
    mark of the address space this process's program got at exec: getrusage's ru_maxrss is kept
    across fork and exec, so a child of this script (which holds the survey it wrote) reported the
    parent's 2 GB as its own peak."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024 / 1e6
    except OSError:
        pass
    from samesource.timings import peak_memory_mb

    return peak_memory_mb() or float("nan")


def child_env() -> dict[str, str]:
    """A measurement's environment: numpy's huge-page advice off unless chosen, as the command
    line and the service set it (service/__init__.py), for the report and the floor alike."""
    return {**os.environ, "NUMPY_MADVISE_HUGEPAGE": os.environ.get("NUMPY_MADVISE_HUGEPAGE", "0")}


def child_floor(path: str, items: list[str]) -> dict:
    import pandas as pd

    t0 = time.perf_counter()
    df = pd.read_csv(path)
    cov = df[items].cov().to_numpy()
    return {"seconds": time.perf_counter() - t0, "peak_mb": _peak_mb(), "check": float(cov.trace())}


@contextmanager
def local_dask_executor(workers: int):
    """An executor for ``analyze``: None (the local pool) or a local Dask cluster of
    ``workers`` single-threaded processes, closed afterwards."""
    if not workers:
        yield None
        return
    import dask
    from distributed import Client, LocalCluster

    from samesource.service.dask_backend import DaskExecutor

    # Dask's nannies start workers with MALLOC_TRIM_THRESHOLD_=65536, which doubled the time
    # of an analysis in a worker here (7 s -> 14 s on the sample survey: the heap is trimmed
    # and faulted in again at every large array); None leaves glibc's own adaptive setting.
    with (dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}),
          LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None,
                       env={"OPENBLAS_NUM_THREADS": "1"}) as cluster, Client(cluster) as client):
        yield DaskExecutor(client)


def child_report(path: str, design: dict, options: dict, dask_workers: int = 0) -> dict:
    from samesource.pipeline import analyze

    with local_dask_executor(dask_workers) as executor:
        t0 = time.perf_counter()
        report = analyze(path, design, options, executor=executor).report
        wall = time.perf_counter() - t0
    failed = max((e["bootstrap"]["n_failed"] for p in report["paths"] for e in p["estimates"].values()
                  if e and "bootstrap" in e), default=0)
    return {"wall": wall, "timings": report["timings"], "peak_mb": _peak_mb(), "most_failed": failed}


def child_covariances(path: str, items: list[str], replicates: int) -> dict:
    import numpy as np
    import pandas as pd

    from samesource.corrections.bootstrap import ReplicateWeights, replicate_indices
    from samesource.corrections.replicate_moments import weighted_moments

    X = pd.read_csv(path)[items].to_numpy(dtype=float)
    n = len(X)
    t0 = time.perf_counter()
    k = 10
    for r in range(k):
        np.cov(X[replicate_indices(1, r, n)], rowvar=False, bias=True)
    rows = (time.perf_counter() - t0) / k
    t0 = time.perf_counter()
    weighted_moments(X, replicates, lambda a, b: ReplicateWeights(1, range(a, b), n))
    weighted = (time.perf_counter() - t0) / replicates
    return {"rows_ms": rows * 1000, "weighted_ms": weighted * 1000, "replicates": replicates}


def run_child(kind: str, *args) -> dict:
    """One measurement in a fresh process (its own peak memory)."""
    code = ("import json, sys; sys.path.insert(0, sys.argv[1]); import scale; "
            "print('RESULT ' + json.dumps(getattr(scale, sys.argv[2])(*json.loads(sys.argv[3]))))")
    proc = subprocess.run([sys.executable, "-c", code, str(HERE), kind, json.dumps(list(args))],
                          capture_output=True, text=True, cwd=ROOT,
                          env=child_env())
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"{kind} failed:\n{proc.stderr[-3000:]}")


def write_survey(n: int, folder: str) -> tuple[str, dict, list[str]]:
    from workload import survey

    df, design, _ = survey(n, ITEMS)
    path = os.path.join(folder, f"survey_{n}.csv")
    df.to_csv(path, index=False)
    items = [it for c in design["constructs"].values() for it in c["items"]]
    return path, design, items


def _median_run(runs: list[dict], key: str) -> dict:
    """The run with the median ``key`` (the lower middle one of an even number)."""
    return sorted(runs, key=lambda r: r[key])[(len(runs) - 1) // 2]


def _big_row(rows: int, folder: str) -> str:
    """The table's row for the survey beyond memory (beyond_memory.py's file, floor and report)."""
    import beyond_memory as bm

    path, design = bm.write_survey(rows, folder, ids=True)
    mb = os.path.getsize(path) / 1e6
    floor = bm.run_child("child_floor", path, design)
    rep = bm.run_child("child_report", path, design)
    os.remove(path)
    t = rep["timings"]
    stages = sorted(((k, v) for k, v in t.items() if k not in ("total", "peak_memory_mb")), key=lambda kv: -kv[1])[:3]
    slow = ", ".join(f"{k} {v:.1f}" for k, v in stages)
    return (f"| {rows:,} (ids, teams; read a block at a time) | {mb:.0f} | {rep['report_wall']:.1f} | "
            f"{floor['floor_wall']:.2f} | {rep['report_wall'] / floor['floor_wall']:.1f}x | {rep['peak_mb']:.0f} | "
            f"{floor['floor_peak_mb']:.0f} | {slow} |")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", default="10000,100000,1000000")
    ap.add_argument("--replicates", type=int, default=1000)
    ap.add_argument("--repeat", type=int, default=3, help="runs of floor and report per in-memory size (medians)")
    ap.add_argument("--boot-rows", type=int, default=100_000)
    ap.add_argument("--big-rows", type=int, default=10_000_000)
    ap.add_argument("--skip-big", action="store_true", help="without the survey beyond memory")
    ap.add_argument("--skip-bootstrap", action="store_true")
    ap.add_argument("--skip-dask", action="store_true")
    ap.add_argument("--out", default=str(ROOT / "docs" / "performance.md"))
    args = ap.parse_args()
    sizes = [int(s) for s in args.rows.split(",") if s]
    lines = [BEGIN, "", "## At scale: the full report against the floor", "",
             f"Measured by `tests/benchmarks/scale.py` on {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}. "
             f"Synthetic surveys of {ITEMS} 5-point items (tests/benchmarks/workload.py), read from a CSV file. "
             "Floor: reading the same file with pandas and forming its covariance matrix, in the same run. "
             "Each measurement runs in its own process; peak memory is that process's (VmHWM). "
             f"For the sizes read in memory, floor and report run alternately {args.repeat} times each and the table "
             "gives the median run of each (the report's fastest and slowest in brackets). "
             f"The {args.big_rows:,}-row survey (if measured) is tests/benchmarks/beyond_memory.py's, with an id "
             "and a team column (200 teams), read by the report a block of lines at a time; its floor reads the "
             "file in chunks of 1,000,000 rows and merges their covariances. Every measurement runs with "
             f"NUMPY_MADVISE_HUGEPAGE={child_env()['NUMPY_MADVISE_HUGEPAGE']} (the command line's and the "
             "service's default, service/__init__.py).", "",
             "| rows | file MB | report s | floor s | ratio | report peak MB | floor peak MB | slowest stages |",
             "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- |"]
    with tempfile.TemporaryDirectory(prefix="samesource-bench-") as tmp:
        for n in sizes:
            path, design, items = write_survey(n, tmp)
            mb = os.path.getsize(path) / 1e6
            # floor and report alternately, args.repeat times each: this machine's speed (its page
            # faults most of all) drifts by a fifth from one minute to the next; the medians go in
            # the table, with the spread of the report's own runs
            floors, reps = [], []
            for _ in range(args.repeat):
                floors.append(run_child("child_floor", path, items))
                reps.append(run_child("child_report", path, design, {}))
            floor = _median_run(floors, "seconds")
            rep = _median_run(reps, "wall")
            spread = f" ({min(r['wall'] for r in reps):.1f}-{max(r['wall'] for r in reps):.1f})" if args.repeat > 1 else ""
            t = rep["timings"]
            stages = sorted(((k, v) for k, v in t.items() if k not in ("total", "peak_memory_mb")),
                            key=lambda kv: -kv[1])[:3]
            slow = ", ".join(f"{k} {v:.1f}" for k, v in stages)
            lines.append(f"| {n:,} | {mb:.0f} | {rep['wall']:.1f}{spread} | {floor['seconds']:.2f} | "
                         f"{rep['wall'] / floor['seconds']:.1f}x | {rep['peak_mb']:.0f} | {floor['peak_mb']:.0f} | {slow} |")
            print(lines[-1], flush=True)
            os.remove(path)
        if not args.skip_big:
            lines.append(_big_row(args.big_rows, tmp))
            print(lines[-1], flush=True)

        if not args.skip_bootstrap:
            n, reps = args.boot_rows, args.replicates
            path, design, items = write_survey(n, tmp)
            opts = {"bootstrap": reps, "seed": 1}
            cov = run_child("child_covariances", path, items, 256)
            local = run_child("child_report", path, design, opts)
            lines += ["", f"## At scale: {reps:,} bootstrap replicates at {n:,} x {ITEMS}", "",
                      "Replicates from weighted cross-products (measurement/corrections/replicate_moments.py): one "
                      "replicate's covariance matrix, timed alone (one process):", "",
                      f"- by resampling rows and `np.cov` (the former scheme): {cov['rows_ms']:.1f} ms",
                      f"- by weighted cross-products, in batches of 32 ({cov['replicates']} replicates): "
                      f"{cov['weighted_ms']:.1f} ms", "",
                      "| executor | whole report s | bootstrap stage s | per replicate | most failed replicates |",
                      "| --- | ---: | ---: | ---: | ---: |",
                      f"| local process pool (2 workers) | {local['wall']:.1f} | {local['timings']['bootstrap']:.1f} | "
                      f"{local['timings']['bootstrap'] / reps * 1000:.0f} ms | {local['most_failed']} |"]
            print(lines[-1], flush=True)
            if not args.skip_dask:
                dask = {}
                for w in (1, 2):
                    dask[w] = run_child("child_report", path, design, opts, w)
                    d = dask[w]
                    lines.append(f"| local Dask cluster, {w} worker{'s' if w > 1 else ''} | {d['wall']:.1f} | "
                                 f"{d['timings']['bootstrap']:.1f} | {d['timings']['bootstrap'] / reps * 1000:.0f} ms | "
                                 f"{d['most_failed']} |")
                    print(lines[-1], flush=True)
                speed = dask[1]["timings"]["bootstrap"] / dask[2]["timings"]["bootstrap"]
                lines += ["", f"Speed-up of the bootstrap stage from one to two local Dask workers: {speed:.2f}x "
                          "(two cores, so at most 2x; the data travel to the workers with each chunk)."]
    lines += ["", END]
    out = Path(args.out)
    text = out.read_text(encoding="utf-8") if out.exists() else "# Performance\n"
    block = "\n".join(lines)
    if BEGIN in text and END in text:
        text = text[:text.index(BEGIN)] + block + text[text.index(END) + len(END):]
    else:
        text = text.rstrip("\n") + "\n\n" + block + "\n"
    out.write_text(text, encoding="utf-8")
    print(f"written {out}")


if __name__ == "__main__":
    main()
