"""The correction check's figures against a direct simulation of the same scenarios (run on
demand; the suite's short version is tests/test_correction_check.py).

A survey is drawn by sample_surveys/simulate.py (support and engagement, a marker, every item
0.70 on its trait and 0.35 on one method factor, 5-point answers, n = 500) and analysed with
``check_corrections = R``. For every scenario the check ran, the same population (its
loadings, method loadings, method-trait correlation and true path) is written as a
simulate.py SurveySpec, R surveys are drawn by simulate.py's own code and analysed with the
same options, and each estimate's bias and coverage are computed directly. The two should
agree within Monte Carlo error: the check's generator (answer quantiles of the client's data)
and simulate.py's (fixed symmetric thresholds) differ only in how the answers are cut.

Writes the block between the ``correction check study`` markers in docs/coverage.md.

    nice -n 10 python tests/benchmarks/correction_check_study.py [--replicates 100] [--n 500]
"""

from __future__ import annotations

import argparse
import sys
from datetime import date
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT / "sample_surveys"))  # the simulator (sample_surveys/simulate.py)

BEGIN, END = "<!-- correction check study: begin -->", "<!-- correction check study: end -->"
SHOWN = ("observed", "latent", "marker_adjusted", "method_factor_adjusted")


def spec_for(pop, n: int, seed: int):
    from simulate import ConstructSpec, SurveySpec

    cons = []
    for t, name in enumerate(pop.traits):
        idx = [i for i, k in enumerate(pop.trait_of) if k == t]
        role = "marker" if name == "weather" else "substantive"
        prefix = {"support": "sup", "engagement": "eng", "weather": "wth"}[name]
        cons.append(ConstructSpec(name, len(idx), [float(pop.loadings[i]) for i in idx],
                                  [float(pop.method[i]) for i in idx], role=role, prefix=prefix))
    beta = pop.truth[("engagement", "support")]
    rho = float(pop.method_trait[pop.traits.index("support")])
    return SurveySpec(constructs=cons, paths={"engagement": {"support": beta}}, n=n, seed=seed, scale_points=5,
                      method_trait_corr={"support": rho} if rho else {})


def direct(pop, design: dict, opts: dict, reps: int, n: int, scenario: int) -> dict:
    from samesource.corrections.correction_check import ESTIMATES, summarize
    from samesource.executor import SerialExecutor
    from samesource.pipeline import analyze
    from simulate import simulate_survey

    vals = np.full((reps, len(ESTIMATES), 3), np.nan)
    for r in range(reps):
        df, _ = simulate_survey(spec_for(pop, n, 10_000 * (scenario + 1) + r))
        p = analyze(df.to_csv(index=False).encode(), design, opts, name="direct.csv",
                    executor=SerialExecutor()).report["paths"][0]
        for e, m in enumerate(ESTIMATES):
            est = p["estimates"].get(p["preferred"] if m == "preferred" else m) or {}
            if est.get("estimate") is not None and est.get("status", "ok") == "ok":
                ci = est.get("ci") or [np.nan, np.nan]
                vals[r, e] = [est["estimate"], ci[0], ci[1]]
    truth = pop.truth[("engagement", "support")]
    return {m: summarize(vals[:, e], truth) for e, m in enumerate(ESTIMATES)}


def _f(v, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--replicates", type=int, default=100)
    ap.add_argument("--n", type=int, default=500)
    ap.add_argument("--out", type=Path, default=ROOT / "docs" / "coverage.md")
    args = ap.parse_args()

    from samesource.corrections.correction_check import correction_check
    from samesource.input.design import parse_design
    from samesource.options import AnalysisOptions
    from samesource.pipeline import analyze
    from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey

    client = SurveySpec(constructs=[ConstructSpec("support", 4, 0.70, 0.35), ConstructSpec("engagement", 4, 0.70, 0.35),
                                    ConstructSpec("weather", 3, 0.70, 0.35, role="marker", prefix="wth")],
                        paths={"engagement": {"support": 0.30}}, n=args.n, seed=1, scale_points=5)
    df, _ = simulate_survey(client)
    design = design_for(client)
    opts = AnalysisOptions(bootstrap=0)
    a = analyze(df.to_csv(index=False).encode(), design, opts, name="client.csv")
    check, pop = correction_check(parse_design(design), a.prepared, a.plan, a.report["method_variance"],
                                  a.report["paths"], opts, n=args.replicates,
                                  progress=lambda d, t: print(f"check {d}/{t}", flush=True))
    from samesource.corrections.correction_check import scenarios

    scen = {s.id: s for s in scenarios(parse_design(design), pop)}
    row = check["paths"][0]
    lines = [BEGIN, "", "## The correction check against a direct simulation", "",
             f"Measured by `tests/benchmarks/correction_check_study.py` on {date.today().isoformat()}: a survey of "
             f"{args.n} drawn by sample_surveys/simulate.py (support and engagement, a marker; every item 0.70 on its "
             "trait and 0.35 on the method; 5-point answers) analysed with the correction check at "
             f"N = {args.replicates}; for each scenario the same population drawn {args.replicates} times by "
             "simulate.py's own generator and analysed alike. Bias and coverage of the estimate of engagement on "
             f"support (true path in the check's population {row['truth']:.3f}); ± one Monte Carlo standard error.",
             "", "| scenario | estimate | check: bias | direct: bias | check: coverage | direct: coverage | "
             "agree (bias within 3 MC SE) |", "| --- | --- | ---: | ---: | ---: | ---: | --- |"]
    agree_all = True
    for i, (sid, s) in enumerate(scen.items()):
        if s.population is None:
            continue
        print("direct", sid, flush=True)
        d = direct(s.population, design, opts.to_dict(), args.replicates, args.n, i)
        for m in SHOWN:
            c, g = row["scenarios"][sid][m], d[m]
            if c["bias"] is None or g["bias"] is None:
                continue
            if c["bias_mc_se"] is None or g["bias_mc_se"] is None:
                ok = None  # a single estimate: no Monte Carlo error to compare with
            else:
                ok = abs(c["bias"] - g["bias"]) <= 3 * float(np.hypot(c["bias_mc_se"], g["bias_mc_se"]))
                agree_all &= ok
            lines.append(f"| {s.title} | {m} | {c['bias']:+.3f} ± {_f(c['bias_mc_se'], '.3f')} | {g['bias']:+.3f} ± "
                         f"{_f(g['bias_mc_se'], '.3f')} | {_f(c['coverage'], '.2f')} | {_f(g['coverage'], '.2f')} | "
                         f"{'-' if ok is None else 'yes' if ok else 'NO'} |")
    lines += ["", "Every row agrees." if agree_all else "Rows marked NO disagree beyond Monte Carlo error.", "",
              f"The check leans on {row['lean_on']} ({row['lean_on_reason']}).", "", END]
    text = args.out.read_text() if args.out.exists() else ""
    block = "\n".join(lines)
    if BEGIN in text:
        head, rest = text.split(BEGIN, 1)
        text = head + block + rest.split(END, 1)[1]
    else:
        text = text.rstrip("\n") + "\n\n" + block + "\n"
    args.out.write_text(text)
    print(block)


if __name__ == "__main__":
    main()
