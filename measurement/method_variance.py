"""Common-method variance: every established check, run from the design's roles.

Each check is a function returning one section of ``report["method_variance"]``;
:func:`method_variance_section` runs those the design allows and
:mod:`measurement.verdict` weighs them.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import stats

from .collinearity import KOCK_THRESHOLD, full_collinearity_vif
from .comparison import chi2_difference
from .design import Design
from .fitting import FitResult, fit_model
from .harman import SHARE_THRESHOLD, harman_efa
from .marker import marker_adjustment
from .missing import MissingPlan
from .models import (
    METHOD,
    cfa_marker_models,
    measured_method_model,
    measurement_model,
    method_factor_model,
    one_factor_model,
)
from .modelspec import ModelSpec
from .options import AnalysisOptions
from .scores import scale_scores
from .verdict import verdict

ALPHA = 0.05  # significance level of every test here


class Fitter:
    """Fits models on the analysis rows with the options' cap, keeping every fit by name."""

    def __init__(self, plan: MissingPlan, opts: AnalysisOptions, fits: dict[str, Any]):
        self.plan, self.opts, self.fits = plan, opts, fits

    def __call__(self, spec: ModelSpec, start: FitResult | dict | None = None,
                 n_starts: int | None = None) -> FitResult:
        if spec.name in self.fits:
            return self.fits[spec.name]
        fit = fit_model(spec, self.plan.data_for(list(spec.observed)), time_limit=self.opts.fit_time_limit,
                        n_starts=n_starts or self.opts.n_starts, seed=self.opts.seed, start=start)
        self.fits[spec.name] = fit
        return fit


def fit_summary(fit: FitResult) -> dict:
    return {"description": fit.spec.description, "status": fit.status, "fit": fit.fit_indices(),
            "warnings": list(fit.warnings)}


def method_shares(fit: FitResult, method_latent: str, items_by_construct: dict[str, list[str]]) -> dict:
    """Share of each item's variance due to the method factor: the squared completely
    standardized method loading; averaged per construct and over all items given."""
    per_item = {it: fit.std("load", method_latent, it) ** 2
                for items in items_by_construct.values() for it in items}
    per_construct = {c: float(np.mean([per_item[i] for i in items])) for c, items in items_by_construct.items()}
    return {"overall": float(np.mean(list(per_item.values()))), "by_construct": per_construct,
            "by_item": per_item}


def reliability_split(fit: FitResult, method_latent: str, constructs: dict[str, list[str]]) -> dict:
    """Split of each construct's composite reliability into trait, method and error shares
    (Williams, Hartman & Cavazotte 2010), from completely standardized loadings of a model
    whose method factor is orthogonal to the traits."""
    out = {}
    for c, items in constructs.items():
        lt = sum(fit.std("load", c, it) for it in items)
        lm = sum(fit.std("load", method_latent, it) for it in items)
        err = sum(fit.std("cov", it, it) for it in items)
        total = lt ** 2 + lm ** 2 + err
        out[c] = {"trait": lt ** 2 / total, "method": lm ** 2 / total, "error": err / total}
    return out


# --- Harman -----------------------------------------------------------------------------

def harman_section(design: Design, plan: MissingPlan, fitter: Fitter) -> dict:
    items = [it for c in design.substantive for it in c.items]
    efa = harman_efa(plan.complete(items))
    one = fitter(one_factor_model(items))
    mm = fitter(measurement_model(design, design.substantive).with_params(
        measurement_model(design, design.substantive).params, name="measurement_model:substantive"))
    test = chi2_difference(one, mm)
    return {
        "first_factor_share": efa.first_factor_share,
        "factors_eigen_gt_1": efa.factors_eigen_gt_1,
        "eigenvalues": efa.eigenvalues[:10],
        "method": "unrotated principal-components solution of the substantive items' correlations",
        "rule": f"flag when one factor has an eigenvalue above 1 or the first factor explains more than "
                f"{SHARE_THRESHOLD:.0%} of the variance (common practice)",
        "single_factor_fit": fit_summary(one),
        "vs_measurement_model": test,
        # one construct has one factor by design: the test says nothing then
        "flag": bool(efa.flag and len(design.substantive) > 1),
        "note": "Harman's test is insensitive: a pass is weak evidence that method variance is absent "
                "(Podsakoff et al. 2003)." + ("" if len(design.substantive) > 1 else
                                              " With one substantive construct it cannot flag anything."),
    }


