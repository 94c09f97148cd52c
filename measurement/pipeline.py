"""The stages of an analysis, in order: data and design in, report.json's content and the fits out.

Callers (the command line, the HTTP service, a notebook) use :func:`samesource.analyze`
(:mod:`samesource.facade`), which runs :func:`analyze` here and returns a Report; nothing in
``service/`` reaches deeper into ``measurement/``.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from samesource import __version__
from samesource.corrections.paths_stage import paths_section
from samesource.errors import DataError, InputError
from samesource.input.design import Design, parse_design
from samesource.input.frames import Data, read_data
from samesource.input.loading import LoadedTable
from samesource.input.missing import MissingPlan, plan_missing
from samesource.input.prepare import PreparedData
from samesource.input.review import review_section
from samesource.input.screening import screen_respondents
from samesource.input.sources import load_sources, prepare_with_sources
from samesource.method_checks.method_variance import (
    method_variance_section,
    method_variance_verdict,
)
from samesource.options import AnalysisOptions
from samesource.output.report_json import finalize_report, finite_or_none
from samesource.results import (
    FitCache,
    MeasurementResult,
    MethodVarianceResult,
    PathsResult,
    ReliabilityResult,
    SectionResult,
    constructs_section,
    freeze,
    thaw,
)
from samesource.statistics.measurement_stage import measurement_model_section
from samesource.statistics.reliability_stage import construct_reliability
from samesource.statistics.teams_stage import teams_section
from samesource.timings import StageClock

Progress = Callable[[str, int, int], None]

STAGES = ("load", "screen", "reliability", "measurement_model", "method_variance", "paths", "teams",
          "report")


@dataclass
class Analysis:
    """What :func:`analyze` returns: the JSON-ready report and the objects behind it."""

    report: dict
    prepared: PreparedData
    plan: MissingPlan
    fits: dict[str, Any] = field(default_factory=dict)

    def summary(self) -> str:
        from samesource.output.summary import text_summary

        return text_summary(self.report)


def analyze(
    data: Data,
    design: Design | dict,
    options: AnalysisOptions | dict | None = None,
    *,
    name: str | None = None,
    progress: Progress | None = None,
    executor=None,
    sources: Mapping[str, Any] | None = None,
) -> Analysis:
    """Run the whole analysis. Raises :class:`~samesource.errors.InputError` for bad input.

    ``sources``: the design's second sources, NAME -> a LoadedTable, a path, bytes, or a
    ``(path or bytes, file name)`` pair (measurement/input/sources.py)."""
    opts = options if isinstance(options, AnalysisOptions) else AnalysisOptions.from_dict(options)
    dsg = design if isinstance(design, Design) else parse_design(design)
    clock = StageClock()  # report["timings"]
    step = clock.timed(progress or (lambda stage, done, total: None))
    total = len(STAGES)

    step("load", 0, total)
    table, prepared = read_prepared(data, dsg, sources=sources, name=name, sheet=opts.sheet)
    if opts.check_corrections:  # refused now, not after the analysis it would follow
        from samesource.corrections.correction_check import scenario_count, size_error

        too_big = size_error(int(prepared.n_rows), opts.check_corrections, scenario_count(dsg))
        if too_big is not None:
            raise too_big
    same = dsg.main_part()  # the main file's constructs: the same-source checks look at these

    step("screen", 1, total)
    screening = screen_respondents(prepared.rows, columns=same.items, scale_min=prepared.scale_min,
                                   scale_max=prepared.scale_max, **_as_given(prepared, same))
    plan = plan_missing(prepared, opts, flagged=screening.flagged_rows)
    if plan.rows_analyzed < _min_rows(dsg):
        raise DataError(
            f"only {plan.rows_analyzed} rows are left to analyse after {plan.describe()}; "
            f"the design's {len(dsg.items)} items need at least {_min_rows(dsg)}",
            file=table.source)

    _check_redundant(plan, dsg, table.source)

    step("reliability", 2, total)
    fits = FitCache()  # the one cache of fitted models, handed to every stage that fits
    reliability = construct_reliability(dsg, plan, opts, fits)

    step("measurement_model", 3, total)
    measurement = measurement_model_section(dsg, plan, opts, fits)

    step("method_variance", 4, total)
    method = method_variance_stage(same, plan, opts, fits)

    step("paths", 5, total)
    paths = paths_section(dsg, plan, opts, fits, thaw(method.section), method.assumptions,
                          executor=executor, progress=lambda done, n: step("bootstrap", done, n))

    step("teams", 6, total)
    teams = teams_section(dsg, prepared, plan, opts)

    check = next_time = SectionResult(None)
    if opts.check_corrections:  # measurement/corrections/correction_check.py, then the planning advice from it
        from samesource.corrections.correction_check import correction_check
        from samesource.method_checks.planning import next_time_section

        checked, population = correction_check(
            dsg, prepared, plan, thaw(method.section), thaw(paths.paths), opts, n=opts.check_corrections,
            executor=executor, progress=lambda done, n: step("check_corrections", done, n))
        check = SectionResult(freeze(checked))
        next_time = SectionResult(freeze(next_time_section(dsg, population, plan, opts)))

    step("report", 7, total)
    report = assemble(table, prepared, plan, screening, opts, dsg, reliability=reliability,
                      measurement=measurement, method=method, paths=paths, teams=teams, check=check,
                      next_time=next_time)
    report["timings"] = clock.finish()
    step("report", total, total)
    return Analysis(report=report, prepared=prepared, plan=plan, fits=dict(fits))


# A plain CSV file at least this large is read a block of lines at a time, its answers kept as
# one byte per cell (measurement/input/streamed.py): the same numbers in a fraction of the
# memory. SAMESOURCE_STREAM_MB sets it (0: every plain CSV file).
STREAM_BYTES = 256 * 2**20


def stream_bytes(env: Mapping[str, str] | None = None) -> int:
    """The size from which a plain CSV file is read beyond memory (SAMESOURCE_STREAM_MB in
    ``env``, default the process's environment); a value that is not a number of MB, 0 or
    more, raises :class:`~samesource.errors.InputError`."""
    raw = (os.environ if env is None else env).get("SAMESOURCE_STREAM_MB", "").strip()
    if not raw:
        return STREAM_BYTES
    try:
        mb = float(raw)
    except ValueError:
        mb = float("nan")
    if not mb >= 0 or mb == float("inf"):  # a typo must not quietly read every file in memory
        raise InputError(f"SAMESOURCE_STREAM_MB must be a number of megabytes, 0 or more (0: read every plain "
                         f"CSV file a block at a time), got {raw!r}", code="bad_setting")
    return int(mb * 2**20)


def read_prepared(data: Data, design: Design, *, sources: Mapping[str, Any] | None = None,
                  name: str | None = None, sheet: str | int | None = None) -> tuple[LoadedTable, PreparedData]:
    """The data read and prepared: a big plain CSV file a block at a time (``stream_bytes``), anything
    else in memory (also a file the streamed reader declines: ``NotStreamable`` says why)."""
    from samesource.input.streamed import NotStreamable, prepare_streamed

    if not sources and isinstance(data, str | os.PathLike) and os.path.isfile(data) \
            and os.path.getsize(data) >= stream_bytes():
        try:
            prepared = prepare_streamed(data, design, name=name)
            return prepared.table, prepared
        except NotStreamable:
            pass  # read in memory, where every case has its message
    table = read_data(data, name=name, sheet=sheet)
    return table, prepare_with_sources(table, design, load_sources(sources))


def method_variance_stage(design: Design, plan: MissingPlan, opts: AnalysisOptions,
                          fits: FitCache) -> MethodVarianceResult:
    """Every method-variance check, the assumption checks they allow and the verdict
    (measurement/method_checks/method_variance.py); reads the measurement model from ``fits``."""
    mv = method_variance_section(design, plan, opts, fits, fits["measurement_model"])
    assumptions = method_variance_verdict(design, plan, mv)  # the verdict goes into mv
    return MethodVarianceResult(section=freeze(mv), assumptions=tuple(assumptions))


def assemble(table: LoadedTable, prepared: PreparedData, plan: MissingPlan, screening: Any,
             opts: AnalysisOptions, design: Design, *, reliability: ReliabilityResult,
             measurement: MeasurementResult, method: MethodVarianceResult, paths: PathsResult,
             teams: SectionResult, check: SectionResult, next_time: SectionResult) -> dict[str, Any]:
    """report.json's content from the stages' results: the one place they are merged."""
    assumptions = [*method.assumptions, *([paths.stability] if paths.stability is not None else [])]
    warnings: list[dict] = list(prepared.warnings)
    if plan.recommendation:
        warnings.append({"code": "listwise_dropped_many", "message": plan.recommendation})
    for stage in (reliability, measurement, paths, teams):
        warnings += [n.to_dict() for n in stage.notices]
    constructs = constructs_section(reliability, measurement)
    report: dict[str, Any] = {
        "schema": "samesource.report/1",
        "tool": {"name": "samesource", "version": __version__},
        "assumptions": [a.to_dict() for a in assumptions],
        "data": _data_section(table, prepared, plan),
        "screening": _screening_section(screening, plan),
        "constructs": constructs,
        "measurement_model": thaw(measurement.section),
        "method_variance": thaw(method.section),
        "paths": thaw(paths.paths),
        "teams": thaw(teams.section),
        "options": opts.to_dict(),
        "design": design.to_dict(),
        **({"correction_check": thaw(check.section)} if check.section is not None else {}),
        **({"next_time": thaw(next_time.section)} if next_time.section is not None else {}),
    }
    # Review before use (measurement/input/review.py): after every section it reads from.
    report.update(review_section(constructs, design, scale_source=prepared.scale_source))
    return finalize_report(report, warnings=warnings, options=opts)


def _check_redundant(plan: MissingPlan, design: Design, source: str) -> None:
    """Two items that carry the same information make every covariance matrix singular:
    name them before any model is fitted."""
    corr = plan.corr(design.items).to_numpy()
    iu = np.argwhere(np.triu(np.abs(corr) > 0.9999, k=1))
    if len(iu):
        a, b = design.items[iu[0][0]], design.items[iu[0][1]]
        raise DataError(f"items '{a}' and '{b}' are perfectly correlated on the rows analysed (the same "
                        "answers, or one the reverse of the other): drop one of them from the design",
                        file=source, column=b)


def _min_rows(design: Design) -> int:
    # Enough rows for a positive-definite covariance matrix of all items, and some to spare.
    return max(len(design.items) + 2, 30)


def _as_given(prepared: PreparedData, design: Design) -> dict:
    """How the screen reads the answers as given, a block of rows at a time: the items in the
    file's column order, and the reverse-keyed ones it recodes back (longstring and response
    variability describe the questionnaire as answered)."""
    names = set(prepared.rows.names)
    return {"order": [c for c in prepared.table.frame.columns if c in names],
            "reversed_items": {it for c in design.constructs.values() for it in c.reverse}}


def _data_section(table: LoadedTable, prepared: PreparedData, plan: MissingPlan) -> dict:
    return {
        "file": os.path.basename(table.source),
        "format": table.format,
        "encoding": table.encoding,
        "delimiter": table.delimiter,
        "decimal": table.decimal,
        "sheet": table.sheet,
        "sha256": table.sha256,
        "rows": prepared.n_rows,
        "rows_analyzed": plan.rows_analyzed,
        "items": len(prepared.rows.names),
        "excluded_rows": plan.excluded_rows,
        "excluded_by_reason": plan.excluded_by_reason,
        "missing_cells": int(prepared.missing_cells),
        "missing_share": float(prepared.missing_cells / max(prepared.n_rows * len(prepared.rows.names), 1)),
        "response_scale": {"min": prepared.scale_min, "max": prepared.scale_max,
                           "source": prepared.scale_source},
        "missing_handling": plan.to_dict(),
        **({"sources": {link.name: link.to_dict() for link in prepared.links}} if prepared.links else {}),
    }


def _screening_section(screening, plan: MissingPlan) -> dict:
    flagged = [
        {"row": int(r), "reasons": list(screening.reasons.get(r, []))}
        for r in screening.flagged_rows
    ]
    checks = {rule: {"rule": text, "flagged": int(screening.counts.get(rule, 0))}
              for rule, text in screening.rules.items()}
    summary = {}
    for col in ("longstring", "irv", "mahalanobis_d2", "share_missing"):
        median, most = screening.measures.spread(col)
        summary[col] = {"median": finite_or_none(median), "max": finite_or_none(most)}
    return {
        "flagged_rows": flagged,
        "n_flagged": len(flagged),
        "dropped": bool(plan.dropped_flagged),
        "checks": checks,
        "distribution": summary,
        "note": ("Flagged rows are reported for review and kept in the analysis"
                 if not plan.dropped_flagged else "Flagged rows were dropped before the analysis")
                + "; screening rules are common practice, not proof of careless answering.",
    }


