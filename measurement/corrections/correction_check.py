"""A check of every correction on data like the client's: a Monte Carlo study run at analysis time.

What no single survey can tell (how well each correction works for a design like this one) a
simulation can: surveys are drawn from a population fitted to the client's data and analysed
exactly as the client's was, and each estimate's bias, RMSE and interval coverage against the
population's known paths show which estimate to lean on (the logic of Monte Carlo studies of
estimators; Muthén & Muthén 2002 use it to decide sample sizes for structural models).

The population (:func:`fit_population`): the design's constructs with the declared paths and,
where the analysis found a usable method factor or a measured method scale, one method factor
with equal loadings on the main file's items (:func:`samesource.engine.builders.population_model`),
fitted to the client's data. From its standardized solution each simulated survey has the
client's number of rows, items, trait loadings and so reliabilities, the estimated method
share, each item's answers (the continuous response cut at the quantiles of the client's
answers to that item, so its categories and skew are the client's) and the client's pattern
of missing answers (each simulated row takes the missing cells of a client row drawn at
random; a second source's rows are absent where the client's are).

Scenarios: the fitted population itself, and named departures from it that the analysis
cannot test on one survey (docs/methods.md, "Where the corrections fail"):

* ``marker_without_method``: the marker's items carry none of the shared method;
* ``unequal_method_loadings``: the method share rises from 0.3 to 1.7 times the estimated
  share across the constructs;
* ``method_trait_correlated``: the method source correlates .30 with the first predictor of
  the first path;
* ``published_upper_share``: 41% of every main-file item's variance is method, the upper end
  of the shares reported in reviews (measurement/corrections/bounds.py PUBLISHED_SHARES).

The departures start from the estimated share, or from 18% (the average share of Lance,
Dawson, Birkelbach & Hoffman 2010) where the survey found less than 5%, and keep each item's
split of the rest between trait and error. Replicates run on the executor (local pool or
Dask), each drawn from its own seed ``SeedSequence(seed, spawn_key=(CHECK_KEY, scenario, r))``
so the results do not depend on where they ran. Intervals in the replicates are the
analysis's analytic ones: no bootstrap runs inside the check.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import ndtr

from samesource.corrections.bounds import PUBLISHED_SHARES
from samesource.corrections.paths import METHODS
from samesource.engine.builders import METHOD, population_model
from samesource.engine.fitting import fit_model
from samesource.errors import InputError
from samesource.executor import (
    Executor,
    SerialExecutor,
    StopRequested,
    default_executor,
    stop_requested,
)
from samesource.input.design import MAIN, Design
from samesource.input.loading import LoadedTable
from samesource.input.missing import MissingPlan
from samesource.input.prepare import PreparedData
from samesource.input.rows import ItemRows
from samesource.options import AnalysisOptions

CHECK_KEY = 0x434B  # spawn-key namespace of the check's replicates (the bootstrap uses (r,))
SCENARIOS = ("fitted", "marker_without_method", "unequal_method_loadings", "method_trait_correlated",
             "published_upper_share")
TITLES = {
    "fitted": "Data like these: drawn from the model fitted to this survey",
    "marker_without_method": "A marker that carries none of the shared method",
    "unequal_method_loadings": "Unequal method loadings",
    "method_trait_correlated": "The shared method correlated with a trait",
    "published_upper_share": "Method share at the upper end of published reviews",
}
DEPARTURE_SHARE = 0.18     # Lance, Dawson, Birkelbach & Hoffman (2010): average method share
MIN_FITTED_SHARE = 0.05    # below this the departures start from DEPARTURE_SHARE (our rule)
METHOD_TRAIT_CORR = 0.30   # the correlation methods.md measured leaving +.07 of bias
UNEQUAL_RANGE = (0.3, 1.7)
MAX_SHARE = 0.95           # of an item's variance (trait plus method): the rest stays error
ESTIMATES = METHODS + ("preferred",)
VERDICTS = ("none", "minor", "substantial", "undetermined")
# An estimate is dependable in a scenario when its bias is within BIAS_OK and its interval
# covers the truth at least COVERAGE_FLOOR of the time, less two Monte Carlo standard errors
# (our rules; the coverage floor is the one docs/coverage.md reads studies with).
BIAS_OK = 0.05
COVERAGE_FLOOR = 0.90
MIN_SUCCESS = 0.80         # share of replicates that must give the estimate
# Progress is reported after each wave of this many simulated surveys per worker. Each survey
# is a task of its own: a wave waits for its slowest task, so tasks of equal size keep every
# worker busy (chunks cut per scenario from a size set over all scenarios were uneven, 125 and
# 75 surveys at N = 200, and one worker of two stood idle for a third of the check).
SURVEYS_PER_WAVE = 4
# The largest survey the check runs on: each simulated survey (float64 answers, its table, the
# analysis's copies) takes about 10 x rows x items x 8 bytes on each worker, 1 GB at 200,000 x
# 60, and N x 5 analyses of that size take about an hour on two cores (our limit).
MAX_ROWS = 200_000


@dataclass(frozen=True)
class Population:
    """A survey population on the standardized scale of the items' continuous responses."""

    items: tuple[str, ...]             # every design item, in design order
    item_source: tuple[str, ...]       # MAIN or a source name
    traits: tuple[str, ...]            # constructs with a trait (substantive and marker)
    trait_of: tuple[int, ...]          # per item, the index of its trait (-1: a method construct's item)
    trait_corr: np.ndarray             # correlations of the traits
    loadings: np.ndarray               # standardized trait loading of each item
    method: np.ndarray                 # standardized method loading of each item
    method_trait: np.ndarray           # correlation of the method with each trait (0: orthogonal)
    answers: tuple[np.ndarray, ...]    # each item's client answers, sorted (recoded as analysed)
    raw_scale: tuple[tuple[float, float], ...]  # the item's answer range (for undoing reverse keying)
    reverse: tuple[bool, ...]
    missing: np.ndarray                # (client rows, items) True where the client's answer is missing
    n: int
    truth: dict[tuple[str, str], float] = field(default_factory=dict)

    def error_sd(self) -> np.ndarray:
        lam, m = self.loadings, self.method
        rho = np.array([self.method_trait[t] if t >= 0 else 0.0 for t in self.trait_of])
        return np.sqrt(np.clip(1.0 - lam ** 2 - m ** 2 - 2 * lam * m * rho, 1e-6, None))

    def main_share(self) -> float:
        """Mean method share of the main file's items that have a trait."""
        sel = [i for i, (s, t) in enumerate(zip(self.item_source, self.trait_of, strict=True)) if s == MAIN and t >= 0]
        return float(np.mean(self.method[sel] ** 2)) if sel else 0.0

    def implied_corr(self) -> np.ndarray:
        """The items' correlations on the continuous scale."""
        k = len(self.traits)
        lam = np.zeros((len(self.items), k + 1))
        for i, t in enumerate(self.trait_of):
            if t >= 0:
                lam[i, t] = self.loadings[i]
            lam[i, k] = self.method[i]
        phi = np.eye(k + 1)
        phi[:k, :k] = self.trait_corr
        phi[:k, k] = phi[k, :k] = self.method_trait
        c = lam @ phi @ lam.T
        np.fill_diagonal(c, 1.0)
        return c


