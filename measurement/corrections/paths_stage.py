"""report["paths"]: every estimate of every key path, the preferred one, and its sensitivity."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from samesource.corrections.bounds import PUBLISHED_SHARES, path_bounds, plausible_shares
from samesource.corrections.paths import METHODS, NOTES, PathEstimator, preference_order, wald
from samesource.corrections.sensitivity import sensitivity_curves
from samesource.corrections.source_paths import annotate_sources
from samesource.engine.builders import path_constructs
from samesource.engine.fitting import Moments
from samesource.engine.robust_se import se_ratio
from samesource.input.design import Design
from samesource.input.missing import MissingPlan
from samesource.method_checks.assumptions import SE_RATIO_LIMIT, Assumption, estimate_stable, find
from samesource.options import AnalysisOptions
from samesource.output.report_json import finite_or_none
from samesource.results import FitCache, Notice, PathsResult, freeze

# Below this many rows analysed, Wald intervals under-cover (docs/coverage.md: 90-91% at
# n = 300): unless the user chose, the bootstrap runs by default with this many replicates.
SMALL_SAMPLE = 200
AUTO_BOOTSTRAP = 300

# Which estimate the report leads with: the best-identified correction that passed its checks
# (each correction's ``preference`` in corrections/paths.py CORRECTIONS, by rank).
PREFERENCE = preference_order()


def bootstrap_replicates(opts: AnalysisOptions, rows: int) -> int:
    """The user's choice, else the small-sample default."""
    if opts.bootstrap is not None:
        return opts.bootstrap
    return AUTO_BOOTSTRAP if rows < SMALL_SAMPLE else 0


