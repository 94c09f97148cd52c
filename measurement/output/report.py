"""The result of :func:`samesource.analyze`: a :class:`Report` with typed, read-only sections.

report.json stays the one record of an analysis: :meth:`Report.to_dict` and
:meth:`Report.to_json` give it unchanged (byte for byte what the command line writes), and the
typed sections are read from it, so a field added to report.json never breaks them. The
sections are frozen dataclasses; mappings inside them are read-only and lists are tuples.
"""

from __future__ import annotations

import copy
import json
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from types import MappingProxyType
from typing import Any

import pandas as pd

from samesource.corrections.paths import LABELS
from samesource.output.report_json import dumps
from samesource.results import Notice, freeze

Pair = tuple[str, str]


def _pick(cls, d: Any, **given):
    """An instance of dataclass ``cls`` from the keys of ``d`` it names (absent keys, or ``d``
    not a mapping at all: None). Reading is lenient, as the pages are: a stored report from an
    older version, or one edited by hand, still reads."""
    d = d if isinstance(d, Mapping) else {}
    values = {f.name: freeze(d.get(f.name)) for f in fields(cls) if f.name not in given}
    return cls(**values, **given)


def _maybe(cls, d: Any, **given):
    """``_pick`` for a section that may be absent (None, empty or not a mapping: None)."""
    return _pick(cls, d, **given) if isinstance(d, Mapping) and d else None


def _mappings(v: Any) -> list[Mapping]:
    """The entries of a report.json list that are objects (others are skipped)."""
    return [x for x in v if isinstance(x, Mapping)] if isinstance(v, list | tuple) else []


def _texts(v: Any) -> tuple:
    return tuple(v) if isinstance(v, list | tuple) else ()


def _pairs(d: Mapping | None, parse=freeze) -> Mapping[Pair, Any]:
    """report.json's "A|B" keys as (A, B) tuples, in design order."""
    out = {}
    for k, v in (d.items() if isinstance(d, Mapping) else ()):
        a, _, b = str(k).partition("|")
        out[(a, b)] = parse(v)
    return MappingProxyType(out)


def _by_name(d: Any, parse) -> Mapping[str, Any]:
    return MappingProxyType({k: parse(v) for k, v in (d.items() if isinstance(d, Mapping) else ())})


@dataclass(frozen=True)
class Threshold:
    """A rule of thumb the report judges a value by: report["thresholds"][name]."""

    value: float | None
    direction: str | None
    source: str | None


@dataclass(frozen=True)
class Tool:
    """What made the report: report["tool"]."""

    name: str | None
    version: str | None


@dataclass(frozen=True)
class ResponseScale:
    """An answer range: the lowest and highest answer, and where it was taken from (design or data)."""

    min: float | None
    max: float | None
    source: str | None


@dataclass(frozen=True)
class SourceJoin:
    """How one second source's rows were joined to the main file's on ids:
    report["data"]["sources"][name] (measurement/input/sources.py ``SourceLink``)."""

    name: str | None
    kind: str | None
    file: str | None
    format: str | None
    sha256: str | None
    id_column: str | None
    main_id_column: str | None
    constructs: tuple[str, ...]
    items: int | None
    rows: int | None
    matched: int | None                # main-file rows joined to a source row
    main_rows: int | None
    main_without_match: int | None
    main_without_id: int | None
    source_without_match: int | None
    source_without_id: int | None
    response_scale: ResponseScale | None
    examples: Mapping[str, tuple[str, ...]]   # example ids of each kind of unmatched row
    hint: str | None
    unmatched_main_rows: int | None    # main-file rows without a source row (no match or no id)
    unused_source_rows: int | None     # source rows not joined (no match or no id)


def _source_join(s: Any) -> SourceJoin | None:
    if not isinstance(s, Mapping):
        return None
    return _pick(SourceJoin, s, constructs=_texts(s.get("constructs")),
                 response_scale=_maybe(ResponseScale, s.get("response_scale")),
                 examples=_by_name(s.get("examples"), _texts))


@dataclass(frozen=True)
class DataSummary:
    """What was read: report["data"] (``sources``: how each second source was joined, by name)."""

    file: str | None
    format: str | None
    encoding: str | None
    delimiter: str | None
    decimal: str | None
    sheet: Any
    sha256: str | None
    rows: int | None
    rows_analyzed: int | None
    items: int | None
    excluded_rows: int | None
    excluded_by_reason: Mapping | None
    missing_cells: int | None
    missing_share: float | None
    response_scale: ResponseScale | None
    missing_handling: Mapping | None
    sources: Mapping[str, SourceJoin | None]