@dataclass(frozen=True)
class Scenario:
    id: str
    title: str
    description: str
    population: Population | None
    why_not: str | None = None


# ------------------------------------------------------------------------------ the population

def fit_population(design: Design, prepared: PreparedData, plan: MissingPlan, mv: dict,
                   opts: AnalysisOptions) -> tuple[Population, dict]:
    """The fitted population and a description of the model it came from."""
    mf, mm = mv.get("method_factor") or {}, mv.get("measured_method") or {}
    want_method = bool(mf.get("usable_as_correction")) or mm.get("status") == "ok"
    notes = []
    fit = None
    if want_method:
        spec = population_model(design, method=True)
        fit = fit_model(spec, plan.data_for(list(spec.observed)), time_limit=opts.fit_time_limit,
                        n_starts=opts.n_starts, seed=opts.seed)
        if fit.status != "ok" or fit.est("cov", METHOD, METHOD) <= 0:
            notes.append(f"The model with a shared method ended with status '{fit.status}'"
                         + (" and no method variance" if fit.status == "ok" else "")
                         + "; the population has no shared method.")
            fit = None
    else:
        notes.append("No check in this survey could estimate the shared method, so the fitted population has "
                     "none; the departures put it in.")
    if fit is None:
        spec = population_model(design, method=False)
        fit = fit_model(spec, plan.data_for(list(spec.observed)), time_limit=opts.fit_time_limit,
                        n_starts=opts.n_starts, seed=opts.seed)
    if fit.status != "ok":
        raise _NoPopulation(f"the population model could not be fitted (status '{fit.status}')")
    has_method = METHOD in fit.spec.latent
    traits = tuple(c.name for c in design.constructs.values() if c.role != "method" or not has_method)
    t_index = {t: i for i, t in enumerate(traits)}
    items, trait_of, lam, m = [], [], [], []
    for c in design.constructs.values():
        for it in c.items:
            items.append(it)
            if c.name in t_index:
                trait_of.append(t_index[c.name])
                lam.append(fit.std("load", c.name, it))
            else:
                trait_of.append(-1)
                lam.append(0.0)
            m.append(_std_or_zero(fit, METHOD, it) if has_method else 0.0)
    answers, missing = _client_answers(prepared.rows, items)
    cov = fit.all_cov.loc[list(traits), list(traits)].to_numpy(dtype=float)
    sd = np.sqrt(np.diag(cov))
    corr = _positive_definite(cov / np.outer(sd, sd), notes)
    pop = Population(
        items=tuple(items), item_source=tuple(design.constructs[design.construct_of(it)].source for it in items),
        traits=traits, trait_of=tuple(trait_of), trait_corr=corr, loadings=np.array(lam), method=np.array(m),
        method_trait=np.zeros(len(traits)), answers=answers,
        raw_scale=tuple(_scale_of(design, prepared, it) for it in items),
        reverse=tuple(it in design.constructs[design.construct_of(it)].reverse for it in items),
        missing=missing, n=int(prepared.n_rows),
        truth={(p.outcome, x): fit.std("reg", p.outcome, x) for p in design.paths for x in p.predictors})
    model = {"name": fit.spec.name, "description": fit.spec.description, "status": fit.status,
             "fit": fit.fit_indices(), "method_share": pop.main_share(), "has_method": has_method, "notes": notes}
    return pop, model


