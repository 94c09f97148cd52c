"""Beyond memory, run on demand (never part of the suite): a CSV of N x 60 answers read a block
of lines at a time (samesource.input.streamed), its listwise moments and FIML pattern sums
accumulated, and the measurement model fitted from them by ML (listwise) and by FIML; beside
it, in its own process, the floor: pandas reading the same file in chunks of 1,000,000 rows
and forming the covariance matrix (reading it whole would hold 10,000,000 x 62 numbers).

Beside them, the file read once into the PreparedData the later stages read
(samesource.input.streamed.prepare_streamed: answers one byte per cell, row numbers, ids,
groups), with what it holds; and the whole report (samesource.pipeline.analyze, no bootstrap)
with its stages' seconds. Each measurement runs in a fresh process, so its peak memory
(VmHWM, as scale.py reads it) is its own. Prints one JSON line per measurement; docs/performance.md "Beyond memory" records
the figures.

    python tests/benchmarks/beyond_memory.py [--rows 10000000] [--ids] [--only prepared|streamed|report]
                                             [--path FILE --design FILE] [--write FOLDER]

Without --path it writes the file (the benchmarks' 60-item survey of tests/benchmarks/
workload.py, 1,000,000 rows per seed, 1% of six items' cells blank) to a temporary folder and
deletes it afterwards; with --ids the file has an id and a team column first; --write FOLDER
only writes the file (make it once, then measure with --path).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(HERE))
from scale import _peak_mb, child_env  # noqa: E402  (VmHWM of this process; the children's environment)

PIECE = 1_000_000


CONSTRUCTS = [f"c{i}" for i in range(10)] + ["mark", "meth"]


def write_survey(rows: int, folder: str, *, ids: bool = False) -> tuple[str, str]:
    """The survey file and its design file, a million rows at a time: 12 constructs of 5
    items on a 5-point scale (the constructs of workload.py's 60-item survey), each item
    round(3 + 0.9 factor + 0.8 noise) clipped to 1..5, factors correlated .3; 1% of the cells
    of six items blank (MCAR). The bytes are formed with numpy (a survey simulated and written
    by pandas took minutes per million rows on the loaded machine). With ``ids``, two columns
    come first: a respondent id (10000000 + the row's position: eight digits, unique) and a
    team ("T000" to "T199", a survey's group column), named in the design."""
    import numpy as np

    items = [f"{c}_{k}" for c in CONSTRUCTS for k in range(1, 6)]
    design = {"constructs": {c: {"items": items[5 * i:5 * i + 5]} for i, c in enumerate(CONSTRUCTS)},
              "paths": [{"outcome": "c1", "predictors": ["c0"]}, {"outcome": "c2", "predictors": ["c1"]}],
              "response_scale": {"min": 1, "max": 5}}
    design["constructs"]["mark"]["role"] = "marker"
    design["constructs"]["meth"]["role"] = "method"
    lead = ["resp_id", "team"] if ids else []
    if ids:
        design.update(id_column="resp_id", group_column="team")
    tag = "_ids" if ids else ""
    path = os.path.join(folder, f"survey_{rows}{tag}.csv")
    design_path = os.path.join(folder, f"design{tag}.json")
    Path(design_path).write_text(json.dumps(design), encoding="utf-8")
    with open(path, "wb") as fh:
        fh.write((",".join(lead + items) + "\n").encode("ascii"))
        for k in range(-(-rows // PIECE)):
            n = min(PIECE, rows - k * PIECE)
            rng = np.random.default_rng(k)
            F = np.sqrt(0.7) * rng.standard_normal((n, 12)) + np.sqrt(0.3) * rng.standard_normal((n, 1))
            X = np.rint(3 + 0.9 * np.repeat(F, 5, axis=1) + 0.8 * rng.standard_normal((n, 60)))
            buf = np.empty((n, 120), dtype=np.uint8)
            buf[:, 0::2] = 48 + np.clip(X, 1, 5).astype(np.uint8)
            buf[:, 1::2] = 44
            buf[:, -1] = 10
            keep = np.ones((n, 120), dtype=bool)
            keep[:, 0:60:10] = rng.random((n, 6)) >= 0.01   # items 1, 6, ..., 26: 1% blank
            if ids:  # "10000123,T042," before the answers: fixed widths, so formed as bytes too
                front = np.empty((n, 14), dtype=np.uint8)
                front[:, :8] = _digits(10_000_000 + k * PIECE + np.arange(n), 8)
                front[:, 8], front[:, 9], front[:, 13] = 44, ord("T"), 44
                front[:, 10:13] = _digits(rng.integers(0, 200, n), 3)
                buf, keep = np.hstack([front, buf]), np.hstack([np.ones((n, 14), dtype=bool), keep])
            fh.write(buf[keep].tobytes())
    return path, design_path


def _digits(values, width: int):
    """ASCII digits of non-negative integers below 10**width, zero-padded (rows x width)."""
    import numpy as np

    powers = 10 ** np.arange(width - 1, -1, -1, dtype=np.int64)
    return (48 + (values[:, None] // powers) % 10).astype(np.uint8)


def child_streamed(path: str, design_path: str) -> dict:
    from samesource.engine.builders import measurement_model
    from samesource.engine.fitting import fit_model
    from samesource.input.design import parse_design
    from samesource.input.streamed import stream_items

    design = parse_design(json.loads(Path(design_path).read_text(encoding="utf-8")))
    t0, c0 = time.perf_counter(), time.process_time()
    got = stream_items(path, design)
    read = (time.perf_counter() - t0, time.process_time() - c0)
    spec = measurement_model(design)
    t1, c1 = time.perf_counter(), time.process_time()
    ml = fit_model(spec, got.moments(spec.observed))
    t2, c2 = time.perf_counter(), time.process_time()
    fiml = fit_model(spec, got.fiml_data())
    t3, c3 = time.perf_counter(), time.process_time()
    return {"rows": got.n_rows, "patterns": len(got.patterns), "complete_rows": got.listwise.n,
            "read_wall": read[0], "read_cpu": read[1], "ml_wall": t2 - t1, "ml_cpu": c2 - c1,
            "fiml_wall": t3 - t2, "fiml_cpu": c3 - c2, "ml_status": ml.status, "fiml_status": fiml.status,
            "fiml_chi2": fiml.chi2, "peak_mb": _peak_mb(), "load": os.getloadavg()}


def child_prepared(path: str, design_path: str) -> dict:
    """The file read once into the PreparedData the later stages read (prepare_streamed): what
    it holds (bytes of the answers' codes, row numbers, ids, groups) beside the process's peak."""
    from samesource.input.design import parse_design
    from samesource.input.streamed import prepare_streamed

    design = parse_design(json.loads(Path(design_path).read_text(encoding="utf-8")))
    t0, c0 = time.perf_counter(), time.process_time()
    got = prepare_streamed(path, design)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    rows = got.rows
    held = {"codes_mb": rows.codes.nbytes / 1e6, "row_numbers_mb": rows.labels.nbytes / 1e6,
            "ids_mb": 0 if got.ids is None else got.ids.memory_usage(index=False, deep=True) / 1e6,
            "groups_mb": 0 if got.groups is None else got.groups.memory_usage(index=False, deep=True) / 1e6}
    return {"rows": got.n_rows, "items": len(rows.names), "prepared_wall": wall, "prepared_cpu": cpu,
            **held, "warnings": [w["code"] for w in got.warnings],
            "ids_dtype": None if got.ids is None else str(got.ids.dtype),
            "complete_rows": got.sums.listwise.n, "peak_mb": _peak_mb(), "load": os.getloadavg()}


def child_report(path: str, design_path: str, missing: str = "listwise") -> dict:
    """The whole report (no bootstrap) as the command line makes it: samesource.pipeline.analyze
    on the file, which reads a file this large a block at a time; its stages' seconds
    (report.json timings), CPU time and peak memory."""
    from samesource.pipeline import analyze

    design = json.loads(Path(design_path).read_text(encoding="utf-8"))
    t0, c0 = time.perf_counter(), time.process_time()
    a = analyze(path, design, {"missing": missing})
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    r = a.report
    return {"rows": r["data"]["rows"], "rows_analyzed": r["data"]["rows_analyzed"], "missing": missing,
            "report_wall": wall, "report_cpu": cpu, "prepared": type(a.prepared).__name__,
            "rows_type": type(a.prepared.rows).__name__, "timings": r["timings"],
            "teams": None if r.get("teams") is None else r["teams"]["groups"],
            "peak_mb": _peak_mb(), "load": os.getloadavg()}


def child_floor(path: str, design_path: str) -> dict:
    import pandas as pd

    from samesource.engine.chunked_moments import chunked_moments

    design = json.loads(Path(design_path).read_text(encoding="utf-8"))
    items = [it for c in design["constructs"].values() for it in c["items"]]
    t0, c0 = time.perf_counter(), time.process_time()
    chunks = (c.to_numpy(dtype=float) for c in pd.read_csv(path, usecols=items, chunksize=PIECE))
    m = chunked_moments((c for c in chunks), items)
    return {"floor_wall": time.perf_counter() - t0, "floor_cpu": time.process_time() - c0,
            "floor_peak_mb": _peak_mb(), "check": float(m.cov.trace())}


def run_child(kind: str, *args: str) -> dict:
    code = ("import json, sys; sys.path.insert(0, sys.argv[1]); import beyond_memory as b; "
            "print('RESULT ' + json.dumps(getattr(b, sys.argv[2])(*sys.argv[3:])))")
    proc = subprocess.run([sys.executable, "-c", code, str(HERE), kind, *args],
                          capture_output=True, text=True, cwd=ROOT,
                          env=child_env())
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError(f"{kind} failed:\n{proc.stderr[-3000:]}")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--path")
    ap.add_argument("--design")
    ap.add_argument("--ids", action="store_true", help="the file with an id and a team column (write_survey)")
    ap.add_argument("--write", metavar="FOLDER", help="only write the file (and its design) into FOLDER")
    ap.add_argument("--only", choices=["streamed", "prepared", "report"],
                    help="beside the floor, only this measurement (default: every one)")
    args = ap.parse_args()
    if args.write:
        print(json.dumps(dict(zip(("path", "design"), write_survey(args.rows, args.write, ids=args.ids), strict=True))))
        return
    with tempfile.TemporaryDirectory() as folder:
        path, design = (args.path, args.design) if args.path else write_survey(args.rows, folder, ids=args.ids)
        print(json.dumps({"file_mb": os.path.getsize(path) / 1e6, **run_child("child_floor", path, design)}),
              flush=True)
        for kind in ("streamed", "prepared", "report"):
            if args.only in (None, kind):
                print(json.dumps(run_child(f"child_{kind}", path, design)), flush=True)


if __name__ == "__main__":
    main()