def _data(d: Any) -> DataSummary:
    d = d if isinstance(d, Mapping) else {}
    return _pick(DataSummary, d, response_scale=_maybe(ResponseScale, d.get("response_scale")),
                 sources=_by_name(d.get("sources"), _source_join))


@dataclass(frozen=True)
class FlaggedRow:
    """A respondent the screen flagged for review (``row``: the file's row number)."""

    row: int | None
    reasons: tuple[str, ...] | None


@dataclass(frozen=True)
class ScreeningCheck:
    """One screening rule and how many rows it flagged."""

    rule: str | None
    flagged: int | None


@dataclass(frozen=True)
class Screening:
    """The careless-responding and outlier screen: report["screening"]."""

    flagged_rows: tuple[FlaggedRow, ...]
    n_flagged: int | None
    dropped: bool | None
    checks: Mapping[str, ScreeningCheck]
    distribution: Mapping | None
    note: str | None


def _screening(sc: Any) -> Screening:
    sc = sc if isinstance(sc, Mapping) else {}
    return _pick(Screening, sc, flagged_rows=tuple(_pick(FlaggedRow, f) for f in _mappings(sc.get("flagged_rows"))),
                 checks=_by_name(sc.get("checks"), lambda v: _pick(ScreeningCheck, v)))


@dataclass(frozen=True)
class ItemStats:
    """One item: its standardized loading, item-rest correlation, alpha if deleted, mean, SD."""

    loading: float | None
    item_rest_r: float | None
    alpha_if_deleted: float | None
    mean: float | None
    sd: float | None


@dataclass(frozen=True)
class Construct:
    """One scale: report["constructs"][name]."""

    name: str
    role: str | None
    items: tuple[str, ...]
    reverse: tuple[str, ...]
    n: int | None
    alpha: float | None
    alpha_ci: tuple[float | None, float | None] | None
    omega: float | None
    composite_reliability: float | None
    ave: float | None
    item_stats: Mapping[str, ItemStats]


@dataclass(frozen=True)
class Fit:
    """Fit of a model: chi-square test and the usual indices (report[...]["fit"])."""

    chi2: float | None
    df: int | None
    p: float | None
    cfi: float | None
    tli: float | None
    rmsea: float | None
    rmsea_ci: tuple[float | None, float | None] | None
    srmr: float | None
    n: int | None
    aic: float | None
    bic: float | None
    loglik: float | None


NO_FIT = Fit(*(None,) * 12)  # a model without fit indices


@dataclass(frozen=True)
class FornellLarcker:
    """The Fornell-Larcker comparison of two constructs: squared correlation against each AVE."""

    r_squared: float | None
    ave_a: float | None
    ave_b: float | None
    holds: bool | None


@dataclass(frozen=True)
class MeasurementModel:
    """The confirmatory factor model of every scale: report["measurement_model"]."""

    status: str | None
    estimator: str | None
    fit: Fit | None
    factor_correlations: Mapping[Pair, float | None]
    htmt: Mapping[Pair, float | None]
    htmt2: Mapping[Pair, float | None]
    htmt_variant: str | None
    fornell_larcker: Mapping[Pair, FornellLarcker | None]
    warnings: tuple


@dataclass(frozen=True)
class Verdict:
    """The one verdict on common-method variance, with the rules and reasons behind it."""

    level: str | None
    summary: str | None
    reasons: tuple[str, ...]
    rules: tuple
    raised_by: Any
    vouching_checks: Any

    @property
    def given(self) -> bool:
        """Whether report.json has a verdict (one read from nothing has every field empty)."""
        return any(getattr(self, f.name) not in (None, ()) for f in fields(self))


@dataclass(frozen=True)
class ModelTest:
    """A chi-square difference test of two nested models in a method check."""

    chi2_diff: float | None
    df_diff: int | None
    p: float | None
    general: str | None
    restricted: str | None
    question: str | None


@dataclass(frozen=True)
class ModelSummary:
    """One model a method check fitted: what it assumes, its status and its fit."""

    description: str | None
    status: str | None
    fit: Fit | None


@dataclass(frozen=True)
class MarkerPair:
    """Two scales' correlation before and after the marker adjustment, with its test."""

    r: float | None
    r_adjusted: float | None
    t: float | None
    p: float | None