class _NoPopulation(Exception):
    pass


def _positive_definite(corr: np.ndarray, notes: list[str]) -> np.ndarray:
    """The traits' correlations, nudged to a positive definite matrix where the fit left them at
    its edge (two views of one thing correlating almost 1, say), so surveys can be drawn."""
    w, v = np.linalg.eigh(corr)
    if w.min() > 1e-6:
        return corr
    fixed = (v * np.clip(w, 1e-6, None)) @ v.T
    d = np.sqrt(np.diag(fixed))
    notes.append(f"The fitted traits' correlations were at the edge of what is possible (smallest eigenvalue "
                 f"{w.min():.2g}); the population uses the nearest positive definite matrix.")
    return fixed / np.outer(d, d)


def _std_or_zero(fit, latent: str, item: str) -> float:
    try:
        return fit.std("load", latent, item)
    except KeyError:  # a second source's item: the main file's method does not reach it
        return 0.0


def _client_answers(rows: ItemRows, items: list[str]) -> tuple[tuple[np.ndarray, ...], np.ndarray]:
    """Each item's answers over the client's rows, sorted, and where answers are missing
    (rows x items), read a block of rows at a time (a survey read a block at a time has no
    DataFrame of answers)."""
    parts: list[list[np.ndarray]] = [[] for _ in items]
    missing = np.empty((len(rows), len(items)), dtype=bool)
    for start, X in rows.blocks(items):
        gaps = np.isnan(X)
        missing[start:start + len(X)] = gaps
        for j, part in enumerate(parts):
            part.append(X[~gaps[:, j], j])
    return tuple(np.sort(np.concatenate(p)) if p else np.empty(0) for p in parts), missing