# --- Marker (Lindell & Whitney) ----------------------------------------------------------

def marker_section(design: Design, plan: MissingPlan) -> dict | None:
    marker = design.marker
    if marker is None:
        return None
    names = [c.name for c in design.substantive] + [marker.name]
    scores = scale_scores(plan.frame, design, names).dropna()
    n = len(scores)
    corr = np.corrcoef(scores.to_numpy(dtype=float), rowvar=False)
    adj = marker_adjustment(corr, names, marker.name, n)
    r_m = adj["r_m"]
    t_m = r_m * math.sqrt((n - 2) / max(1 - r_m ** 2, 1e-12))
    p_m = float(2 * stats.t.sf(abs(t_m), n - 2))

    def pairs(d: dict) -> dict:
        return {design.pair_key(a, b): {"r": v.r, "r_adjusted": v.r_adjusted, "t": v.t, "p": v.p}
                for (a, b), v in d.items()}

    return {
        "marker": marker.name,
        "n": n,
        "r_m": r_m,
        "r_m_rule": adj["rule"],
        "r_m_p": p_m,
        "marker_correlations": adj["marker_correlations"],
        "pairs": pairs(adj["pairs"]),
        "sensitivity": [{"rule": s["rule"], "r_m": s["r_m"], "pairs": pairs(s["pairs"])}
                        for s in adj["sensitivity"]],
        "flag": bool(r_m > 0 and p_m < ALPHA),
        "note": "Scale-score correlations adjusted by r_M, the marker's smallest correlation with a "
                "substantive scale (Lindell & Whitney 2001); the sensitivity rows use the second-smallest "
                "correlation and the upper 95% bound of r_M (Malhotra, Kim & Patil 2006).",
    }


# --- CFA marker technique (Williams, Hartman & Cavazotte 2010) ---------------------------

def cfa_marker_section(design: Design, fitter: Fitter) -> dict | None:
    marker = design.marker
    if marker is None:
        return None
    cons = design.substantive + [marker]
    cfa = fitter(measurement_model(design, cons).with_params(
        measurement_model(design, cons).params, name="measurement_model:with_marker"))
    if cfa.status not in ("ok",):
        return {"models": {"cfa": fit_summary(cfa)}, "tests": {}, "method_share": {},
                "flag": False, "note": "not run: the measurement model with the marker did not fit cleanly"}
    lam = {it: cfa.est("load", marker.name, it) for it in marker.items}
    theta = {it: cfa.est("cov", it, it) for it in marker.items}
    base = fitter(cfa_marker_models(design, lam, theta, which="baseline"))
    equal = fitter(cfa_marker_models(design, lam, theta, which="equal"), start=base)
    free = fitter(cfa_marker_models(design, lam, theta, which="free"), start=equal)
    tests = {
        "baseline_vs_equal": chi2_difference(base, equal),
        "equal_vs_free": chi2_difference(equal, free),
    }
    use_free = free.status == "ok" and (tests["equal_vs_free"]["p"] or 1.0) < ALPHA
    chosen, chosen_name = (free, "free") if use_free else (equal, "equal")
    subst = [c.name for c in design.substantive]
    fixed = {(a, b): base.est("cov", a, b) for i, a in enumerate(subst) for b in subst[i + 1:]}
    held = fitter(cfa_marker_models(design, lam, theta, fixed, which=f"{chosen_name}_held"), start=chosen)
    tests[f"{chosen_name}_vs_held"] = chi2_difference(held, chosen)
    for key, meaning in (("baseline_vs_equal", "is there method variance tied to the marker?"),
                         ("equal_vs_free", "does it affect items unequally?"),
                         (f"{chosen_name}_vs_held", "does it bias the substantive correlations?")):
        tests[key]["question"] = meaning
    items = {c.name: list(c.items) for c in design.substantive}
    shares = method_shares(chosen, marker.name, items) if chosen.status == "ok" else None
    p_method = tests["baseline_vs_equal"]["p"]
    return {
        "models": {"measurement": fit_summary(cfa), "baseline": fit_summary(base),
                   "equal": fit_summary(equal), "free": fit_summary(free),
                   f"{chosen_name}_held": fit_summary(held)},
        "tests": tests,
        "chosen": chosen_name,
        "method_share": shares["by_construct"] if shares else {},
        "method_share_overall": shares["overall"] if shares else None,
        "reliability_split": reliability_split(chosen, marker.name, items) if chosen.status == "ok" else {},
        "flag": bool(p_method is not None and p_method < ALPHA),
        "note": "The marker's latent variable is taken as the method source. When the marker has a trait of "
                "its own, this understates method variance that the marker does not share.",
    }


