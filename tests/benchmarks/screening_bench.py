"""The respondent screen at scale, run on demand; never part of the suite.

Times ``screen_respondents`` on a 60-item survey (default 1,000,000 rows: workload.survey,
two items of each construct taken as reverse-keyed) in a fresh process per measurement:
CPU time (time.process_time) and wall time of the call, the child's peak resident memory
(VmHWM, reset before the call: the call's peak with the answers it reads) and, in a second run of the call under
tracemalloc, the peak of what the call itself allocated. Cases: ``complete`` (every row
answers every item) and ``holes`` (0.5% of the cells blank at random, so thousands of
missing-data patterns).

How the call is made (``--how``):
- ``frames``: keyed items and the answers as given, both DataFrames (what the pipeline handed
  the screen before it read ItemRows);
- ``rows``: FrameRows over the keyed items, with the questionnaire order and the reversed items;
- ``coded``: the same as CodedRows (one byte per answer).

    python tests/benchmarks/screening_bench.py [--rows 1000000] [--how frames,rows,coded]
                                               [--cases complete,holes]
"""

from __future__ import annotations

import argparse
import gc
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(HERE))
ITEMS = 60


def _reset_vmhwm() -> None:
    """Start the peak resident memory afresh (Linux 4.0+: writing 5 to clear_refs), so VmHWM
    after the call is the call's peak with its inputs, not the survey generator's."""
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as f:
            f.write("5")
    except OSError:
        pass


def _vmhwm_mb() -> float:
    with open("/proc/self/status", encoding="ascii") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024 / 1e6
    return float("nan")


def _survey(n: int, case: str):
    import numpy as np
    import pandas as pd
    from workload import survey

    df, design, _ = survey(n, ITEMS)
    names = [it for c in design["constructs"].values() for it in c["items"]]
    X = np.array(df[names], dtype=float)  # a writable copy
    if case == "holes":
        X[np.random.default_rng(1).random(X.shape) < 0.005] = np.nan
    items = pd.DataFrame(X, columns=names, index=np.arange(2, n + 2))  # the file's row numbers
    reversed_items = [it for c in design["constructs"].values() for it in c["items"][1::3]]
    order = names[::-1]  # a questionnaire order other than the design's
    return items, order, reversed_items


def _call(items, order, reversed_items, how: str):
    import pandas as pd

    from samesource.input.screening import screen_respondents

    if how == "frames":
        cols = {}
        for it in order:  # as the pipeline's _raw_answers built them
            col = items[it].to_numpy(dtype=float)
            cols[it] = 6.0 - col if it in reversed_items else col
        raw = pd.DataFrame(cols, index=items.index, copy=False)
        return lambda: screen_respondents(items, raw, scale_min=1.0, scale_max=5.0)
    from samesource.input.rows import CodedRows, FrameRows

    rows = FrameRows(items)
    if how == "coded":
        rows = CodedRows.encode(items.to_numpy(dtype=float), items.columns, items.index, 1.0)
    return lambda: screen_respondents(rows, scale_min=1.0, scale_max=5.0, order=order,
                                      reversed_items=reversed_items)


def child(n: int, case: str, how: str) -> dict:
    items, order, reversed_items = _survey(n, case)
    run = _call(items, order, reversed_items, how)
    gc.collect()
    _reset_vmhwm()
    before = _vmhwm_mb()
    c0, w0 = time.process_time(), time.perf_counter()
    res = run()
    cpu, wall = time.process_time() - c0, time.perf_counter() - w0
    peak = _vmhwm_mb()
    flagged = len(res.flagged_rows)
    del res
    tracemalloc.start()
    run()
    _, traced = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return {"rows": n, "case": case, "how": how, "cpu_s": round(cpu, 2), "wall_s": round(wall, 2),
            "vmhwm_mb_before_call": round(before), "vmhwm_mb": round(peak),
            "call_peak_mb": round(traced / 1e6), "flagged": flagged}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--how", default="rows,coded")
    ap.add_argument("--cases", default="complete,holes")
    a = ap.parse_args()
    for case in a.cases.split(","):
        for how in a.how.split(","):
            code = ("import json, sys; sys.path.insert(0, sys.argv[1]); import screening_bench as b; "
                    "print('RESULT ' + json.dumps(b.child(int(sys.argv[2]), sys.argv[3], sys.argv[4])))")
            proc = subprocess.run([sys.executable, "-c", code, str(HERE), str(a.rows), case, how],
                                  capture_output=True, text=True, cwd=ROOT)
            out = [ln[7:] for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")]
            print(out[0] if out else f"{case}/{how} failed:\n{proc.stderr[-3000:]}", flush=True)


if __name__ == "__main__":
    main()