def size_error(n_rows: int, replicates: int, scenarios: int) -> InputError | None:
    """Why the check cannot run on a survey of ``n_rows`` rows (None when it can): each
    simulated survey has the client's number of rows and is held in memory while it is analysed."""
    if n_rows <= MAX_ROWS:
        return None
    return InputError(
        f"the correction check draws {replicates:,} simulated surveys per scenario ({replicates * scenarios:,} in "
        f"all), each with this survey's {n_rows:,} rows, and analyses each in memory; it runs on surveys of up to "
        f"{MAX_ROWS:,} rows. Run the analysis without check_corrections, or run the check on a random sample of "
        f"up to {MAX_ROWS:,} rows: its bias figures describe this design too, its interval coverage a survey of "
        "the sample's size", code="bad_options", field="options.check_corrections")


def _scale_of(design: Design, prepared: PreparedData, item: str) -> tuple[float, float]:
    src = design.constructs[design.construct_of(item)].source
    if src == MAIN:
        return float(prepared.scale_min), float(prepared.scale_max)
    link = next(lk for lk in prepared.links if lk.name == src)
    return float(link.response_scale["min"]), float(link.response_scale["max"])


# ------------------------------------------------------------------------------ the scenarios

def scenarios(design: Design, pop: Population) -> list[Scenario]:
    fitted_share = pop.main_share()
    base = fitted_share if fitted_share >= MIN_FITTED_SHARE else DEPARTURE_SHARE
    start = (f"from the estimated share ({fitted_share:.0%})" if base == fitted_share else
             f"from {DEPARTURE_SHARE:.0%} of item variance (the average of Lance et al. 2010), since this survey "
             f"found {fitted_share:.0%}")
    shared = [i for i, (s, t) in enumerate(zip(pop.item_source, pop.trait_of, strict=True)) if s == MAIN and t >= 0]
    marker = design.marker
    marker_items = [i for i, it in enumerate(pop.items) if marker is not None and it in marker.items]
    out = [Scenario("fitted", TITLES["fitted"],
                    f"The fitted model: the client's number of rows ({pop.n}), items, loadings, answer "
                    f"distributions and missing answers, and a method share of {fitted_share:.0%}.", pop)]

    def shares(per_item: dict[int, float]) -> Population:
        return with_method_shares(pop, per_item)

    if marker is None:
        out.append(Scenario("marker_without_method", TITLES["marker_without_method"], "", None,
                            "the design has no marker"))
    else:
        per = {i: base for i in shared}
        per.update({i: 0.0 for i in marker_items})
        out.append(Scenario("marker_without_method", TITLES["marker_without_method"],
                            f"The substantive items share the method {start}; the marker's items share none of it "
                            "(the marker-identified method factor then finds nothing).", shares(per)))
    groups = [c.name for c in design.constructs.values()
              if c.source == MAIN and c.role != "method" and any(pop.items[i] in c.items for i in shared)]
    mult = dict(zip(groups, np.linspace(*UNEQUAL_RANGE, len(groups)) if len(groups) > 1 else [1.0], strict=True))
    per = {i: base * mult[design.construct_of(pop.items[i])] for i in shared}
    out.append(Scenario("unequal_method_loadings", TITLES["unequal_method_loadings"],
                        "The method share differs between the constructs ("
                        + ", ".join(f"{g} {base * mult[g]:.0%}" for g in groups)
                        + f": {UNEQUAL_RANGE[0]:g} to {UNEQUAL_RANGE[1]:g} times the share, starting {start}); "
                          "equal method loadings no longer hold.", shares(per)))
    target = design.paths[0].predictors[0] if design.paths else design.substantive[0].name
    pop_t = shares({i: base for i in shared})
    rho = METHOD_TRAIT_CORR * pop_t.trait_corr[pop_t.traits.index(target)]
    pop_t = dataclasses.replace(pop_t, method_trait=rho)
    out.append(Scenario("method_trait_correlated", TITLES["method_trait_correlated"],
                        f"The method source correlates {METHOD_TRAIT_CORR:.2f} with '{target}' (and with the other "
                        f"traits through it), the share starting {start}: untestable in one survey.", pop_t))
    top = PUBLISHED_SHARES.range[1]
    out.append(Scenario("published_upper_share", TITLES["published_upper_share"],
                        f"{top:.0%} of every main-file item's variance is method: the upper end of "
                        f"{PUBLISHED_SHARES.source}.", shares({i: top for i in shared})))
    return out


