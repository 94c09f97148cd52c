"""CPU time of the model fits in a report, per model kind, and the fits' iterates.

Runs the report of a survey (the bundled sample survey, or a synthetic one of N x K from
workload.py) with every fit recorded: the model's name, estimator, status, scoring steps,
the fit's own CPU seconds (``FitResult.elapsed``: the fitting thread's CPU time) and its
free-parameter vector. Prints CPU seconds per model kind, and with ``--save`` writes the
records (iterates included) to a JSON file; ``--compare`` checks a run against a saved one:
the same fits in the same order with the same statuses and iterations and the same
estimates to a tolerance, so a change meant to make evaluations cheaper can show it left
the optimizer's path alone. ``--profile N`` prints cProfile's top N functions by CPU time.

    nice -n 15 .venv/bin/python tests/benchmarks/fit_times.py --survey sample --save before.json
    nice -n 15 .venv/bin/python tests/benchmarks/fit_times.py --survey 10000x60 --compare before.json
"""

from __future__ import annotations

import argparse
import cProfile
import json
import pstats
import re
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(HERE))


def _kind(name: str) -> str:
    """A model's kind: its name up to the first ':' or '+' (the builder's family, without the
    construct, variant or share it was built for)."""
    return re.split(r"[:+]", name)[0]


def run(survey: str, missing: str, profile: int) -> tuple[list[dict], float]:
    from samesource import analyze
    from samesource.engine import fitting

    records: list[dict] = []
    inner = fitting._fit

    def recorded(st, data, deadline, **kw):
        fit = inner(st, data, deadline, **kw)
        records.append({"name": st.spec.name, "kind": _kind(st.spec.name), "estimator": fit.estimator,
                        "warm": kw.get("warm_x") is not None, "status": fit.status,
                        "iterations": int(fit.iterations), "cpu": float(fit.elapsed),
                        "fmin": float(fit.fmin), "x": [float(v) for v in fit.x]})
        return fit

    fitting._fit = recorded
    try:
        if survey == "sample":
            data = ROOT / "sample_surveys" / "staff_survey.csv"
            design = json.loads((ROOT / "sample_surveys" / "staff_survey_design.json").read_text())
        else:
            import workload

            n, k = (int(v) for v in survey.lower().split("x"))
            df, design, _ = workload.survey(n, k)
            data = Path(tempfile.mkdtemp()) / "survey.csv"
            df.to_csv(data, index=False)
        prof = cProfile.Profile(time.thread_time) if profile else None
        t0 = time.thread_time()
        if prof:
            prof.enable()
        analyze(data, design, missing=missing)
        if prof:
            prof.disable()
        total = time.thread_time() - t0
    finally:
        fitting._fit = inner
    if prof:
        pstats.Stats(prof).sort_stats("cumulative").print_stats(profile)
        pstats.Stats(prof).sort_stats("tottime").print_stats(profile)
    return records, total


def table(records: list[dict], total: float) -> str:
    by: dict[tuple[str, str, bool], list[dict]] = defaultdict(list)
    for r in records:
        by[(r["kind"], r["estimator"], r["warm"])].append(r)
    lines = ["| model kind | estimator | fits | iterations | CPU s |", "| --- | --- | ---: | ---: | ---: |"]
    for (kind, est, warm), rs in sorted(by.items(), key=lambda kv: -sum(r["cpu"] for r in kv[1])):
        lines.append(f"| {kind}{' (warm refit)' if warm else ''} | {est} | {len(rs)} | "
                     f"{sum(r['iterations'] for r in rs)} | {sum(r['cpu'] for r in rs):.2f} |")
    lines.append(f"| all fits | | {len(records)} | {sum(r['iterations'] for r in records)} | "
                 f"{sum(r['cpu'] for r in records):.2f} |")
    lines.append(f"\nThe whole report: {total:.2f} CPU s (this thread).")
    return "\n".join(lines)


def compare(records: list[dict], saved: list[dict], tol: float) -> list[str]:
    """Differences from a saved run: fit order, status, iterations, estimates beyond tol."""
    out = []
    if len(records) != len(saved):
        out.append(f"{len(records)} fits now, {len(saved)} saved")
    worst = 0.0
    for i, (a, b) in enumerate(zip(records, saved, strict=False)):
        where = f"fit {i} ({a['name']})"
        if a["name"] != b["name"]:
            out.append(f"{where}: saved fit is {b['name']}")
            continue
        if a["status"] != b["status"] or a["iterations"] != b["iterations"]:
            out.append(f"{where}: {a['status']}/{a['iterations']} now, {b['status']}/{b['iterations']} saved")
        d = float(np.max(np.abs(np.subtract(a["x"], b["x"])), initial=0.0))
        worst = max(worst, d)
        if d > tol:
            out.append(f"{where}: estimates differ by up to {d:.3g}")
    out.append(f"largest difference of an estimate: {worst:.3g} over {min(len(records), len(saved))} fits")
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--survey", default="sample", help="'sample' or NxK, e.g. 10000x60")
    ap.add_argument("--missing", default="listwise", choices=["listwise", "fiml"])
    ap.add_argument("--save", help="write the fits (with their iterates) to this JSON file")
    ap.add_argument("--compare", help="compare with the fits saved in this JSON file")
    ap.add_argument("--tol", type=float, default=1e-6)
    ap.add_argument("--profile", type=int, default=0, metavar="N")
    a = ap.parse_args()
    records, total = run(a.survey, a.missing, a.profile)
    print(table(records, total))
    if a.save:
        Path(a.save).write_text(json.dumps(records))
    if a.compare:
        print("\n".join(compare(records, json.loads(Path(a.compare).read_text()), a.tol)))


if __name__ == "__main__":
    main()