@dataclass(frozen=True)
class MarkerChoice:
    """The marker adjustment under one choice of r_M (``rule``: smallest, second smallest, upper bound)."""

    rule: str | None
    r_m: float | None
    pairs: Mapping[Pair, MarkerPair | None]


def _marker_pairs(d: Any) -> Mapping[Pair, MarkerPair | None]:
    return _pairs(d, lambda v: _pick(MarkerPair, v) if isinstance(v, Mapping) else None)


@dataclass(frozen=True)
class MethodCheck:
    """One common-method check (report["method_variance"][key]): every field the report's
    tables and pages read, each check filling those it has (None elsewhere), and ``section``,
    the check's whole section of report.json (read-only)."""

    flag: Any
    rule: str | None
    note: str | None
    status: str | None
    method_share: Any                 # a share (method factor, measured method) or one per construct (CFA marker)
    method_share_ci: tuple | None
    method_share_overall: float | None
    method_share_by_construct: Mapping | None
    usable_as_correction: bool | None
    identified_by: str | None
    identified: bool | None
    proper: bool | None
    loadings: Any                     # the method factor's loadings: "equal" or "free"
    item_loadings: Mapping | None     # each item's standardized loading on the method (item -> number)
    fit: Fit | None
    models: Mapping[str, ModelSummary | None]
    warnings: tuple | None
    method_construct: str | None
    marker: str | None
    n: int | None
    marker_correlations: Mapping | None
    pairs: Mapping[Pair, MarkerPair | None] | None   # the marker adjustment per pair of scales
    sensitivity: tuple[MarkerChoice, ...] | None     # the marker adjustment under each choice of r_M
    r_m: float | None
    r_m_p: float | None
    r_m_rule: str | None
    chosen: str | None
    reliability_split: Mapping | None
    method: str | None
    first_factor_share: float | None
    eigenvalues: tuple | None
    factors_eigen_gt_1: int | None
    single_factor_fit: Fit | None
    vs_measurement_model: ModelTest | None
    threshold: float | None
    values: Mapping | None
    tests: Mapping[str, ModelTest]
    section: Mapping


def _check(sec: Any) -> MethodCheck | None:
    if not isinstance(sec, Mapping):
        return None
    single = sec.get("single_factor_fit")
    return _pick(MethodCheck, sec, tests=_by_name(sec.get("tests"), lambda t: _maybe(ModelTest, t)),
                 fit=_maybe(Fit, sec.get("fit")),
                 models=_by_name(sec.get("models"), lambda m: _maybe(ModelSummary, m, fit=_maybe(
                     Fit, m.get("fit")) if isinstance(m, Mapping) else None)),
                 single_factor_fit=_maybe(Fit, single.get("fit")) if isinstance(single, Mapping) else None,
                 vs_measurement_model=_maybe(ModelTest, sec.get("vs_measurement_model")),
                 pairs=_marker_pairs(sec["pairs"]) if isinstance(sec.get("pairs"), Mapping) else None,
                 sensitivity=tuple(_pick(MarkerChoice, x, pairs=_marker_pairs(x.get("pairs")))
                                   for x in _mappings(sec.get("sensitivity"))) if "sensitivity" in sec else None,
                 section=freeze(sec))


NO_CHECK = _pick(MethodCheck, {}, models=MappingProxyType({}), tests=MappingProxyType({}),
                 section=MappingProxyType({}))  # a check not run


@dataclass(frozen=True)
class MethodVariance:
    """Every common-method check (``checks``: by report.json's key; None when the design
    does not allow it) and the verdict; ``given``: whether report.json has the section at all."""

    verdict: Verdict
    checks: Mapping[str, MethodCheck | None]
    given: bool

    def check(self, key: str) -> MethodCheck | None:
        """The check under ``key`` ("marker", "method_factor", ...), None when absent."""
        return self.checks.get(key)


@dataclass(frozen=True)
class AssumptionCheck:
    """A check behind the corrections: report["assumptions"][i]."""

    id: str
    status: str | None
    message: str | None
    evidence: Any
    affects: tuple[str, ...]
    rule: str | None
    source: str | None
    remedy: str | None
    checks: Any


@dataclass(frozen=True)
class BootstrapInterval:
    """One estimate's bootstrap: replicates, failures, SE, percentile and BCa intervals."""

    n_boot: int | None
    n_failed: int | None
    seed: int | None
    se: float | None
    ci_percentile: tuple[float | None, float | None] | None
    ci_bca: tuple[float | None, float | None] | None
    bias_correction: float | None
    acceleration: float | None