def scenario_count(design: Design, only: Sequence[str] | None = None) -> int:
    """How many scenarios run for this design (the marker's needs a marker)."""
    ids = [s for s in SCENARIOS if only is None or s in only]
    return len([s for s in ids if s != "marker_without_method" or design.marker is not None])


def with_method_shares(pop: Population, per_item: dict[int, float]) -> Population:
    """The population with the given method share of each listed item (others unchanged);
    each item keeps its split of the rest between trait and error."""
    lam, m = pop.loadings.copy(), pop.method.copy()
    for i, share in per_item.items():
        share = min(max(share, 0.0), MAX_SHARE - 0.05)
        rest_old = 1.0 - m[i] ** 2
        trait = lam[i] ** 2 * (1.0 - share) / rest_old if rest_old > 0 else 0.0
        lam[i] = math.copysign(math.sqrt(min(trait, MAX_SHARE - share)), lam[i] or 1.0)
        m[i] = math.sqrt(share)
    return dataclasses.replace(pop, loadings=lam, method=m)


# ------------------------------------------------------------------------------ drawing surveys

def draw_survey(pop: Population, design: Design, rng: np.random.Generator
                ) -> tuple[LoadedTable, dict[str, LoadedTable]]:
    """One simulated survey: the main file's table and each source's (rows joined on ids)."""
    n, k = pop.n, len(pop.traits)
    traits = rng.multivariate_normal(np.zeros(k), pop.trait_corr, size=n, method="cholesky")
    w = np.linalg.solve(pop.trait_corr, pop.method_trait) if np.any(pop.method_trait) else None
    u = rng.standard_normal(n)
    if w is None:
        method = u
    else:  # M = T w + e with corr(M, T) = method_trait
        explained = float(pop.method_trait @ w)
        method = traits @ w + math.sqrt(max(1.0 - explained, 1e-9)) * u
    err = rng.standard_normal((n, len(pop.items))) * pop.error_sd()
    t_part = np.column_stack([traits[:, t] * pop.loadings[i] if t >= 0 else np.zeros(n)
                              for i, t in enumerate(pop.trait_of)])
    y = t_part + method[:, None] * pop.method[None, :] + err
    holes = pop.missing[rng.integers(0, pop.missing.shape[0], size=n)]
    values = np.empty_like(y)
    for j, ans in enumerate(pop.answers):
        q = np.minimum((ndtr(y[:, j]) * ans.size).astype(np.int64), ans.size - 1)
        v = ans[q]
        if pop.reverse[j]:
            lo, hi = pop.raw_scale[j]
            v = lo + hi - v
        values[:, j] = v
    values[holes] = np.nan
    ids = np.array([f"S{i:06d}" for i in range(1, n + 1)], dtype=object)
    frames: dict[str, dict[str, Any]] = {MAIN: {design.id_column or "respondent": ids}}
    for name, src in design.sources.items():
        frames[name] = {src.id_column: ids}
    for j, it in enumerate(pop.items):
        frames[pop.item_source[j]][it] = values[:, j]
    main = _table(pd.DataFrame(frames.pop(MAIN)), "simulated survey")
    sources = {}
    for name, cols in frames.items():
        df = pd.DataFrame(cols)
        answered = df.drop(columns=[design.sources[name].id_column]).notna().any(axis=1)
        sources[name] = _table(df[answered].reset_index(drop=True), f"simulated source {name}")
    return main, sources


def _table(df: pd.DataFrame, label: str) -> LoadedTable:
    return LoadedTable(frame=df, row_numbers=np.arange(2, len(df) + 2), row_label="row", format="csv",
                       source=label)


# ------------------------------------------------------------------------------ replicates

@dataclass(frozen=True, eq=False)
class _Chunk:
    scenario: int
    population: Population
    design: dict
    options: dict
    paths: tuple[tuple[str, str], ...]
    start: int
    stop: int
    seed: int


