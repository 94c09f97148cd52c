"""report["paths"]: every estimate of every key path, the preferred one, and its sensitivity."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from .design import Design
from .fitting import Moments
from .missing import MissingPlan
from .models import path_constructs
from .options import AnalysisOptions
from .paths import METHODS, NOTES, PathEstimator, wald
from .report import finite_or_none
from .sensitivity import sensitivity_curves

# Which estimate the report leads with: the best-identified correction that passed its checks.
PREFERENCE = [
    ("method_factor_adjusted", "marker", "the marker-identified method factor passed its checks: it corrects "
                                         "unreliability and the shared method the marker identifies"),
    ("measured_method_adjusted", None, "the measured method construct's model fitted cleanly: it corrects "
                                       "unreliability and the method variance the method scale measures"),
    ("method_factor_adjusted", "plain", "the plain method factor passed its identification checks"),
    ("latent", None, "no method-variance correction passed its checks, so the latent model leads: it corrects "
                     "unreliability but not shared method"),
    ("errors_in_variables", None, "the latent model did not fit cleanly; the single-indicator model corrects "
                                  "unreliability only"),
    ("observed", None, "no corrected estimate could be computed"),
]


def paths_section(design: Design, plan: MissingPlan, opts: AnalysisOptions, fits: dict[str, Any],
                  mv: dict, warnings: list[dict], *, executor=None,
                  progress: Callable[[int, int], None] | None = None) -> list[dict]:
    if not design.paths:
        return []
    mf = mv["method_factor"]
    use_mf = ("marker" if design.marker else "plain") if mf["usable_as_correction"] else None
    mm = mv.get("measured_method")
    estimator = PathEstimator(
        design, use_method_factor=use_mf, method_loadings=mf["loadings"],
        use_measured=bool(mm and mm["status"] == "ok"),
        r_m_rule=mv["marker"]["r_m_rule"] if mv.get("marker") else "smallest",
        time_limit=opts.fit_time_limit, n_starts=opts.n_starts, seed=opts.seed)
    X = plan.frame[estimator.items].to_numpy(dtype=float)
    full, extra = estimator.estimate(X, compute_se=True)
    fits.update(extra["fits"])
    estimator.warm = dict(extra["fits"])
    warnings += [{"code": "paths", "message": n} for n in estimator.notes]

    boot = None
    if opts.bootstrap:
        from .bootstrap import bootstrap
        from .executor import default_executor

        ex = executor or default_executor(opts.bootstrap)
        boot = bootstrap(estimator, X, n_boot=opts.bootstrap, seed=opts.seed, confidence=opts.confidence,
                         executor=ex, progress=progress, estimate=estimator.vector(full),
                         names=[f"{m} estimate of {o} on {x}" for m, o, x in estimator.keys])
        warnings += [{"code": "bootstrap", "message": n} for n in boot.notes]

    # sensitivity on the latent model (under FIML: on the EM covariance matrix, two-stage ML)
    latent = next(f for name, f in extra["fits"].items() if name == "latent")
    cov = latent.sample_cov
    names = tuple(latent.spec.observed)
    sens = sensitivity_curves(_reduced(estimator), Moments(names=names, cov=np.asarray(cov), n=latent.n),
                              confidence=opts.confidence, time_limit=opts.fit_time_limit)

    method_share = mf.get("method_share") if use_mf else (mm or {}).get("method_share")
    out = []
    for p in design.paths:
        for x in p.predictors:
            estimates = {}
            for m in METHODS:
                e = full[(m, p.outcome, x)]
                if e.status == "absent":
                    estimates[m] = None
                    continue
                ci, pval = wald(e.estimate, e.se, opts.confidence)
                entry: dict[str, Any] = {"estimate": e.estimate, "se": e.se, "ci": ci, "p": pval,
                                         "ci_method": "wald" if ci else None,
                                         "note": NOTES[m] + (f" ({e.note})" if e.note else ""),
                                         "status": e.status}
                if boot is not None:
                    k = estimator.keys.index((m, p.outcome, x))
                    bca = boot.ci_bca[k]
                    pct = boot.ci_percentile[k]
                    entry["bootstrap"] = {
                        "n_boot": boot.n_boot, "n_failed": int(boot.n_failed[k]), "seed": boot.seed,
                        "se": float(boot.se[k]), "ci_percentile": [float(pct[0]), float(pct[1])],
                        "ci_bca": [float(bca[0]), float(bca[1])] if np.all(np.isfinite(bca)) else None,
                        # null with ci_bca where BCa is undefined (not an undefined-value warning)
                        "bias_correction": finite_or_none(boot.bias_correction[k]),
                        "acceleration": finite_or_none(boot.acceleration[k]),
                    }
                    if e.estimate is not None and np.all(np.isfinite(pct)):
                        entry["se"] = float(boot.se[k])
                        entry["ci"] = entry["bootstrap"]["ci_bca"] or entry["bootstrap"]["ci_percentile"]
                        entry["ci_method"] = "bca" if entry["bootstrap"]["ci_bca"] else "percentile"
                estimates[m] = entry
            preferred, reason = _preferred(estimates, use_mf)
            s = sens[(p.outcome, x)]
            s["estimated_method_share"] = method_share
            out.append({"outcome": p.outcome, "predictor": x, "predictors": list(p.predictors),
                        "estimates": estimates, "preferred": preferred, "preferred_reason": reason,
                        "sensitivity": s})
    return out


def _reduced(estimator: PathEstimator) -> Design:
    return estimator.reduced


def _preferred(estimates: dict[str, dict | None], use_mf: str | None) -> tuple[str, str]:
    for method, kind, why in PREFERENCE:
        e = estimates.get(method)
        if e is None or e.get("estimate") is None or e.get("status") != "ok":
            continue
        if kind is not None and kind != use_mf:
            continue
        return method, why
    return "observed", PREFERENCE[-1][2]


__all__ = ["paths_section", "path_constructs"]