@dataclass(frozen=True)
class Estimate:
    """One estimate of a key path by one method (``label`` is the method in words)."""

    method: str
    label: str
    estimate: float | None
    se: float | None
    ci: tuple[float | None, float | None] | None
    p: float | None
    status: str | None
    note: str | None
    ci_method: str | None
    se_method: str | None
    bootstrap: BootstrapInterval | None


@dataclass(frozen=True)
class SensitivityPoint:
    """The path at one assumed method share."""

    method_share: float | None
    estimate: float | None
    ci: tuple[float | None, float | None] | None


@dataclass(frozen=True)
class Sensitivity:
    """The path as a function of an assumed method share, and its break-even shares."""

    curve: tuple[SensitivityPoint, ...]
    break_even_method_share: float | None
    ci_covers_zero_at: float | None
    estimated_method_share: float | None
    model_holds_up_to: float | None
    stopped_at: Any
    meaning: str | None
    marks: Mapping | None


@dataclass(frozen=True)
class Bounds:
    """The path's range over the plausible method shares."""

    low: float | None
    high: float | None
    basis: str | None
    plausible_share: tuple[float, float] | None
    share_source: str | None
    truncated_at: float | None


@dataclass(frozen=True)
class Trust:
    """How far the headline number can be trusted (high, medium, low) and why."""

    level: str | None
    reasons: tuple[str, ...]


@dataclass(frozen=True)
class PathOrigin:
    """Where a key path's two ends come from (second sources)."""

    outcome: str | None
    predictor: str | None
    kind: str | None
    free_of_same_rater_bias: bool | None
    separated_in_time: bool | None
    note: str | None


@dataclass(frozen=True)
class Counterpart:
    """The other path of a same-source/cross-source pair, named by its ends (``sources``: where
    the cross-source path's ends come from; None for a same-source counterpart)."""

    outcome: str | None
    predictor: str | None
    sources: PathOrigin | None


NO_COUNTERPART = Counterpart(None, None, None)


@dataclass(frozen=True)
class Benchmark:
    """The cross-source path's preferred estimate, which each same-source estimate is set against."""

    method: str | None
    estimate: float | None
    ci: tuple[float | None, float | None] | None


NO_BENCHMARK = Benchmark(None, None, None)


@dataclass(frozen=True)
class CrossSourceGap:
    """One estimate of a same-source path against the cross-source benchmark: the gap is the
    estimate minus the benchmark."""

    estimate: float | None
    ci: tuple[float | None, float | None] | None
    difference: float | None
    within_benchmark_ci: bool | None


@dataclass(frozen=True)
class CrossSourceCheck:
    """A same-source path beside its cross-source counterpart: report["paths"][i]["cross_source_check"]
    (measurement/corrections/source_paths.py): every estimate's gap to the benchmark, the closest."""

    counterpart: Counterpart | None
    benchmark: Benchmark | None
    by_estimate: Mapping[str, CrossSourceGap]
    closest: str | None
    preferred_difference: float | None
    note: str | None


def _counterpart(c: Any) -> Counterpart | None:
    if not isinstance(c, Mapping):
        return None
    return _pick(Counterpart, c, sources=_maybe(PathOrigin, c.get("sources")))


def _cross_source_check(c: Any) -> CrossSourceCheck | None:
    if not isinstance(c, Mapping) or not c:
        return None
    return _pick(CrossSourceCheck, c, counterpart=_counterpart(c.get("counterpart")),
                 benchmark=_maybe(Benchmark, c.get("benchmark")),
                 by_estimate=_by_name(c.get("by_estimate"), lambda e: _pick(CrossSourceGap, e)))


@dataclass(frozen=True)
class KeyPath:
    """One key path (predictor -> outcome), every estimate of it and the preferred one.

    A corrected association is not a causal effect; every correction bounds the bias of a
    shared method under its assumptions (``preferred_rests_on``), it does not remove it."""

    outcome: str
    predictor: str
    predictors: tuple[str, ...]
    estimates: Mapping[str, Estimate | None]
    preferred: str | None
    preferred_reason: str | None
    preferred_rests_on: Any
    trust: Trust | None
    bounds: Bounds | None
    cannot_pin_down: Any
    sensitivity: Sensitivity | None
    sources: PathOrigin | None
    cross_source_check: CrossSourceCheck | None     # a same-source path with a cross-source counterpart
    same_source_counterpart: Counterpart | None     # a cross-source path: the same-source path it checks
    bounds_wide: bool | None

    @property
    def preferred_estimate(self) -> Estimate | None:
        """The estimate the report leads with (``preferred``), or None when none can be pinned down."""
        return self.estimates.get(self.preferred) if self.preferred else None