@dataclass
class _ChunkResult:
    scenario: int
    start: int
    values: np.ndarray      # (replicates, paths, estimates, 3): estimate, ci low, ci high
    preferred: np.ndarray   # (replicates, paths) index into METHODS, -1 none
    verdict: np.ndarray     # (replicates,) index into VERDICTS, -1 failed
    failures: list[str]


def replicate_rng(seed: int, scenario: int, r: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(CHECK_KEY, scenario, r)))


def _run_chunk(chunk: _Chunk) -> _ChunkResult:
    from samesource.input.design import parse_design
    from samesource.pipeline import analyze  # here: the pipeline imports this module

    design = parse_design(chunk.design)
    size = chunk.stop - chunk.start
    P, E = len(chunk.paths), len(ESTIMATES)
    values = np.full((size, P, E, 3), np.nan)
    preferred = np.full((size, P), -1, dtype=np.int64)
    verdict = np.full(size, -1, dtype=np.int64)
    failures: list[str] = []
    for i, r in enumerate(range(chunk.start, chunk.stop)):
        # a run its owner stopped (a deleted dataset's analysis on a cluster worker, where a task
        # cannot be killed from outside) starts no further survey
        if stop_requested():
            raise StopRequested("the work was told to stop")
        rng = replicate_rng(chunk.seed, chunk.scenario, r)
        try:
            main, sources = draw_survey(chunk.population, design, rng)
            report = analyze(main, design, chunk.options, executor=SerialExecutor(), sources=sources).report
        except InputError as e:  # a simulated survey the analysis refuses (an item with one answer, say)
            failures.append(e.message)
            continue
        except (ArithmeticError, ValueError, np.linalg.LinAlgError) as e:
            # one simulated survey's numerical failure is that survey's, counted, not the check's
            failures.append(f"{type(e).__name__}: {e}")
            continue
        verdict[i] = VERDICTS.index(report["method_variance"]["verdict"]["level"])
        by_key = {(p["outcome"], p["predictor"]): p for p in report["paths"]}
        for j, key in enumerate(chunk.paths):
            p = by_key[key]
            pref = p.get("preferred")
            preferred[i, j] = METHODS.index(pref) if pref in METHODS else -1
            for e_i, m in enumerate(ESTIMATES):
                e = (p["estimates"].get(pref) if m == "preferred" else p["estimates"].get(m)) or {}
                if e.get("estimate") is None or e.get("status", "ok") != "ok":
                    continue
                ci = e.get("ci") or [np.nan, np.nan]
                values[i, j, e_i] = [e["estimate"], ci[0] if ci[0] is not None else np.nan,
                                     ci[1] if ci[1] is not None else np.nan]
    return _ChunkResult(chunk.scenario, chunk.start, values, preferred, verdict, failures)


# ------------------------------------------------------------------------------ the check

