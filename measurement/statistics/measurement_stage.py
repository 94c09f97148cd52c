"""The measurement model: fit, factor correlations, composite reliability, AVE, HTMT,
Fornell-Larcker."""

from __future__ import annotations

from types import MappingProxyType

import pandas as pd

from samesource.engine.builders import measurement_model
from samesource.engine.fitting import fit_model
from samesource.input.design import Design
from samesource.input.missing import MissingPlan
from samesource.options import AnalysisOptions
from samesource.results import FitCache, MeasurementResult, Notice, ScaleValidity, freeze
from samesource.statistics.reliability import average_variance_extracted, composite_reliability
from samesource.statistics.validity import HTMT_VARIANT, fornell_larcker, htmt, htmt2


def item_correlations(plan: MissingPlan, items: list[str]) -> pd.DataFrame:
    """Item correlations on the analysis rows (pairwise-complete when rows have gaps)."""
    return plan.corr(items)


def measurement_model_section(design: Design, plan: MissingPlan, opts: AnalysisOptions,
                              fits: FitCache) -> MeasurementResult:
    """report["measurement_model"], and each scale's standardized loadings, CR and AVE (the
    assembly merges those into report["constructs"]); the fit goes into ``fits``."""
    spec = measurement_model(design)
    fit = fit_model(spec, plan.data_for(list(spec.observed)), time_limit=opts.fit_time_limit,
                    n_starts=opts.n_starts, seed=opts.seed)
    fits[spec.name] = fit
    names = list(design.constructs)
    said = tuple(Notice("measurement_model", f"Measurement model: {w}") for w in fit.warnings)

    ave: dict[str, float] = {}
    scales: dict[str, ScaleValidity] = {}
    for c in design.constructs.values():
        std = [fit.std("load", c.name, it) for it in c.items]
        ave[c.name] = average_variance_extracted(std)
        scales[c.name] = ScaleValidity(loadings=MappingProxyType(dict(zip(c.items, std, strict=True))),
                                       composite_reliability=composite_reliability(std), ave=ave[c.name])

    corr = {}
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            corr[(a, b)] = fit.std("cov", a, b)
    blocks = {c.name: list(c.items) for c in design.constructs.values()}
    icorr = item_correlations(plan, design.items)
    ht = htmt(icorr, blocks)
    ht2 = htmt2(icorr, blocks)
    fl = fornell_larcker(ave, corr)

    section = {
        "fit": fit.fit_indices(),
        "status": fit.status,
        "estimator": fit.estimator,
        "warnings": list(fit.warnings),
        "factor_correlations": {f"{a}|{b}": r for (a, b), r in corr.items()},
        "htmt": {f"{a}|{b}": v for (a, b), v in ht.items()},
        "htmt2": {f"{a}|{b}": v for (a, b), v in ht2.items()},
        "htmt_variant": HTMT_VARIANT,
        "fornell_larcker": {f"{a}|{b}": v for (a, b), v in fl.items()},
    }
    return MeasurementResult(section=freeze(section), scales=MappingProxyType(scales), notices=said)