def _estimate(method: str, e: Any) -> Estimate | None:
    if not isinstance(e, Mapping):
        return None
    return _pick(Estimate, e, method=method, label=method_label(method),
                 bootstrap=_maybe(BootstrapInterval, e.get("bootstrap")))


NO_SENSITIVITY = Sensitivity((), *(None,) * 7)  # a path without a sensitivity curve


def _sensitivity(s: Any) -> Sensitivity | None:
    if not isinstance(s, Mapping):
        return None
    return _pick(Sensitivity, s, curve=tuple(_pick(SensitivityPoint, pt) for pt in _mappings(s.get("curve"))))


def _path(p: Mapping) -> KeyPath:
    ests = _by_name(p.get("estimates"), lambda e: e)
    ests = MappingProxyType({m: _estimate(m, e) for m, e in ests.items()})
    trust = p.get("trust")
    return _pick(KeyPath, p, estimates=ests, sensitivity=_sensitivity(p.get("sensitivity")),
                 bounds=_maybe(Bounds, p.get("bounds")), sources=_maybe(PathOrigin, p.get("sources")),
                 cross_source_check=_cross_source_check(p.get("cross_source_check")),
                 same_source_counterpart=_counterpart(p.get("same_source_counterpart")),
                 trust=_maybe(Trust, trust, reasons=_texts(trust.get("reasons"))) if isinstance(trust, Mapping)
                 else None)


def _construct(name: str, c: Any) -> Construct:
    c = c if isinstance(c, Mapping) else {}
    return _pick(Construct, c, name=name, items=_texts(c.get("items")), reverse=_texts(c.get("reverse")),
                 item_stats=_by_name(c.get("item_stats"), lambda s: _pick(ItemStats, s)))


def _measurement_model(mm: Any) -> MeasurementModel | None:
    if not isinstance(mm, Mapping) or not mm:
        return None
    return _pick(MeasurementModel, mm, fit=_maybe(Fit, mm.get("fit")),
                 factor_correlations=_pairs(mm.get("factor_correlations")), htmt=_pairs(mm.get("htmt")),
                 htmt2=_pairs(mm.get("htmt2")),
                 fornell_larcker=_pairs(mm.get("fornell_larcker"), lambda v: _maybe(FornellLarcker, v)))


def _method_variance(mv: Any) -> MethodVariance:
    given = isinstance(mv, Mapping)
    mv = mv if given else {}
    checks = MappingProxyType({k: _check(v) for k, v in mv.items() if k != "verdict"})
    return MethodVariance(verdict=_pick(Verdict, mv.get("verdict")), checks=checks, given=given)


@dataclass(frozen=True)
class CheckScenario:
    """One scenario of the correction check: surveys simulated like the client's, or a departure."""

    id: str | None
    title: str | None
    description: str | None
    run: bool | None
    why_not: str | None
    failed_replicates: int | None
    first_failure: str | None
    verdicts: Mapping | None


@dataclass(frozen=True)
class CheckPath:
    """The correction check of one key path: the truth simulated, which estimate to lean on, and
    per scenario and estimate the bias, RMSE, coverage and count (``scenarios``, as report.json
    has them: ``correction_check.dependable`` reads them)."""

    outcome: str | None
    predictor: str | None
    truth: float | None
    lean_on: str | None
    lean_on_reason: str | None
    lean_on_dependable_in: tuple | None
    scenarios: Mapping[str, Mapping[str, Mapping | None]]


@dataclass(frozen=True)
class CorrectionCheck:
    """How well each correction works on surveys simulated like the client's: report["correction_check"]."""

    status: str | None
    why_not: str | None
    replicates: int | None
    population: Mapping | None
    scenarios: tuple[CheckScenario, ...]
    paths: tuple[CheckPath, ...]
    rules: Mapping | None
    intervals: str | None
    seed: int | None
    notes: tuple | None

    def path(self, outcome: str, predictor: str) -> CheckPath | None:
        """The check of one key path, None when it was not checked."""
        return next((p for p in self.paths if (p.outcome, p.predictor) == (outcome, predictor)), None)