def correction_check(design: Design, prepared: PreparedData, plan: MissingPlan, mv: dict, paths: list[dict],
                     opts: AnalysisOptions, *, n: int, executor: Executor | None = None,
                     progress: Callable[[int, int], None] | None = None,
                     only: Sequence[str] | None = None) -> tuple[dict, Population | None]:
    """report["correction_check"] (and the fitted population, for the planning advice).
    ``only`` limits the scenarios (tests)."""
    keys = tuple((p["outcome"], p["predictor"]) for p in paths)
    if progress is not None:  # at once: the population's fit counts to this stage
        progress(0, n * scenario_count(design, only))
    if not keys:
        return {"status": "not_run", "why_not": "the design declares no key paths", "replicates": n}, None
    try:
        pop, model = fit_population(design, prepared, plan, mv, opts)
    except _NoPopulation as e:
        return {"status": "not_run", "why_not": str(e), "replicates": n}, None
    scen = [s for s in scenarios(design, pop) if only is None or s.id in only]
    runnable = [(i, s) for i, s in enumerate(scen) if s.population is not None]
    sim_design = _replicate_design(design, prepared)
    sim_opts = dataclasses.replace(opts, bootstrap=0, check_corrections=0, sheet=None).to_dict()
    ex = executor or default_executor(n * len(runnable))
    workers = max(1, int(ex.workers))
    chunks = [_Chunk(i, s.population, sim_design, sim_opts, keys, a, a + 1, opts.seed)
              for i, s in runnable for a in range(n)]
    results = _map(ex, chunks, workers, progress, n * len(runnable))

    P, E = len(keys), len(ESTIMATES)
    vals = {i: np.full((n, P, E, 3), np.nan) for i, _ in runnable}
    pref = {i: np.full((n, P), -1) for i, _ in runnable}
    verd = {i: np.full(n, -1) for i, _ in runnable}
    failures: dict[int, list[str]] = {i: [] for i, _ in runnable}
    for res in results:
        stop = res.start + res.values.shape[0]
        vals[res.scenario][res.start:stop] = res.values
        pref[res.scenario][res.start:stop] = res.preferred
        verd[res.scenario][res.start:stop] = res.verdict
        failures[res.scenario] += res.failures
    out_paths = []
    for j, key in enumerate(keys):
        truth = pop.truth[key]
        per: dict[str, dict] = {}
        choices: dict[str, dict[str, int]] = {}
        for i, s in runnable:
            per[s.id] = {m: summarize(vals[i][:, j, e], truth) for e, m in enumerate(ESTIMATES)}
            picked = pref[i][:, j]
            choices[s.id] = {METHODS[c]: int((picked == c).sum()) for c in sorted(set(picked[picked >= 0].tolist()))}
        lean, why = lean_on(per, n)
        held = [s for s in per if lean is not None and dependable(per[s][lean], n)]
        out_paths.append({"outcome": key[0], "predictor": key[1], "truth": truth, "scenarios": per,
                          "preferred_choices": choices, "lean_on": lean, "lean_on_reason": why,
                          "lean_on_dependable_in": held})
    return {
        "status": "ok",
        "replicates": n,
        "seed": opts.seed,
        "population": model,
        "scenarios": [{"id": s.id, "title": s.title, "description": s.description, "run": s.population is not None,
                       "why_not": s.why_not,
                       "method_share": s.population.main_share() if s.population is not None else None,
                       "failed_replicates": len(failures[i]) if s.population is not None else None,
                       "first_failure": (failures[i][0] if s.population is not None and failures[i] else None),
                       "verdicts": ({VERDICTS[v]: int((verd[i] == v).sum()) for v in range(len(VERDICTS))}
                                    if s.population is not None else None)}
                      for i, s in enumerate(scen)],
        "paths": out_paths,
        "rules": {"bias_ok": BIAS_OK, "coverage_floor": COVERAGE_FLOOR, "min_success": MIN_SUCCESS,
                  "dependable": f"an estimate is dependable in a scenario when at least {MIN_SUCCESS:.0%} of the "
                                f"replicates give it, its bias is within {BIAS_OK:.2f} and its interval covers the "
                                f"truth at least {COVERAGE_FLOOR:.0%} of the time (less two Monte Carlo standard "
                                "errors); our rules",
                  "lean_on": "the estimate dependable in data like these (the fitted scenario) and in the most "
                             "departures, ties broken by the smaller RMSE in the fitted scenario; our rule"},
        "intervals": "each replicate's analytic intervals (the bootstrap does not run inside the check)",
        "notes": model["notes"] + [
            "Each simulated survey is analysed with this analysis's options, as the survey itself was; the truth is "
            "the fitted model's path. The scenarios are possibilities this survey cannot rule out, not estimates.",
            "Continuous responses are cut at the client's answer quantiles: the answers' categories and skew are "
            "the client's, and their correlations come out a little weaker than the continuous model's, as real "
            "answers' do."],
    }, pop


def _replicate_design(design: Design, prepared: PreparedData) -> dict:
    """The design the simulated surveys are analysed with: the client's, without teams (not
    simulated) and with each file's answer range given, so reverse keying is undone and
    redone with the same range."""
    d = design.to_dict()
    d.pop("group_column", None)
    d["response_scale"] = {"min": float(prepared.scale_min), "max": float(prepared.scale_max)}
    for link in prepared.links:
        d["sources"][link.name]["response_scale"] = {"min": float(link.response_scale["min"]),
                                                     "max": float(link.response_scale["max"])}
    return d