def paths_section(design: Design, plan: MissingPlan, opts: AnalysisOptions, fits: FitCache,
                  mv: dict, assumptions: Sequence[Assumption], *, executor=None,
                  progress: Callable[[int, int], None] | None = None) -> PathsResult:
    """Every key path's estimates, the preferred one and its bounds (report["paths"]), and
    the ``estimate_stable`` check, which the choice of the preferred estimate weighs with
    ``assumptions``. The full-sample fits go into ``fits``."""
    if not design.paths:
        return PathsResult(paths=(), notices=())
    said: list[Notice] = []
    mf = mv["method_factor"]
    use_mf = ("marker" if design.marker else "plain") if mf["usable_as_correction"] else None
    mm = mv.get("measured_method")
    estimator = PathEstimator(
        design, use_method_factor=use_mf, method_loadings=mf["loadings"],
        use_measured=bool(mm and mm["status"] == "ok"),
        r_m_rule=mv["marker"]["r_m_rule"] if mv.get("marker") else "smallest",
        time_limit=opts.fit_time_limit, n_starts=opts.n_starts, seed=opts.seed)
    rows = plan.rows  # read a block at a time; the models take moments or per-pattern sums
    full, extra = estimator.estimate(rows, compute_se=True, moments=plan.moments(estimator.items))
    fits.update(extra["fits"])
    estimator.warm = dict(extra["fits"])
    said += [Notice("paths", n) for n in estimator.notes]

    boot = None
    n_boot = bootstrap_replicates(opts, plan.rows_analyzed)
    if n_boot and opts.bootstrap is None:
        said.append(Notice("bootstrap_default",
                           f"With {plan.rows_analyzed} rows analysed (under {SMALL_SAMPLE}), analytic "
                           f"intervals are too narrow; {n_boot} bootstrap replicates were run by default "
                           "(set the bootstrap option to choose another number, or 0 for none)."))
    if n_boot:
        from samesource.corrections.bootstrap import bootstrap
        from samesource.executor import default_executor

        ex = executor or default_executor(n_boot)
        boot = bootstrap(estimator, rows, n_boot=n_boot, seed=opts.seed, confidence=opts.confidence,
                         executor=ex, progress=progress, estimate=estimator.vector(full),
                         names=[f"{m} estimate of {o} on {x}" for m, o, x in estimator.keys])
        said += [Notice("bootstrap", n) for n in boot.notes]

    # sensitivity on the latent model (under FIML: on the EM covariance matrix, two-stage ML)
    latent = next(f for name, f in extra["fits"].items() if name == "latent")
    cov = latent.sample_cov
    names = tuple(latent.spec.observed)
    sens = sensitivity_curves(_reduced(estimator), Moments(names=names, cov=np.asarray(cov), n=latent.n),
                              confidence=opts.confidence, time_limit=opts.fit_time_limit)

    continuous = find(assumptions, "items_continuous")
    robust_wanted = continuous is not None and continuous.status != "holds"
    out = []
    for p in design.paths:
        for x in p.predictors:
            estimates = {}
            for m in METHODS:
                e = full[(m, p.outcome, x)]
                if e.status == "absent":
                    estimates[m] = None
                    continue
                ratio = se_ratio(e.se_robust, e.se)
                use_robust = e.se_robust is not None and (
                    robust_wanted or (ratio is not None and not 1 / SE_RATIO_LIMIT <= ratio <= SE_RATIO_LIMIT))
                se = e.se_robust if use_robust else e.se
                ci, pval = wald(e.estimate, se, opts.confidence)
                entry: dict[str, Any] = {"estimate": e.estimate, "se": se, "ci": ci, "p": pval,
                                         "ci_method": "wald" if ci else None,
                                         "se_method": ("robust" if use_robust else "information") if se else None,
                                         "se_information": e.se, "se_robust": e.se_robust, "se_ratio": ratio,
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
                        entry["se_method"] = "bootstrap"
                        entry["ci"] = entry["bootstrap"]["ci_bca"] or entry["bootstrap"]["ci_percentile"]
                        entry["ci_method"] = "bca" if entry["bootstrap"]["ci_bca"] else "percentile"
                estimates[m] = entry
            out.append({"outcome": p.outcome, "predictor": x, "predictors": list(p.predictors),
                        "estimates": estimates, "sensitivity": sens[(p.outcome, x)]})

    stability = estimate_stable(out)
    assumptions = [*assumptions, stability]
    shares = plausible_shares(mv, assumptions)
    for path in out:
        preferred, reason, rests_on = _preferred(path["estimates"], use_mf, assumptions)
        path["preferred"], path["preferred_reason"] = preferred, reason
        path["preferred_rests_on"] = rests_on
        s = path["sensitivity"]
        s["estimated_method_share"] = shares.estimated_share
        s["marks"] = {"estimated_share": shares.estimated_share, "estimated_share_ci": shares.estimated_ci,
                      "estimated_by": shares.estimated_by, "published_range": list(PUBLISHED_SHARES.range)}
        b = path_bounds(s, shares, path["estimates"].get(preferred))
        path["bounds"] = b.to_dict()
        path["bounds_wide"] = b.wide
        path["cannot_pin_down"] = b.cannot_pin_down
        path["trust"] = _trust(path, assumptions, b)
    if design.sources:  # where each path's ends come from (measurement/corrections/source_paths.py)
        out = annotate_sources(design, out)
    return PathsResult(paths=freeze(out), notices=tuple(said), stability=stability)


def _reduced(estimator: PathEstimator) -> Design:
    return estimator.reduced


def _preferred(estimates: dict[str, dict | None], use_mf: str | None,
               assumptions: list[Assumption]) -> tuple[str, str, list[str]]:
    """The first estimate in PREFERENCE order that was computed cleanly and that no
    assumption check keeps out (fails, or doubtful without a remedy); it names the
    untestable assumptions it rests on. If every candidate is kept out, the first computed
    one leads, saying so."""
    fallback = None
    for method, kind, why in PREFERENCE:
        e = estimates.get(method)
        if e is None or e.get("estimate") is None or e.get("status") != "ok":
            continue
        if kind is not None and kind != use_mf:
            continue
        blocking = [a for a in assumptions if a.blocks(method)]
        if blocking:
            fallback = fallback or (method, blocking)
            continue
        demoted = _demoted_before(estimates, use_mf, assumptions, method)
        rests = [a.id for a in assumptions if a.status == "untestable" and method in a.affects]
        text = why + (f". Not preferred: {demoted}" if demoted else "")
        if rests:
            text += (". It rests on assumptions this survey cannot test (" + ", ".join(rests)
                     + "): see the bounds")
        return method, text, rests
    if fallback is not None:
        method, blocking = fallback
        return method, ("every estimate rests on an assumption check that failed or is in doubt ("
                        + ", ".join(a.id for a in blocking) + "); this one is shown first but should not be "
                        "relied on"), [a.id for a in blocking]
    return "observed", PREFERENCE[-1][2], []


def _demoted_before(estimates, use_mf, assumptions, chosen: str) -> str:
    """Plain words for the candidates ranked above ``chosen`` that a check kept out."""
    out = []
    for method, kind, _ in PREFERENCE:
        if method == chosen:
            break
        e = estimates.get(method)
        if e is None or e.get("estimate") is None or (kind is not None and kind != use_mf):
            continue
        ids = [a.id for a in assumptions if a.blocks(method)]
        if ids:
            out.append(f"{method} ({', '.join(ids)})")
    return "; ".join(out)


def _trust(path: dict, assumptions: list[Assumption], bounds) -> dict:
    """How far the headline number can be trusted, from the checks behind it:
    low when a check behind it failed or the bounds are wide; medium when it rests on an
    untestable or doubtful-but-remedied assumption (beyond method orthogonality, which
    every correction assumes); high otherwise."""
    m = path["preferred"]
    reasons: list[str] = []
    level = "high"
    for a in assumptions:
        status = a.by_estimate.get(m) if a.by_estimate is not None else (a.status if m in a.affects else None)
        if status is None or status == "holds":
            continue
        if a.blocks(m):
            level = "low"
            reasons.append(f"{a.id}: {a.message}")
        elif a.id != "method_orthogonal":
            level = "medium" if level == "high" else level
            reasons.append(f"{a.id}: {a.message}")
    if bounds.wide:
        level = "low"
        reasons.append(bounds.cannot_pin_down)
    if m in ("latent", "errors_in_variables", "observed", "disattenuated", "disattenuated_omega"):
        if level == "high":
            level = "medium"
        reasons.append("the headline number corrects unreliability but not shared method")
    if not reasons:
        reasons.append("every check behind this estimate holds; like every correction it assumes the answering "
                       "style is unrelated to the attitudes (see the bounds)")
    return {"level": level, "reasons": reasons}


__all__ = ["paths_section", "path_constructs"]