def _correction_check(c: Any) -> CorrectionCheck | None:
    if not isinstance(c, Mapping):
        return None
    return _pick(CorrectionCheck, c,
                 scenarios=tuple(_pick(CheckScenario, s) for s in _mappings(c.get("scenarios"))),
                 paths=tuple(_pick(CheckPath, p, scenarios=_by_name(p.get("scenarios"), lambda per: _by_name(
                     per, lambda v: freeze(v) if isinstance(v, Mapping) else None))) for p in _mappings(c.get("paths"))))


@dataclass(frozen=True)
class PowerOption:
    """One design for the next survey and the power it gives to find a shared method."""

    what: str | None
    df: int | None
    power_now: float | None
    smallest_n: int | None


@dataclass(frozen=True)
class NextTime:
    """The planning advice: report["next_time"]."""

    status: str | None
    why_not: str | None
    advice: tuple[str, ...]
    options: tuple[PowerOption, ...]
    rows_now: int | None
    power: float | None
    planned_share: float | None
    alpha: float | None
    method: str | None
    basis: str | None


def _next_time(nt: Any) -> NextTime | None:
    if not isinstance(nt, Mapping):
        return None
    return _pick(NextTime, nt, advice=_texts(nt.get("advice")),
                 options=tuple(_pick(PowerOption, o) for o in _mappings(nt.get("options"))))


@dataclass(frozen=True)
class TeamConstruct:
    """One construct across groups: ICC(1), ICC(2) and the median rwg(j) over the groups it was computed in."""

    icc1: float | None
    icc2: float | None
    rwg_j_median: float | None
    rwg_j_groups: int | None


@dataclass(frozen=True)
class WithinEstimate:
    """A key path within groups (group-mean centred): standardized, unstandardized and its SE."""

    estimate: float | None
    b: float | None
    se_b: float | None


@dataclass(frozen=True)
class BetweenEstimate:
    """A key path between group means, and the number of groups."""

    estimate: float | None
    b: float | None
    se_b: float | None
    teams: int | None


@dataclass(frozen=True)
class WithinBetweenTest:
    """Whether the within- and between-group paths differ (Mundlak test, cluster-robust)."""

    difference_b: float | None
    se: float | None
    wald: float | None
    df: int | None
    p: float | None
    differ: bool | None


@dataclass(frozen=True)
class SameSourceTeam:
    """The path between team means corrected for their unreliability (None when it is not defined)."""

    estimate: float | None


@dataclass(frozen=True)
class SplitTeamEstimate:
    """The split-team estimate: each side's team mean from a different part of the team."""

    estimate: float | None
    ci: tuple[float | None, float | None] | None
    splits: int | None
    teams_used: int | None
    min_team_size: int | None
    note: str | None


@dataclass(frozen=True)
class TeamPath:
    """One key path within and between groups: report["teams"]["paths"][i]. A part report.json
    lacks reads as one with every field None."""

    outcome: str | None
    predictor: str | None
    within: WithinEstimate
    between: BetweenEstimate
    within_between_test: WithinBetweenTest
    same_source_team: SameSourceTeam
    split_source: SplitTeamEstimate


def _team_path(tp: Mapping) -> TeamPath:
    return _pick(TeamPath, tp, within=_pick(WithinEstimate, tp.get("within")),
                 between=_pick(BetweenEstimate, tp.get("between")),
                 within_between_test=_pick(WithinBetweenTest, tp.get("within_between_test")),
                 same_source_team=_pick(SameSourceTeam, tp.get("same_source_team")),
                 split_source=_pick(SplitTeamEstimate, tp.get("split_source")))


@dataclass(frozen=True)
class GroupScore:
    """One group's mean scale scores (``scores``: scale name -> mean) and its size."""

    group: str | None
    n: int | None
    scores: Mapping[str, float | None]

    def row(self) -> dict:
        """The group as one row: group, n, then each scale's mean (the teams table's columns)."""
        return {"group": self.group, "n": self.n, **self.scores}


def _group_score(g: Mapping) -> GroupScore:
    return GroupScore(group=g.get("group"), n=g.get("n"),
                      scores=MappingProxyType({k: freeze(v) for k, v in g.items() if k not in ("group", "n")}))


