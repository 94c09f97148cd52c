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

from samesource.output.files import report_files, write_files
from samesource.output.report_json import dumps
from samesource.output.tables import method_label, report_tables

Pair = tuple[str, str]


def _freeze(v: Any) -> Any:
    """Read-only view of a report value: dicts become mappings that refuse writes, lists tuples."""
    if isinstance(v, dict):
        return MappingProxyType({k: _freeze(x) for k, x in v.items()})
    if isinstance(v, list | tuple):
        return tuple(_freeze(x) for x in v)
    return v


def _pick(cls, d: Mapping | None, **given):
    """An instance of dataclass ``cls`` from the keys of ``d`` it names (absent keys: None)."""
    d = d or {}
    values = {f.name: _freeze(d.get(f.name)) for f in fields(cls) if f.name not in given}
    return cls(**values, **given)


def _pairs(d: Mapping | None) -> Mapping[Pair, Any]:
    """report.json's "A|B" keys as (A, B) tuples, in design order."""
    out = {}
    for k, v in (d or {}).items():
        a, _, b = k.partition("|")
        out[(a, b)] = _freeze(v)
    return MappingProxyType(out)


@dataclass(frozen=True)
class DataSummary:
    """What was read: report["data"]."""

    file: str | None
    format: str | None
    sha256: str | None
    rows: int | None
    rows_analyzed: int | None
    items: int | None
    excluded_rows: int | None
    missing_cells: int | None
    missing_share: float | None
    response_scale: Mapping | None
    missing_handling: Mapping | None


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


@dataclass(frozen=True)
class MeasurementModel:
    """The confirmatory factor model of every scale: report["measurement_model"]."""

    status: str | None
    estimator: str | None
    fit: Fit | None
    factor_correlations: Mapping[Pair, float | None]
    htmt: Mapping[Pair, float | None]
    htmt2: Mapping[Pair, float | None]
    fornell_larcker: Mapping[Pair, Mapping]
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


@dataclass(frozen=True)
class MethodVariance:
    """Every common-method check (``checks``: the check's section of report.json, or None
    when the design does not allow it) and the verdict."""

    verdict: Verdict
    checks: Mapping[str, Mapping | None]


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
    bootstrap: Mapping | None


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
    trust: Mapping | None
    bounds: Mapping | None
    cannot_pin_down: Any
    sensitivity: Mapping | None

    @property
    def preferred_estimate(self) -> Estimate | None:
        """The estimate the report leads with (``preferred``), or None when none can be pinned down."""
        return self.estimates.get(self.preferred) if self.preferred else None


def _estimate(method: str, e: Mapping | None) -> Estimate | None:
    return None if e is None else _pick(Estimate, e, method=method, label=method_label(method))


def _path(p: Mapping) -> KeyPath:
    ests = MappingProxyType({m: _estimate(m, e) for m, e in (p.get("estimates") or {}).items()})
    return _pick(KeyPath, p, estimates=ests)


def _construct(name: str, c: Mapping) -> Construct:
    stats = MappingProxyType({i: _pick(ItemStats, s) for i, s in (c.get("item_stats") or {}).items()})
    return _pick(Construct, c, name=name, item_stats=stats)


def _measurement_model(mm: Mapping | None) -> MeasurementModel | None:
    if not mm:
        return None
    return _pick(MeasurementModel, mm, fit=_pick(Fit, mm["fit"]) if mm.get("fit") else None,
                 factor_correlations=_pairs(mm.get("factor_correlations")), htmt=_pairs(mm.get("htmt")),
                 htmt2=_pairs(mm.get("htmt2")), fornell_larcker=_pairs(mm.get("fornell_larcker")))


def _method_variance(mv: Mapping | None) -> MethodVariance:
    mv = mv or {}
    checks = MappingProxyType({k: _freeze(v) for k, v in mv.items() if k != "verdict"})
    return MethodVariance(verdict=_pick(Verdict, mv.get("verdict")), checks=checks)


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
    teams: Mapping | None
    screening: Mapping | None
    review_needed: bool
    review_reasons: tuple
    cautions: tuple[str, ...]
    warnings: tuple
    fits: Mapping[str, Any] = field(repr=False)
    _record: dict = field(repr=False)  # report.json's content, as analyze made it

    @classmethod
    def from_dict(cls, report: dict, fits: Mapping[str, Any] | None = None) -> Report:
        """A Report from report.json's content (``fits``: the fitted models, when at hand)."""
        record = copy.deepcopy(report)
        return cls(
            data=_pick(DataSummary, record.get("data")),
            constructs=MappingProxyType({n: _construct(n, c) for n, c in (record.get("constructs") or {}).items()}),
            measurement_model=_measurement_model(record.get("measurement_model")),
            method_variance=_method_variance(record.get("method_variance")),
            assumptions=tuple(_pick(AssumptionCheck, a) for a in record.get("assumptions") or []),
            paths=tuple(_path(p) for p in record.get("paths") or []),
            teams=_freeze(record.get("teams")), screening=_freeze(record.get("screening")),
            review_needed=bool(record.get("review_needed")), review_reasons=_freeze(record.get("review_reasons") or []),
            cautions=tuple(record.get("cautions") or []), warnings=_freeze(record.get("warnings") or []),
            fits=MappingProxyType(dict(fits or {})), _record=record)

    @classmethod
    def load(cls, path: str | Path) -> Report:
        """A Report from a report.json file written earlier (without the fitted models)."""
        return cls.from_dict(json.loads(Path(path).read_text(encoding="utf-8")))

    # -- report.json ---------------------------------------------------------------------------
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
        return tuple(report_tables(self._record))

    def to_frame(self, name: str) -> pd.DataFrame:
        """One table in long (tidy) form, the same rows as tables/NAME.csv and tables.xlsx."""
        tables = report_tables(self._record)
        if name not in tables:
            from samesource.input.design import did_you_mean

            raise KeyError(f"no table named {name!r}{did_you_mean(name, list(tables))}; "
                           f"tables: {', '.join(tables)}")
        return tables[name]

    # -- reading -----------------------------------------------------------------------------------
    def summary(self) -> str:
        """The short text summary the command line prints."""
        from samesource.output.summary import text_summary

        return text_summary(self._record)

    def _repr_html_(self) -> str:
        from samesource.output.notebook import render_notebook

        return render_notebook(self._record)

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
        return report_files(self._record, when=when)

    def save(self, folder: str | Path = "samesource-report", *, when: str | None = None) -> Path:
        """Write what the command line writes: report.json, report.html, brief.html, tables/
        (a CSV per table) and tables.xlsx. Returns the folder."""
        return write_files(self.files(when=when), folder)


__all__ = ["Report", "DataSummary", "Construct", "ItemStats", "Fit", "MeasurementModel", "Verdict",
           "MethodVariance", "AssumptionCheck", "Estimate", "KeyPath"]
