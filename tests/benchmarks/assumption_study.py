"""Assumption study: each correction where its assumptions hold, fail, or cannot be checked.

Scenarios of our own design with known truth (`simulate.SCENARIOS`: a clean survey,
the assumptions holding, a marker without the method, congeneric method loadings, method
correlated with a trait, skewed 5-point items, n = 150, a measured method scale, acquiescence
with reverse-keyed items). Each sample is analysed by `samesource.pipeline.analyze` with the
default options, exactly as the command line would. Measured per scenario: the preferred
estimate's bias, RMSE and 95% interval coverage; how often `paths[].bounds` hold the truth
(overall, and where an assumption the preferred estimate rests on is `untestable` or
`fails`); the verdict's levels; each assumption's status. Report fields that do not exist
yet are counted as absent. The results replace the assumption-study section of
docs/coverage.md (between its markers); tests/test_assumption_study.py reruns one scenario.

    python tests/benchmarks/assumption_study.py [--seeds 50] [--scenarios clean baseline ...]
        [--workers 2] [--raw results.json] [--from-raw results.json]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
import traceback
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "sample_surveys"))  # the simulator (sample_surveys/simulate.py)

from samesource.executor import LocalExecutor, SerialExecutor  # noqa: E402
from samesource.pipeline import analyze  # noqa: E402
from simulate import SCENARIOS, Scenario, make_scenario, simulate_survey  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from coverage_study import binomial_range  # noqa: E402

FIRST_SEED = 20_000  # apart from the coverage study's and the quick tests' seeds
RUNS = ("latest", "baseline")  # docs/coverage.md keeps one block of each, between markers


def markers(run_key: str) -> tuple[str, str]:
    return f"<!-- assumption-study:{run_key}:start -->", f"<!-- assumption-study:{run_key}:end -->"


STATUSES = ("holds", "doubtful", "fails", "untestable")
NOT_VOUCHED = ("untestable", "fails")
VERDICTS = ("none", "minor", "substantial", "undetermined")
# Targets of the issue (docs/coverage.md states them beside the figures).
BIAS_TARGET = 0.03
COVERAGE_TARGET = (0.93, 0.97)
BOUNDS_TARGET = 0.95
FALSE_ALARM_TARGET = 0.05
SHARE_FOR_NONE = 0.10
CHECK_TARGET = 0.95  # an assumption check's expected status, in at least this share of samples
# Extra samples for the bias alone, as a multiple of --seeds. At n = 150 the preferred estimate's
# spread (SD about .095) is twice that at n = 600, so 40 samples give a Monte Carlo SE of .015 on
# the bias, half the ±.03 target; four times the samples give the precision the other scenarios
# have (Morris, White & Crowther 2019 on choosing the number of repetitions). The extra samples
# are analysed with the default options but no bootstrap: the bootstrap changes the intervals,
# not the point estimates, so they count for bias and RMSE only.
BIAS_ONLY_EXTRA = {"n150": 3}


def one_sample(task: tuple[str, int] | tuple[str, int, bool]) -> dict:
    """One simulated survey of a scenario, analysed with the default options (picklable);
    ``bias_only``: without a bootstrap, counted for the bias and RMSE only."""
    name, seed, bias_only = (*task, False)[:3]
    sc = make_scenario(name, seed)
    df, _ = simulate_survey(sc.spec)
    row: dict = {"scenario": name, "seed": seed}
    if bias_only:
        row["bias_only"] = True
    try:
        # a bootstrap the defaults may start runs serially inside this worker (2 processes in all)
        report = analyze(df.to_csv(index=False).encode(), sc.design(), {"bootstrap": 0} if bias_only else None,
                         name="sim.csv", executor=SerialExecutor()).report
    except Exception as exc:  # noqa: BLE001 - a failed analysis is a finding, not a crash of the study
        row["error"] = f"{type(exc).__name__}: {exc}"
        row["traceback"] = traceback.format_exc(limit=3)
        return row
    mv = report.get("method_variance") or {}
    mf = mv.get("method_factor") or {}
    row["verdict"] = (mv.get("verdict") or {}).get("level")
    row["method_share"] = {"method_factor": mf.get("method_share"), "loadings": mf.get("loadings"),
                           "usable": mf.get("usable_as_correction"),
                           "measured": (mv.get("measured_method") or {}).get("method_share")}
    if "assumptions" in report:
        row["assumptions"] = [{"id": a.get("id"), "status": a.get("status"),
                               "affects": list(a.get("affects") or [])} for a in report["assumptions"]]
    paths = []
    for p in report.get("paths") or []:
        e = p["estimates"].get(p["preferred"]) or {}
        entry = {"path": [p["outcome"], p["predictor"]], "preferred": p["preferred"],
                 "estimate": e.get("estimate"), "se": e.get("se"), "ci": e.get("ci"),
                 "ci_method": e.get("ci_method")}
        if "bounds" in p:
            b = p["bounds"] or {}
            entry["bounds"] = [b.get("low"), b.get("high")]
            entry["bounds_basis"] = b.get("basis")
            entry["plausible_share"] = b.get("plausible_share")
        if "trust" in p:
            entry["trust"] = (p["trust"] or {}).get("level")
        paths.append(entry)
    row["paths"] = paths
    return row


def run(names: list[str], seeds: int, workers: int = 2, log=print, save=None,
        bias_extra: dict[str, int] | None = None) -> list[dict]:
    """Every scenario's samples, then its extra bias-only samples (``bias_extra``: a multiple of
    ``seeds`` per scenario); ``save(rows)`` after each keeps partial results."""
    rows: list[dict] = []
    extra = BIAS_ONLY_EXTRA if bias_extra is None else bias_extra
    # import_main: one_sample is defined here, in __main__ when this file runs as a script
    ex = LocalExecutor(workers, import_main=True) if workers > 1 else SerialExecutor()
    try:
        for name in names:
            t0 = time.monotonic()
            rows += ex.map(one_sample, [(name, FIRST_SEED + i) for i in range(seeds)])
            log(f"{name}: {seeds} samples in {time.monotonic() - t0:.0f} s")
            if save is not None:
                save(rows)
            k = extra.get(name, 0) * seeds
            if k:
                t0 = time.monotonic()
                rows += ex.map(one_sample, [(name, FIRST_SEED + seeds + i, True) for i in range(k)])
                log(f"{name}: {k} bias-only samples in {time.monotonic() - t0:.0f} s")
                if save is not None:
                    save(rows)
    finally:
        if isinstance(ex, LocalExecutor):
            ex.shutdown()
    return rows


# ---- summaries ----------------------------------------------------------------------------

def margin(k: int, p: float = 0.95) -> float:
    """Half-width of the 95% binomial range of an observed rate around p with k trials."""
    return 1.96 * math.sqrt(p * (1 - p) / k) if k else float("nan")


@dataclass
class PathCell:
    truth: float
    estimates: list[float] = field(default_factory=list)  # every sample's, bias-only ones included
    covered: int = 0
    with_ci: int = 0
    nonzero: int = 0  # intervals excluding zero
    bounds_n: int = 0
    bounds_held: int = 0
    nv_n: int = 0  # samples where an assumption of the preferred estimate is untestable or fails
    nv_held: int = 0
    chosen: Counter = field(default_factory=Counter)
    trust: Counter = field(default_factory=Counter)

    @property
    def bias(self) -> float:
        return sum(self.estimates) / len(self.estimates) - self.truth if self.estimates else math.nan

    @property
    def rmse(self) -> float:
        if not self.estimates:
            return math.nan
        return math.sqrt(sum((e - self.truth) ** 2 for e in self.estimates) / len(self.estimates))


@dataclass
class ScenarioSummary:
    scenario: Scenario
    samples: int = 0
    bias_only: int = 0  # extra samples counted for the bias and RMSE only
    errors: list[str] = field(default_factory=list)
    verdicts: Counter = field(default_factory=Counter)
    statuses: dict[str, Counter] = field(default_factory=dict)
    assumptions_absent: int = 0
    bounds_absent: int = 0
    paths: dict[tuple[str, str], PathCell] = field(default_factory=dict)
    shares: list[float] = field(default_factory=list)
    loadings: Counter = field(default_factory=Counter)
    share_range_n: int = 0  # path-samples with bounds.plausible_share
    share_range_held: int = 0  # ... holding the true method share
    trust: Counter = field(default_factory=Counter)
    none_when_instrument_failed_check: int = 0  # verdict none while the report said the marker fails
    instrument_failed_check: int = 0


def summarize(rows: list[dict]) -> dict[str, ScenarioSummary]:
    out: dict[str, ScenarioSummary] = {}
    for r in rows:
        s = out.get(r["scenario"])
        if s is None:
            s = out[r["scenario"]] = ScenarioSummary(make_scenario(r["scenario"]))
        if r.get("bias_only"):
            s.bias_only += 1
            for p in r.get("paths") or []:
                key = tuple(p["path"])
                c = s.paths.setdefault(key, PathCell(s.scenario.true_paths[key]))
                if p["estimate"] is not None:
                    c.estimates.append(p["estimate"])
            if "error" in r:
                s.errors.append(r["error"])
            continue
        s.samples += 1
        if "error" in r:
            s.errors.append(r["error"])
            continue
        s.verdicts[r["verdict"]] += 1
        ms = r["method_share"]
        share = ms["method_factor"] if ms["usable"] else ms["measured"]
        if share is not None:
            s.shares.append(share)
        s.loadings[ms["loadings"] if ms["usable"] else "not usable"] += 1
        assumptions = r.get("assumptions")
        if assumptions is None:
            s.assumptions_absent += 1
        else:
            for a in assumptions:
                s.statuses.setdefault(a["id"], Counter())[a["status"]] += 1
                if a["id"] == "method_loadings" and ms["usable"]:
                    # "method_loadings/equal": the check's status where the equal-loading factor was used
                    s.statuses.setdefault(f"method_loadings/{ms['loadings']}", Counter())[a["status"]] += 1
            if any(a["id"] == "marker_carries_method" and a["status"] == "fails" for a in assumptions):
                s.instrument_failed_check += 1
                s.none_when_instrument_failed_check += r["verdict"] == "none"
        for p in r["paths"]:
            key = tuple(p["path"])
            c = s.paths.setdefault(key, PathCell(s.scenario.true_paths[key]))
            c.chosen[p["preferred"]] += 1
            if p.get("trust") is not None:
                c.trust[p["trust"]] += 1
                s.trust[p["trust"]] += 1
            ps = p.get("plausible_share")
            if ps and len(ps) == 2 and ps[0] is not None and ps[1] is not None:
                s.share_range_n += 1
                s.share_range_held += ps[0] <= s.scenario.method_share <= ps[1]
            if p["estimate"] is None:
                continue
            c.estimates.append(p["estimate"])
            ci = p["ci"]
            if ci and ci[0] is not None and ci[1] is not None:
                c.with_ci += 1
                c.covered += ci[0] <= c.truth <= ci[1]
                c.nonzero += not (ci[0] <= 0 <= ci[1])
            if "bounds" not in p:
                s.bounds_absent += 1
                continue
            lo, hi = p["bounds"]
            held = lo is not None and hi is not None and lo <= c.truth <= hi
            c.bounds_n += 1
            c.bounds_held += held
            if assumptions is not None and any(
                    a["status"] in NOT_VOUCHED and p["preferred"] in a["affects"] for a in assumptions):
                c.nv_n += 1
                c.nv_held += held
    return out


# ---- targets ------------------------------------------------------------------------------

@dataclass
class Target:
    name: str
    figure: str
    met: bool | None  # None: cannot be judged (fields absent)


def targets(s: ScenarioSummary) -> list[Target]:
    sc = s.scenario
    out: list[Target] = []
    cells = list(s.paths.values())
    if sc.assumptions_hold and cells:
        total = sum(c.with_ci for c in cells)
        covered = sum(c.covered for c in cells)
        lo, hi = binomial_range(total)
        w = max(cells, key=lambda c: abs(c.bias))
        # Monte Carlo standard error of a mean over R samples: SD / sqrt(R)
        mc_se = math.sqrt(max(w.rmse ** 2 - w.bias ** 2, 0.0) / len(w.estimates))
        extra = f"; {len(w.estimates)} samples, {s.bias_only} of them without a bootstrap" if s.bias_only else ""
        out.append(Target(f"preferred within ±{BIAS_TARGET:.2f} of truth",
                          f"largest |bias| {abs(w.bias):.3f} (Monte Carlo SE {mc_se:.3f}{extra})",
                          abs(w.bias) <= BIAS_TARGET))
        rate = covered / total if total else math.nan
        out.append(Target(
            f"95% coverage {COVERAGE_TARGET[0]:.0%}-{COVERAGE_TARGET[1]:.0%}",
            f"{covered}/{total} ({rate:.1%} ± {margin(total):.1%}; a true 95% interval gives "
            f"{lo}-{hi})", lo <= covered <= hi))
    nv_n = sum(c.nv_n for c in cells)
    b_n = sum(c.bounds_n for c in cells)
    if s.bounds_absent and not b_n:
        out.append(Target("bounds hold the truth where checks cannot vouch", "bounds absent", None))
    elif nv_n:
        held = sum(c.nv_held for c in cells)
        out.append(Target(f"bounds hold the truth where checks cannot vouch (>= {BOUNDS_TARGET:.0%})",
                          f"{held}/{nv_n} ({held / nv_n:.0%} ± {margin(nv_n):.0%})",
                          held / nv_n >= BOUNDS_TARGET))
    ok = sum(s.verdicts.values())
    if sc.method_share >= SHARE_FOR_NONE and sc.instrument_fails:
        k = s.verdicts["none"]
        out.append(Target("never 'none' when the share is >= .10 and the instrument fails",
                          f"'none' in {k}/{ok}", k == 0))
    if s.instrument_failed_check and sc.method_share >= SHARE_FOR_NONE:
        k = s.none_when_instrument_failed_check
        out.append(Target("never 'none' where the report says the marker fails its check",
                          f"'none' in {k}/{s.instrument_failed_check}", k == 0))
    if sc.method_share == 0:
        k = s.verdicts["minor"] + s.verdicts["substantial"]
        out.append(Target(f"false alarms <= {FALSE_ALARM_TARGET:.0%}",
                          f"{k}/{ok} ({k / ok:.0%}; ± {margin(ok, FALSE_ALARM_TARGET):.0%} at this R)"
                          if ok else "no sample", ok > 0 and k / ok <= FALSE_ALARM_TARGET))
    for aid, expected in sc.expected.items():
        counts = s.statuses.get(aid)
        if counts is None:
            out.append(Target(f"check '{aid}' says {' or '.join(expected)}",
                              "absent" if s.assumptions_absent else "not in the report", None))
            continue
        k = sum(counts[e] for e in expected)
        n = sum(counts.values())
        # each check tests at the 5% level, so it may be wrong by chance in about 5% of samples
        out.append(Target(f"check '{aid}' says {' or '.join(expected)} (>= {CHECK_TARGET:.0%})",
                          f"{k}/{n}", k >= CHECK_TARGET * n))
    return out


# ---- markdown -----------------------------------------------------------------------------

def _fmt_counter(c: Counter, order: tuple[str, ...] = ()) -> str:
    keys = [k for k in order if c.get(k)] + sorted(k for k in c if k not in order and c[k])
    return ", ".join(f"{k} {c[k]}" for k in keys) or "-"


def markdown(summaries: dict[str, ScenarioSummary], seeds: int, seconds: float, label: str,
             run_key: str = "latest", made: str | None = None) -> str:
    lo, hi = binomial_range(seeds)
    start, end = markers(run_key)
    out = [
        start,
        f"### {'Latest run' if run_key == 'latest' else 'Baseline run'}: {label}",
        "",
        f"Made by `tests/benchmarks/assumption_study.py` on {made or _now()}"
        f" (up to {seeds} samples per scenario, {seconds / 60:.0f} min on two processes). "
        "The slow test `tests/test_assumption_study.py` reruns one scenario.",
        "",
        "Every scenario is the survey of `sample_surveys/simulate.py` (support 4 items, engagement 4, intent",
        "to stay 3, a marker with a trait of its own 3; trait loadings .70) with one departure. True",
        "standardized paths, solved from the generating model's trait covariance: engagement on",
        "support .30, intent on engagement .45, intent on support 0 (a true null). Each sample is",
        "analysed with the default options, as the command line does. The true method share is the",
        "mean share of substantive item variance due to the shared method factor(s).",
        "",
        f"With {seeds} samples a true 95% interval covers the truth in {lo} to {hi} of them with",
        f"probability 95% (binomial; ± {margin(seeds):.1%} around 95%); pooled over the three paths",
        f"({3 * seeds} intervals) the range is {binomial_range(3 * seeds)[0]} to "
        f"{binomial_range(3 * seeds)[1]} (± {margin(3 * seeds):.1%}). A coverage target is judged met",
        "when the pooled count lies in that range: this R cannot resolve 93% from 97%.",
        "",
        "Targets (issue 11): where the assumptions hold, the preferred estimate within ±.03 of the",
        "truth with 93-97% coverage; where an assumption the preferred estimate rests on is",
        "`untestable` or `fails`, `bounds` hold the truth in at least 95% of samples; the verdict",
        "never 'none' when the true share is >= .10 and the instrument failed its check; at most 5%",
        "false alarms (minor or substantial) on clean data. A field the report does not have yet is",
        "counted as absent. Where a scenario has extra samples \"for the bias only\" (n = 150: its",
        "estimates spread twice as far, so four times the samples give the same Monte Carlo precision),",
        "they are analysed with the default options but no bootstrap and count for the mean, bias and",
        "RMSE only; coverage, bounds, verdicts and statuses come from the samples with the defaults.",
        "",
        "| scenario | tests | true share | assumptions hold | n | samples |",
        "| --- | --- | ---: | --- | ---: | ---: |",
    ]
    for s in summaries.values():
        sc = s.scenario
        more = f" (+{s.bias_only} for the bias only)" if s.bias_only else ""
        out.append(f"| {sc.name} | {sc.tests} | {sc.method_share:.3f} | "
                   f"{'yes' if sc.assumptions_hold else 'no'}: {sc.why} | {sc.spec.n:,} | {s.samples}{more} |")
    out += ["", "#### Targets", "", "| scenario | target | figure | met |", "| --- | --- | --- | --- |"]
    for s in summaries.values():
        for t in targets(s):
            met = "absent" if t.met is None else ("**yes**" if t.met else "**NO**")
            out.append(f"| {s.scenario.name} | {t.name} | {t.figure} | {met} |")
    out += ["", "#### Preferred estimate per path", "",
            "| scenario | path (truth) | mean | bias | RMSE | 95% coverage | CI excludes 0 | "
            "bounds hold truth | where not vouched | preferred |",
            "| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- |"]
    for s in summaries.values():
        for (y, x), c in s.paths.items():
            if not c.estimates:
                continue
            cov = f"{c.covered}/{c.with_ci} ({c.covered / c.with_ci:.0%} ± {margin(c.with_ci):.0%})" \
                if c.with_ci else "-"
            bounds = f"{c.bounds_held}/{c.bounds_n}" if c.bounds_n else "absent"
            nv = f"{c.nv_held}/{c.nv_n}" if c.nv_n else ("absent" if not c.bounds_n else "0 samples")
            out.append(f"| {s.scenario.name} | {y} on {x} ({c.truth:.2f}) | {c.truth + c.bias:.3f} | "
                       f"{c.bias:+.3f} | {c.rmse:.3f} | {cov} | {c.nonzero}/{c.with_ci} | {bounds} | {nv} | "
                       f"{_fmt_counter(c.chosen)} |")
    out += ["", "#### Verdicts, method shares and assumption statuses", "",
            "| scenario | true share | estimated share (mean, range) | method factor loadings | verdict | "
            "plausible share holds truth | trust | assumption statuses | errors |",
            "| --- | ---: | --- | --- | --- | ---: | --- | --- | ---: |"]
    for s in summaries.values():
        sh = (f"{sum(s.shares) / len(s.shares):.3f} ({min(s.shares):.3f}-{max(s.shares):.3f})"
              if s.shares else "-")
        st = ("absent" if s.assumptions_absent and not s.statuses else
              "; ".join(f"{aid}: {_fmt_counter(c, STATUSES)}" for aid, c in s.statuses.items()))
        ps = f"{s.share_range_held}/{s.share_range_n}" if s.share_range_n else "absent"
        tr = _fmt_counter(s.trust) if s.trust else "absent"
        out.append(f"| {s.scenario.name} | {s.scenario.method_share:.3f} | {sh} | {_fmt_counter(s.loadings)} | "
                   f"{_fmt_counter(s.verdicts, VERDICTS)} | {ps} | {tr} | {st} | {len(s.errors)} |")
    errs = [(s.scenario.name, e) for s in summaries.values() for e in s.errors]
    if errs:
        out += ["", "Analyses that raised: " + "; ".join(f"{n}: {e}" for n, e in errs[:5])]
    out += ["", end]
    return "\n".join(out)


def _now() -> str:
    return time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())


def write_section(path: Path, section: str, run_key: str = "latest") -> None:
    """Replace the run's block in ``path`` (or append it), keeping everything else."""
    start, end = markers(run_key)
    text = path.read_text(encoding="utf-8") if path.exists() else ""
    if start in text and end in text:
        head, rest = text.split(start, 1)
        tail = rest.split(end, 1)[1]
    else:
        head, tail = text.rstrip("\n") + "\n\n", "\n"
    path.write_text(head + section + tail, encoding="utf-8")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=50)
    ap.add_argument("--scenarios", nargs="+", default=list(SCENARIOS), choices=SCENARIOS)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--label", default="the code at this commit")
    ap.add_argument("--run", choices=RUNS, default="latest", help="which block of docs/coverage.md to replace")
    ap.add_argument("--raw", type=Path, help="also write every sample's figures to this JSON file")
    ap.add_argument("--from-raw", type=Path, nargs="+",
                    help="summarize --raw files (their rows together) instead of running")
    ap.add_argument("--out", type=Path, default=ROOT / "docs" / "coverage.md")
    ap.add_argument("--no-write", action="store_true", help="print only")
    args = ap.parse_args(argv)
    t0 = time.monotonic()
    if args.from_raw:
        saved = [json.loads(f.read_text(encoding="utf-8")) for f in args.from_raw]
        rows = [r for d in saved for r in d["rows"]]
        seconds = sum(d["seconds"] for d in saved)
        seeds = max(d["seeds"] for d in saved)
        made = max((d.get("made") or "" for d in saved), default="") or None
    else:
        made = _now()

        def save(rows: list[dict]) -> None:
            if args.raw:
                args.raw.write_text(json.dumps({"rows": rows, "seconds": time.monotonic() - t0,
                                                "seeds": args.seeds, "made": made}), encoding="utf-8")

        rows = run(args.scenarios, args.seeds, args.workers, log=lambda m: print(m, file=sys.stderr),
                   save=save)
        seconds, seeds = time.monotonic() - t0, args.seeds
        save(rows)
    text = markdown(summarize(rows), seeds, seconds, args.label, args.run, made)
    if not args.no_write:
        write_section(args.out, text, args.run)
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