# --- Latent method factor, marker-identified or plain ------------------------------------

def _degenerate(fit: FitResult, design: Design, mm: FitResult | None) -> list[str]:
    """Signs that free method loadings absorbed trait covariance (methods.md pitfalls)."""
    reasons = []
    subst = [it for c in design.substantive for it in c.items]
    m_sub = np.mean([abs(fit.std("load", METHOD, it)) for it in subst])
    if design.marker is not None:
        m_mark = np.mean([abs(fit.std("load", METHOD, it)) for it in design.marker.items])
        if m_sub > 0.5 and m_sub > 2.5 * m_mark:
            reasons.append(f"method loadings on substantive items (mean {m_sub:.2f}) far above those on the "
                           f"marker (mean {m_mark:.2f})")
    if m_sub > 0.6:
        reasons.append(f"method loadings on substantive items average {m_sub:.2f}: the method factor "
                       "has taken over the traits")
    if mm is not None:
        shifts = [abs(fit.std("load", c.name, it) - mm.std("load", c.name, it))
                  for c in design.substantive for it in c.items]
        if max(shifts) > 0.4:
            reasons.append(f"a trait loading moved by {max(shifts):.2f} from the measurement model")
    return reasons


def _only_method_negative(fit: FitResult) -> bool:
    """True when the method variance is the only negative variance of the solution."""
    t = fit.params
    var = t[(t["op"] == "cov") & (t["lhs"] == t["rhs"]) & (t["lhs"] != METHOD)]
    return bool((var["estimate"] > 0).all())


def method_factor_section(design: Design, fitter: Fitter, mm: FitResult) -> dict:
    use_marker = design.marker is not None
    equal = fitter(method_factor_model(design, use_marker=use_marker, equal_loadings=True))
    none_spec = method_factor_model(design, use_marker=use_marker, equal_loadings=True)
    # the same model without the method factor: its variance fixed at 0
    no_method = fitter(none_spec.with_params(
        [p if not (p.op == "cov" and p.lhs == METHOD) else p.__class__("cov", METHOD, METHOD, free=False, value=0.0)
         for p in none_spec.params], name=none_spec.name + ":without", description="no method factor"))
    # Free loadings start from the equal-loading solution (loadings sqrt of its method variance);
    # two starts suffice: the free model is only a check on the equal one.
    start = None
    if equal.converged:
        start = {(p.op, p.lhs, p.rhs): float(v) for p, v in zip(equal.spec.params, equal.params["estimate"],
                                                                    strict=True)}
        m = float(np.sqrt(max(equal.est("cov", METHOD, METHOD), 0.01)))
        start = {k: (m if k[0] == "load" and k[1] == METHOD else v) for k, v in start.items()
                 if k != ("cov", METHOD, METHOD)}
    free = fitter(method_factor_model(design, use_marker=use_marker, equal_loadings=False), start=start,
                  n_starts=2)
    warnings: list[str] = []
    test_equal = chi2_difference(no_method, equal)
    test_free = chi2_difference(equal, free)

    method_var = equal.est("cov", METHOD, METHOD) if equal.converged else None
    # A negative method variance (a Heywood case) is what sampling error gives when the true
    # method variance is zero: read it as none detected, not as a failed model.
    equal_ok = equal.converged and equal.identified and not equal.capped and (
        equal.proper or (method_var is not None and method_var < 0 and _only_method_negative(equal)))
    degenerate = _degenerate(free, design, mm)
    free_ok = (free.status == "ok" and not degenerate and test_free["p"] is not None
               and test_free["p"] < ALPHA)
    if degenerate:
        warnings.append("The free-loading method factor is degenerate and is not used: " + "; ".join(degenerate) + ".")
    elif free.status != "ok":
        warnings.append(f"The free-loading method factor ended with status '{free.status}' and is not used.")

    chosen = free if free_ok else equal
    usable = free_ok or equal_ok
    if not use_marker and usable:
        # Without a marker the factor is identified only by the loading pattern; near
        # tau-equivalent items leave it empirically unidentified (methods.md).
        if test_equal["p"] is None or test_equal["p"] >= ALPHA:
            usable = False
            warnings.append("The plain method factor does not improve fit over no method factor; with no "
                            "marker to identify it, it is not used as a correction.")
    if not equal_ok and not free_ok:
        warnings.append(f"The equal-loading method factor ended with status '{equal.status}': "
                        + " ".join(equal.warnings))
    items = {c.name: list(c.items) for c in design.substantive}
    if method_var is not None and method_var < 0 and chosen is equal:
        shares = {"overall": 0.0, "by_construct": {c: 0.0 for c in items}}
        warnings.append(f"The method variance was estimated below zero ({method_var:.3f}); read as no "
                        "method variance detected.")
    elif usable:
        shares = method_shares(chosen, METHOD, items)
    else:
        shares = {"overall": None, "by_construct": {}}
    p = test_equal["p"]
    return {
        "identified_by": "marker" if use_marker else "loading pattern only (no marker)",
        "loadings": "free" if free_ok else "equal",
        "method_share": shares["overall"],
        "method_share_by_construct": shares["by_construct"],
        # standardized method loading of every item (marker items included), when usable
        "item_loadings": ({it: chosen.std("load", METHOD, it) for it in chosen.spec.observed}
                          if usable and shares["overall"] else {}),
        "proper": bool(chosen.proper),
        "identified": bool(chosen.identified),
        "usable_as_correction": bool(usable),
        "fit": chosen.fit_indices(),
        "models": {"without_method": fit_summary(no_method), "equal": fit_summary(equal),
                   "free": fit_summary(free)},
        "tests": {"method_vs_none": test_equal, "equal_vs_free": test_free},
        "flag": bool(usable and p is not None and p < ALPHA and (shares["overall"] or 0) > 0),
        "warnings": warnings,
        "model": chosen.spec.name,
    }