def _map(ex: Executor, chunks: list[_Chunk], workers: int, progress, total: int) -> list[_ChunkResult]:
    if progress is None:
        return list(ex.map(_run_chunk, chunks))
    progress(0, total)
    out: list[_ChunkResult] = []
    done = 0
    per_wave = SURVEYS_PER_WAVE * workers
    for i in range(0, len(chunks), per_wave):  # waves, for progress
        wave = chunks[i:i + per_wave]
        out.extend(ex.map(_run_chunk, wave))
        done += sum(c.stop - c.start for c in wave)
        progress(done, total)
    return out


def summarize(v: np.ndarray, truth: float) -> dict:
    """Bias, RMSE and coverage of one estimate over the replicates (v: (R, 3) estimate, lo, hi)."""
    est = v[:, 0]
    ok = np.isfinite(est)
    k = int(ok.sum())
    out: dict[str, Any] = {"n": k, "n_failed": int(v.shape[0] - k), "mean": None, "bias": None,
                           "bias_mc_se": None, "rmse": None, "sd": None, "coverage": None,
                           "coverage_mc_se": None, "mean_ci_width": None}
    if not k:
        return out
    e = est[ok]
    out["mean"] = float(e.mean())
    out["bias"] = float(e.mean() - truth)
    out["rmse"] = float(np.sqrt(np.mean((e - truth) ** 2)))
    out["sd"] = float(e.std(ddof=1)) if k > 1 else None
    out["bias_mc_se"] = float(e.std(ddof=1) / math.sqrt(k)) if k > 1 else None
    lo, hi = v[ok, 1], v[ok, 2]
    has = np.isfinite(lo) & np.isfinite(hi)
    if has.any():
        c = float(np.mean((lo[has] <= truth) & (truth <= hi[has])))
        out["coverage"] = c
        out["coverage_mc_se"] = math.sqrt(max(c * (1 - c), 0.25 / has.sum()) / has.sum())
        out["mean_ci_width"] = float(np.mean(hi[has] - lo[has]))
    return out


def dependable(s: dict, n: int) -> bool:
    """The rule of :data:`BIAS_OK`, :data:`COVERAGE_FLOOR` and :data:`MIN_SUCCESS`."""
    if s["n"] < MIN_SUCCESS * n or s["bias"] is None or s["coverage"] is None:
        return False
    floor = COVERAGE_FLOOR - 2 * math.sqrt(COVERAGE_FLOOR * (1 - COVERAGE_FLOOR) / max(s["n"], 1))
    return abs(s["bias"]) <= BIAS_OK and s["coverage"] >= floor


def lean_on(per: dict[str, dict], n: int) -> tuple[str | None, str]:
    """Which estimate to lean on for this design (the rule in ``rules.lean_on``)."""
    fitted = per.get("fitted")
    if not fitted:
        return None, "the fitted scenario did not run"
    departures = [s for s in per if s != "fitted"]
    ok = [m for m in METHODS if dependable(fitted[m], n)]
    if not ok:
        best = min((m for m in METHODS if fitted[m]["rmse"] is not None), key=lambda m: fitted[m]["rmse"],
                   default=None)
        return None, ("no estimate was dependable even in data like these" +
                      (f"; the smallest error was {best}'s (RMSE {fitted[best]['rmse']:.3f}): lean on the bounds"
                       if best else ""))
    score = {m: sum(dependable(per[s][m], n) for s in departures) for m in ok}
    best = max(ok, key=lambda m: (score[m], -fitted[m]["rmse"]))
    held = [s for s in departures if dependable(per[s][best], n)]
    failed = [s for s in departures if s not in held]
    text = f"{best} was dependable in data like these"
    if departures:
        text += (f" and in {len(held)} of {len(departures)} departures"
                 + (f"; not when: {', '.join(failed)}" if failed else ""))
    return best, text


__all__ = ["correction_check", "Population", "Scenario", "fit_population", "scenarios", "draw_survey",
           "with_method_shares", "summarize", "dependable", "lean_on", "SCENARIOS", "replicate_rng"]
