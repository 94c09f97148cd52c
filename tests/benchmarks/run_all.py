"""Speed benchmarks of the whole report, run on demand (`make bench`); never part of the suite.

Measures, for 2,000 / 10,000 / 100,000 respondents and 20 / 40 / 60 items:
- the full report without bootstrap (from the file's bytes: loading included);
- the same with 1,000 bootstrap replicates (replicates refit from resampled covariance
  matrices, warm-started, on the local process pool), and the bootstrap stage alone;
- for 10,000 x 60, the naive alternative: re-running the whole analysis on each resampled
  raw data set (timed on a few replicates, scaled to 1,000).
Results go to docs/performance.md with a description of the machine.

    python tests/benchmarks/run_all.py [--quick] [--replicates N] [--out docs/performance.md]
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from workload import survey  # noqa: E402

from samesource.input.loading import load_table  # noqa: E402
from samesource.pipeline import analyze  # noqa: E402

TARGETS = [
    "10,000 x 60 without bootstrap: under 10 s.",
    "10,000 x 60 with 1,000 replicates: under 120 s, and at least 10 times faster than re-running "
    "every model on the raw data per replicate.",
    "Bootstrap cost grows with respondents only through the resampling itself.",
]


def machine() -> list[str]:
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = "unknown"
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal"):
                mem = f"{int(line.split()[1]) / 1024 / 1024:.0f} GiB"
    except OSError:
        pass
    import scipy

    blas = "unknown"
    try:
        from threadpoolctl import threadpool_info

        blas = ", ".join(f"{i['internal_api']} {i.get('version')} ({i.get('architecture')})"
                         for i in threadpool_info() if i["user_api"] == "blas")
    except ImportError:
        pass
    return [f"- CPU: {cpu}, {os.cpu_count()} cores; memory {mem}",
            f"- Python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}; BLAS {blas}",
            f"- OPENBLAS_CORETYPE={os.environ.get('OPENBLAS_CORETYPE', '(unset)')}"]


def timed_report(data: bytes, design: dict, options: dict) -> tuple[float, float | None, dict]:
    stamps: dict[str, float] = {}

    def progress(stage: str, done: int, total: int) -> None:
        if stage == "bootstrap":
            stamps.setdefault("boot_start", time.perf_counter())
            stamps["boot_end"] = time.perf_counter()

    t0 = time.perf_counter()
    report = analyze(data, design, options, name="bench.csv", progress=progress).report
    total = time.perf_counter() - t0
    boot = stamps["boot_end"] - stamps["boot_start"] if "boot_start" in stamps else None
    return total, boot, report


def naive_per_replicate(df, design: dict, k: int = 3, seed: int = 0) -> float:
    rng = np.random.default_rng(seed)
    times = []
    for _ in range(k):
        sample = df.iloc[rng.integers(0, len(df), len(df))]
        data = sample.to_csv(index=False).encode()
        t0 = time.perf_counter()
        analyze(load_table(data, name="naive.csv"), design)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="small grid, 100 replicates (a smoke run)")
    ap.add_argument("--replicates", type=int, default=1000)
    ap.add_argument("--out", default=str(Path(__file__).resolve().parents[2] / "docs" / "performance.md"))
    args = ap.parse_args()
    sizes = [2000, 10000] if args.quick else [2000, 10000, 100000]
    items = [20, 60] if args.quick else [20, 40, 60]
    reps = 100 if args.quick else args.replicates

    rows = []
    naive = None
    for n in sizes:
        for k in items:
            df, design, _ = survey(n, k)
            data = df.to_csv(index=False).encode()
            t_plain, _, _ = timed_report(data, design, {})
            t_boot, t_stage, report = timed_report(data, design, {"bootstrap": reps, "seed": 1})
            failed = max((e["bootstrap"]["n_failed"] for p in report["paths"] for e in p["estimates"].values()
                          if e and "bootstrap" in e), default=0)
            rows.append((n, k, t_plain, t_boot, t_stage, failed))
            print(f"n={n} items={k}: report {t_plain:.1f} s; with {reps} replicates {t_boot:.1f} s "
                  f"(bootstrap stage {t_stage:.1f} s, most failed replicates {failed})", flush=True)
            if n == 10000 and k == 60:
                per = naive_per_replicate(df, design)
                naive = (per, per * reps, t_stage)
                print(f"naive: {per:.2f} s per replicate -> {per * reps:.0f} s for {reps}", flush=True)

    lines = ["# Performance", "",
             f"Measured by `tests/benchmarks/run_all.py` on {time.strftime('%Y-%m-%d')} "
             "(run on demand with `make bench`; the test suite never times anything).", "",
             "## Machine", ""] + machine() + ["", "## Targets", ""] + [f"- {t}" for t in TARGETS] + [
        "", f"## Full report, without and with {reps} bootstrap replicates", "",
        "Synthetic surveys (tests/benchmarks/workload.py): 5-point items, 5 per construct, one marker "
        "and one measured method scale, two key paths. Times in seconds, from the file's bytes "
        "(loading, screening, every method-variance model, every path estimate, sensitivity curves).", "",
        "| respondents | items | report | with bootstrap | bootstrap stage | per replicate | most failed replicates |",
        "| ---: | ---: | ---: | ---: | ---: | ---: | ---: |"]
    for n, k, tp, tb, ts, f in rows:
        lines.append(f"| {n:,} | {k} | {tp:.1f} | {tb:.1f} | {ts:.1f} | {ts / reps * 1000:.0f} ms | {f} |")
    if naive:
        per, total, stage = naive
        lines += ["", "## Against re-running everything per replicate (10,000 x 60)", "",
                  f"Re-running the whole analysis on each resampled raw data set took {per:.2f} s per replicate "
                  f"(median of 3), so {total:.0f} s for {reps}; the bootstrap stage took {stage:.1f} s: "
                  f"{total / stage:.0f} times faster."]
    lines += ["", "Replicates refit only the models behind the path estimates, from each replicate's "
              "covariance matrix, warm-started from the full-sample solution; the number of respondents "
              "enters only through resampling rows and forming that matrix."]
    out = Path(args.out)
    old = out.read_text(encoding="utf-8") if out.exists() else ""
    begin, end = "<!-- scale: begin -->", "<!-- scale: end -->"
    if begin in old and end in old:  # scale.py's block (the big files) and what follows it: kept
        lines += ["", old[old.index(begin):].rstrip("\n")]
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"written {args.out}")


if __name__ == "__main__":
    main()