@dataclass(frozen=True)
class Teams:
    """Teams: ICC, agreement, within/between and split-team paths, and the group scores of
    groups of at least ``min_group_size`` (``visible_groups``); smaller groups are never shown."""

    group_column: str | None
    groups: int | None
    groups_reported: int | None
    groups_withheld: int | None
    min_group_size: int | None
    respondents_without_group: int | None
    constructs: Mapping[str, TeamConstruct | None]
    paths: tuple[TeamPath, ...]
    group_scores: tuple[GroupScore, ...]
    meaning: Any
    notes: tuple[str, ...]

    @property
    def visible_groups(self) -> tuple[GroupScore, ...]:
        """Group scores of groups with at least min_group_size respondents (a group of
        unknown size is not shown either)."""
        k = self.min_group_size
        if k is None:
            return ()
        return tuple(g for g in self.group_scores if g.n is not None and g.n >= k)


def _teams(t: Any) -> Teams | None:
    if not isinstance(t, Mapping):
        return None
    return _pick(Teams, t, constructs=_by_name(t.get("constructs"), lambda c: _pick(TeamConstruct, c)
                                                if isinstance(c, Mapping) else None),
                 paths=tuple(_team_path(p) for p in _mappings(t.get("paths"))),
                 group_scores=tuple(_group_score(g) for g in _mappings(t.get("group_scores"))),
                 notes=_texts(t.get("notes")))


DATE_KEYS = ("created_at", "generated_at", "date")  # a stored report's date, the first of these it has


