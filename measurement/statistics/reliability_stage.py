"""Per-construct reliability: alpha with its Feldt interval, omega, item statistics."""

from __future__ import annotations

from typing import Any

from samesource.engine.builders import single_factor_model
from samesource.engine.fitting import fit_model
from samesource.input.design import MIN_ITEMS_OMEGA, Design
from samesource.input.missing import MissingPlan
from samesource.options import AnalysisOptions
from samesource.statistics.reliability import (
    alpha_from_moments,
    cronbach_alpha,
    item_statistics,
    item_statistics_from_moments,
    omega_total,
)


def construct_reliability(design: Design, plan: MissingPlan, opts: AnalysisOptions,
                          fits: dict[str, Any], warnings: list[dict]) -> dict[str, dict]:
    out: dict[str, dict] = {}
    for c in design.constructs.values():
        moments = plan.moments(c.items)
        if moments is not None:  # complete rows: from the moments formed once, no pass over the rows
            n = moments.n
            cov = moments.cov * (n / (n - 1))
            alpha = alpha_from_moments(cov, n, len(c.items), confidence=opts.confidence)
            stats = item_statistics_from_moments(c.items, moments.mean, cov, n)
        else:
            complete = plan.complete(c.items)
            alpha = cronbach_alpha(complete, confidence=opts.confidence)
            stats = item_statistics(complete)
        entry: dict[str, Any] = {
            "role": c.role,
            "items": list(c.items),
            "reverse": list(c.reverse),
            "n": int(alpha.n),
            "alpha": alpha.alpha,
            "alpha_ci": list(alpha.ci) if alpha.ci is not None else None,
            "omega": None,
            "composite_reliability": None,
            "ave": None,
            "item_stats": {
                it: {"loading": None, "item_rest_r": stats.loc[it, "item_rest_r"],
                     "alpha_if_deleted": stats.loc[it, "alpha_if_deleted"],
                     "mean": stats.loc[it, "mean"], "sd": stats.loc[it, "sd"]}
                for it in c.items
            },
        }
        if len(c.items) < MIN_ITEMS_OMEGA:
            warnings.append({"code": "omega_needs_three_items",
                             "message": f"Omega for '{c.name}' is not computed: a one-factor model of "
                                        f"{len(c.items)} items is not identified on its own (3 items needed)."})
        else:
            spec = single_factor_model(c)
            fit = fit_model(spec, plan.data_for(c.items), time_limit=opts.fit_time_limit,
                            n_starts=opts.n_starts, seed=opts.seed)
            fits[spec.name] = fit
            if fit.status == "ok":
                lam = [fit.est("load", c.name, it) for it in c.items]
                theta = [fit.est("cov", it, it) for it in c.items]
                entry["omega"] = omega_total(lam, theta)
                neg = [it for it, v in zip(c.items, lam, strict=True) if v < 0]
                if neg:
                    warnings.append({"code": "negative_loading",
                                     "message": f"In '{c.name}', item(s) {', '.join(neg)} load negatively on "
                                                "the construct: check whether they are reverse-keyed in the design."})
            else:
                warnings.append({"code": "omega_fit_failed",
                                 "message": f"Omega for '{c.name}' is not reported: its one-factor model "
                                            f"ended with status '{fit.status}'. " + " ".join(fit.warnings)})
        out[c.name] = entry
    return out
