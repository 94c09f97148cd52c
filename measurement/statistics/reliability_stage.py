"""The reliability stage: per construct, alpha with its Feldt interval, omega, item statistics."""

from __future__ import annotations

from types import MappingProxyType

import numpy as np

from samesource.engine.builders import single_factor_model
from samesource.engine.fitting import fit_model
from samesource.input.design import MIN_ITEMS_OMEGA, Design
from samesource.input.missing import MissingPlan
from samesource.options import AnalysisOptions
from samesource.results import (
    FitCache,
    ItemReliability,
    Notice,
    ReliabilityResult,
    ScaleReliability,
)
from samesource.statistics.reliability import (
    alpha_from_moments,
    item_statistics_from_moments,
    omega_total,
)


def construct_reliability(design: Design, plan: MissingPlan, opts: AnalysisOptions,
                          fits: FitCache) -> ReliabilityResult:
    """Each scale's alpha, omega and item statistics (its one-factor fits go into ``fits``)."""
    scales: dict[str, ScaleReliability] = {}
    said: list[Notice] = []
    for c in design.constructs.values():
        # the rows complete on the scale's items: a block of the moments formed once when every
        # row is complete, else their moments summed a block of rows at a time
        moments = plan.complete_moments(c.items)
        if moments is not None:
            n = moments.n
            cov = moments.cov * (n / (n - 1))
            alpha = alpha_from_moments(cov, n, len(c.items), confidence=opts.confidence)
            stats = item_statistics_from_moments(c.items, moments.mean, cov, n)
        else:  # fewer than two complete rows: alpha and item statistics say why they are missing
            few = plan.complete(c.items)
            n = len(few)
            mean = np.array([few.column(it).mean() for it in c.items]) if n else np.full(len(c.items), np.nan)
            alpha = alpha_from_moments(None, n, len(c.items), confidence=opts.confidence)
            stats = item_statistics_from_moments(c.items, mean, None, n)
        omega = None
        if len(c.items) < MIN_ITEMS_OMEGA:
            said.append(Notice("omega_needs_three_items",
                               f"Omega for '{c.name}' is not computed: a one-factor model of "
                               f"{len(c.items)} items is not identified on its own (3 items needed)."))
        else:
            spec = single_factor_model(c)
            fit = fit_model(spec, plan.data_for(c.items), time_limit=opts.fit_time_limit,
                            n_starts=opts.n_starts, seed=opts.seed)
            fits[spec.name] = fit
            if fit.status == "ok":
                lam = [fit.est("load", c.name, it) for it in c.items]
                theta = [fit.est("cov", it, it) for it in c.items]
                omega = omega_total(lam, theta)
                neg = [it for it, v in zip(c.items, lam, strict=True) if v < 0]
                if neg:
                    said.append(Notice("negative_loading",
                                       f"In '{c.name}', item(s) {', '.join(neg)} load negatively on "
                                       "the construct: check whether they are reverse-keyed in the design."))
            else:
                said.append(Notice("omega_fit_failed",
                                   f"Omega for '{c.name}' is not reported: its one-factor model "
                                   f"ended with status '{fit.status}'. " + " ".join(fit.warnings)))
        scales[c.name] = ScaleReliability(
            role=c.role, items=tuple(c.items), reverse=tuple(c.reverse), n=int(alpha.n),
            alpha=alpha.alpha, alpha_ci=tuple(alpha.ci) if alpha.ci is not None else None, omega=omega,
            item_stats=MappingProxyType({
                it: ItemReliability(item_rest_r=stats.loc[it, "item_rest_r"],
                                    alpha_if_deleted=stats.loc[it, "alpha_if_deleted"],
                                    mean=stats.loc[it, "mean"], sd=stats.loc[it, "sd"])
                for it in c.items}))
    return ReliabilityResult(scales=MappingProxyType(scales), notices=tuple(said))