# --- Measured method variable ------------------------------------------------------------

def measured_method_section(design: Design, fitter: Fitter) -> dict | None:
    method = design.method
    if method is None:
        return None
    spec = measured_method_model(design)
    fit = fitter(spec)
    base_params = [p for p in spec.params if not (p.op == "load" and p.lhs == method.name
                                                   and p.rhs not in method.items)]
    without = fitter(spec.with_params(base_params, name=spec.name + ":without",
                                      description="the method construct correlated with nothing, no loadings"))
    test = chi2_difference(without, fit)
    items = {c.name: list(c.items) for c in design.substantive}
    ok = fit.status == "ok"
    shares = method_shares(fit, method.name, items) if ok else {"overall": None, "by_construct": {}}
    return {
        "method_construct": method.name,
        "method_share": shares["overall"],
        "method_share_by_construct": shares["by_construct"],
        "item_loadings": ({it: fit.std("load", method.name, it) for items in items.values() for it in items}
                          if ok else {}),
        "proper": bool(fit.proper), "identified": bool(fit.identified), "status": fit.status,
        "fit": fit.fit_indices(),
        "tests": {"method_vs_none": test},
        "flag": bool(ok and test["p"] is not None and test["p"] < ALPHA),
        "warnings": list(fit.warnings),
        "model": spec.name,
    }


# --- Full collinearity (Kock 2015) -------------------------------------------------------

def collinearity_section(design: Design, plan: MissingPlan) -> dict:
    names = [c.name for c in design.substantive]
    if len(names) < 2:
        return {"values": {}, "threshold": KOCK_THRESHOLD, "flag": False,
                "note": "needs at least two substantive constructs"}
    vif = full_collinearity_vif(scale_scores(plan.frame, design, names))
    return {"values": vif, "threshold": KOCK_THRESHOLD,
            "flag": bool(any(v > KOCK_THRESHOLD for v in vif.values())),
            "rule": f"flag when any construct score's full-collinearity VIF exceeds {KOCK_THRESHOLD} (Kock 2015)"}


def method_variance_section(design: Design, plan: MissingPlan, opts: AnalysisOptions,
                            fits: dict[str, Any], mm: FitResult) -> dict:
    fitter = Fitter(plan, opts, fits)
    out: dict[str, Any] = {
        "harman": harman_section(design, plan, fitter),
        "marker": marker_section(design, plan),
        "cfa_marker": cfa_marker_section(design, fitter),
        "method_factor": method_factor_section(design, fitter, mm),
        "measured_method": measured_method_section(design, fitter),
        "collinearity_vif": collinearity_section(design, plan),
    }
    out["verdict"] = verdict(out)
    return out
