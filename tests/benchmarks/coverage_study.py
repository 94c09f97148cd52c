"""Simulation study with known truth: bias, RMSE and 95% interval coverage of every estimate.

Run on demand (it takes minutes); results go to docs/coverage.md. The slow test
tests/test_coverage_study.py runs one condition of the same study and checks its numbers.

The survey (sample_surveys/simulate.py): traits sup, eng, sty and a marker wth with its own trait,
three or four continuous items per scale, every item 0.70 trait + 0.35 common method + error
(method share of item variance 0.1225); true standardized paths eng on sup .30 and sty on eng
.45. Each replicate is a fresh sample analysed by `samesource.pipeline.analyze` with the
default options (analytic Wald intervals), exactly as the command line would.

    python tests/benchmarks/coverage_study.py [--seeds 100] [--n 300 600 1500] [--out docs/coverage.md]
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "sample_surveys"))  # the simulator (sample_surveys/simulate.py)

from samesource.executor import LocalExecutor  # noqa: E402
from samesource.pipeline import analyze  # noqa: E402
from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey  # noqa: E402

TRUTH = {("eng", "sup"): 0.30, ("sty", "eng"): 0.45}
METHOD_LOADING = 0.35
FIRST_SEED = 10_000  # apart from the seeds the quick tests use


def spec(seed: int, n: int) -> SurveySpec:
    m = METHOD_LOADING
    return SurveySpec(
        constructs=[ConstructSpec("sup", 4, 0.7, m), ConstructSpec("eng", 4, 0.7, m),
                    ConstructSpec("sty", 3, 0.7, m), ConstructSpec("wth", 3, 0.7, m, role="marker")],
        paths={"eng": {"sup": 0.30}, "sty": {"eng": 0.45}}, n=n, scale_points=None, seed=seed)


def one_replicate(task: tuple[int, int]) -> list[dict]:
    """Every estimate of every key path in one simulated survey (module level: picklable)."""
    seed, n = task
    s = spec(seed, n)
    df, _ = simulate_survey(s)
    report = analyze(df.to_csv(index=False).encode(), design_for(s), name="sim.csv").report
    rows = []
    for p in report["paths"]:
        key = (p["outcome"], p["predictor"])
        for method, e in p["estimates"].items():
            rows.append({"seed": seed, "n": n, "path": key, "method": method,
                         "preferred": method == p["preferred"],
                         "estimate": None if e is None else e["estimate"],
                         "ci": None if e is None else e["ci"]})
        e = p["estimates"][p["preferred"]]
        rows.append({"seed": seed, "n": n, "path": key, "method": "(preferred)", "preferred": True,
                     "chosen": p["preferred"], "estimate": e["estimate"], "ci": e["ci"]})
    return rows


@dataclass
class Cell:
    """Summary of one estimate of one path at one sample size."""

    n: int
    path: tuple[str, str]
    method: str
    estimates: list[float] = field(default_factory=list)
    covered: int = 0
    with_ci: int = 0
    missing: int = 0
    chosen: dict[str, int] = field(default_factory=dict)

    @property
    def truth(self) -> float:
        return TRUTH[self.path]

    @property
    def bias(self) -> float:
        return sum(self.estimates) / len(self.estimates) - self.truth

    @property
    def rmse(self) -> float:
        return math.sqrt(sum((e - self.truth) ** 2 for e in self.estimates) / len(self.estimates))

    @property
    def coverage(self) -> float:
        return self.covered / self.with_ci if self.with_ci else float("nan")


def summarize(rows: list[dict]) -> dict[tuple[int, tuple[str, str], str], Cell]:
    cells: dict[tuple[int, tuple[str, str], str], Cell] = {}
    for r in rows:
        key = (r["n"], r["path"], r["method"])
        c = cells.setdefault(key, Cell(r["n"], r["path"], r["method"]))
        if r["estimate"] is None:
            c.missing += 1
            continue
        c.estimates.append(r["estimate"])
        if "chosen" in r:
            c.chosen[r["chosen"]] = c.chosen.get(r["chosen"], 0) + 1
        ci = r["ci"]
        if ci and ci[0] is not None and ci[1] is not None:
            c.with_ci += 1
            c.covered += ci[0] <= c.truth <= ci[1]
    return cells


def run(seeds: int, sizes: list[int], workers: int = 2) -> list[dict]:
    tasks = [(FIRST_SEED + i, n) for n in sizes for i in range(seeds)]
    if workers > 1:
        # import_main: one_replicate is defined here, in __main__ when this file runs as a script
        with LocalExecutor(workers, import_main=True) as ex:
            chunks = ex.map(one_replicate, tasks)
    else:
        chunks = [one_replicate(t) for t in tasks]
    return [r for chunk in chunks for r in chunk]


def binomial_range(k: int, p: float = 0.95, tail: float = 0.025) -> tuple[int, int]:
    """Coverage counts out of k that a true 95% interval gives with probability 1 - 2*tail."""
    from scipy.stats import binom

    return int(binom.ppf(tail, k, p)), int(binom.isf(tail, k, p))


def markdown(cells: dict, seeds: int, sizes: list[int], seconds: float) -> str:
    order = ["observed", "disattenuated", "disattenuated_omega", "errors_in_variables", "latent",
             "marker_adjusted", "method_factor_adjusted", "measured_method_adjusted", "(preferred)"]
    lo, hi = binomial_range(seeds)
    out = [
        "# Simulation study: bias and coverage with known truth",
        "",
        f"Made by `tests/benchmarks/coverage_study.py` on {time.strftime('%Y-%m-%d')} "
        f"({seeds} samples per size, {seconds / 60:.0f} min on two cores). The slow test "
        "`tests/test_coverage_study.py` (`pytest -m slow`) reruns one size and checks it.",
        "",
        "Population (`sample_surveys/simulate.py`, continuous items): support (4 items), engagement (4),",
        "intent to stay (3) and a marker with its own trait (3); every item loads 0.70 on its trait",
        f"and {METHOD_LOADING:.2f} on one common method factor (method share of item variance "
        f"{METHOD_LOADING ** 2:.4f}); true standardized paths engagement on support 0.30, intent",
        "on engagement 0.45. Each sample is analysed with the default options (analytic Wald",
        "intervals, no bootstrap), as the command line does.",
        "",
        f"A 95% interval procedure covers the truth in {lo} to {hi} of {seeds} samples with",
        "probability 95% (binomial); coverage outside that range is a real departure.",
        "",
    ]
    for path, truth in TRUTH.items():
        out += [f"## {path[0]} on {path[1]} (truth {truth:.2f})", ""]
        out += ["| n | estimate | mean | bias | RMSE | 95% coverage | not available |",
                "| ---: | --- | ---: | ---: | ---: | ---: | ---: |"]
        for n in sizes:
            for m in order:
                c = cells.get((n, path, m))
                if c is None or not c.estimates:
                    continue
                name = "**preferred**" if m == "(preferred)" else m
                out.append(f"| {n:,} | {name} | {c.truth + c.bias:.3f} | {c.bias:+.3f} | {c.rmse:.3f} "
                           f"| {c.covered}/{c.with_ci} ({c.coverage:.0%}) | {c.missing} |")
        out.append("")
        for n in sizes:
            c = cells.get((n, path, "(preferred)"))
            if c is not None:
                chosen = ", ".join(f"{k} {v}" for k, v in sorted(c.chosen.items(), key=lambda kv: -kv[1]))
                out.append(f"- n = {n:,}: the preferred estimate was {chosen}.")
        out.append("")
    return "\n".join(out)


# docs/coverage.md continues with the assumption study (tests/benchmarks/assumption_study.py),
# from this marker on: rewriting this study's part keeps it.
OTHER_STUDIES = "<!-- assumption-study -->"


def kept_tail(path: Path) -> str:
    text = path.read_text(encoding="utf-8") if path.exists() else ""
    return "\n" + text[text.index(OTHER_STUDIES):] if OTHER_STUDIES in text else ""


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=100)
    ap.add_argument("--n", type=int, nargs="+", default=[300, 600, 1500])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--out", type=Path, default=ROOT / "docs" / "coverage.md")
    args = ap.parse_args(argv)
    t0 = time.monotonic()
    rows = run(args.seeds, args.n, args.workers)
    text = markdown(summarize(rows), args.seeds, args.n, time.monotonic() - t0)
    args.out.write_text(text + "\n" + kept_tail(args.out), encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