@dataclass(frozen=True)
class Report:
    """An analysis: typed sections, the tables, the fitted models, and report.json itself.

    >>> report = samesource.analyze("staff_survey.csv", "staff_survey_design.json")  # doctest: +SKIP
    >>> report.constructs["support"].alpha                                          # doctest: +SKIP
    >>> report.to_frame("paths")                                                    # doctest: +SKIP

    The cautions travel with it (``cautions``, and first in every output): no decisions about
    individuals; small groups are never shown; corrections bound a shared method's bias, they
    do not remove it; a corrected association is not a causal effect; survey answers are
    personal data.
    """

    data: DataSummary
    constructs: Mapping[str, Construct]
    measurement_model: MeasurementModel | None
    method_variance: MethodVariance
    assumptions: tuple[AssumptionCheck, ...]
    paths: tuple[KeyPath, ...]
    teams: Teams | None
    screening: Screening
    review_needed: bool
    review_reasons: tuple
    cautions: tuple[str, ...]
    warnings: tuple[Notice, ...]
    tool: Tool
    thresholds: Mapping[str, Threshold]
    options: Mapping                  # the options the analysis ran with, as report.json has them
    schema: str | None                # report.json's schema ("samesource.report/1")
    correction_check: CorrectionCheck | None  # measurement/corrections/correction_check.py
    next_time: NextTime | None                # the planning advice (measurement/method_checks/planning.py)
    date: str | None                  # when a stored report says it was made (analyze writes no date)
    fits: Mapping[str, Any] = field(repr=False)
    _record: dict = field(repr=False)  # report.json's content, as analyze made it

    @classmethod
    def from_dict(cls, report: dict, fits: Mapping[str, Any] | None = None) -> Report:
        """A Report from report.json's content (``fits``: the fitted models, when at hand)."""
        record = copy.deepcopy(report)
        return cls(
            data=_data(record.get("data")),
            constructs=MappingProxyType({n: _construct(n, c) for n, c in _by_name(record.get("constructs"),
                                                                                   lambda c: c).items()}),
            measurement_model=_measurement_model(record.get("measurement_model")),
            method_variance=_method_variance(record.get("method_variance")),
            assumptions=tuple(_pick(AssumptionCheck, a) for a in _mappings(record.get("assumptions"))),
            paths=tuple(_path(p) for p in _mappings(record.get("paths"))),
            teams=_teams(record.get("teams")), screening=_screening(record.get("screening")),
            review_needed=bool(record.get("review_needed")), review_reasons=freeze(record.get("review_reasons") or []),
            cautions=_texts(record.get("cautions")),
            warnings=tuple(_pick(Notice, w) for w in _mappings(record.get("warnings"))),
            tool=_pick(Tool, record.get("tool")),
            thresholds=_by_name(record.get("thresholds"), lambda t: _pick(Threshold, t)),
            options=freeze(record.get("options")) if isinstance(record.get("options"), Mapping) else MappingProxyType({}),
            schema=record.get("schema"),
            correction_check=_correction_check(record.get("correction_check")),
            next_time=_next_time(record.get("next_time")),
            date=next((str(record[k]) for k in DATE_KEYS if record.get(k)), None),
            fits=MappingProxyType(dict(fits or {})), _record=record)

    @classmethod
    def of(cls, report: Report | Mapping) -> Report:
        """``report`` itself, or a Report read from report.json's content (what the output
        modules take: the service renders stored reports)."""
        return report if isinstance(report, Report) else cls.from_dict(dict(report))

    @classmethod
    def load(cls, path: str | Path) -> Report:
        """A Report from a report.json file written earlier (without the fitted models)."""
        return cls.from_dict(json.loads(Path(path).read_text(encoding="utf-8")))

    # -- report.json ---------------------------------------------------------------------------
    @property
    def record(self) -> dict:
        """report.json's content this report was read from, shared (not a copy); change nothing
        in it (:meth:`to_dict` gives a copy). The outputs read the typed sections, never this."""
        return self._record

    def to_dict(self) -> dict:
        """report.json's content (a fresh copy: changing it changes nothing here)."""
        return copy.deepcopy(self._record)

    def to_json(self) -> str:
        """report.json as the command line writes it (strict JSON, no NaN)."""
        return dumps(self._record)

    # -- tables ----------------------------------------------------------------------------------
    @property
    def table_names(self) -> tuple[str, ...]:
        """The tables of :meth:`to_frame`: the names of the files in tables/ (without .csv)."""
        from samesource.output.tables import report_tables

        return tuple(report_tables(self))

    def to_frame(self, name: str) -> pd.DataFrame:
        """One table in long (tidy) form, the same rows as tables/NAME.csv and tables.xlsx."""
        from samesource.output.tables import report_tables

        tables = report_tables(self)
        if name not in tables:
            from samesource.input.design import did_you_mean

            raise KeyError(f"no table named {name!r}{did_you_mean(name, list(tables))}; "
                           f"tables: {', '.join(tables)}")
        return tables[name]

    # -- reading -----------------------------------------------------------------------------------
    def summary(self) -> str:
        """The short text summary the command line prints."""
        from samesource.output.summary import text_summary

        return text_summary(self)

    def _repr_html_(self) -> str:
        from samesource.output.notebook import render_notebook

        return render_notebook(self)

    def __str__(self) -> str:
        return self.summary()

    def __repr__(self) -> str:
        verdict = self.method_variance.verdict.level
        return (f"Report(file={self.data.file!r}, rows_analyzed={self.data.rows_analyzed}, "
                f"constructs={len(self.constructs)}, paths={len(self.paths)}, method_variance={verdict!r}"
                + (", review_needed=True" if self.review_needed else "") + ")")

    # -- files -------------------------------------------------------------------------------------
    def files(self, *, when: str | None = None) -> dict[str, bytes]:
        """What :meth:`save` writes, as relative name -> bytes."""
        from samesource.output.files import report_files

        return report_files(self, when=when)

    def save(self, folder: str | Path = "samesource-report", *, when: str | None = None) -> Path:
        """Write what the command line writes: report.json, report.html, brief.html, tables/
        (a CSV per table) and tables.xlsx. Returns the folder."""
        from samesource.output.files import write_files

        return write_files(self.files(when=when), folder)


def method_label(key: str) -> str:
    """A method (report.json's METHOD key) in words: each correction's label (corrections/paths.py
    CORRECTIONS)."""
    return LABELS.get(key, key.replace("_", " ").capitalize())


__all__ = ["Report", "DataSummary", "Construct", "ItemStats", "Fit", "FornellLarcker", "MeasurementModel",
           "Verdict", "MethodVariance", "MethodCheck", "ModelTest", "AssumptionCheck", "Estimate",
           "BootstrapInterval", "KeyPath", "Sensitivity", "SensitivityPoint", "Bounds", "Trust", "PathOrigin",
           "Screening", "ScreeningCheck", "FlaggedRow", "Teams", "Threshold", "Tool", "method_label",
           "ResponseScale", "SourceJoin", "Counterpart", "Benchmark", "CrossSourceGap", "CrossSourceCheck",
           "MarkerPair", "MarkerChoice", "TeamConstruct", "TeamPath", "WithinEstimate", "BetweenEstimate",
           "WithinBetweenTest", "SameSourceTeam", "SplitTeamEstimate", "GroupScore"]
