"""Common-method variance: every established check, run from the design's roles.

Each check is a function returning one section of ``report["method_variance"]``;
:func:`method_variance_section` runs those the design allows and
:mod:`samesource.method_checks.verdict` weighs them.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import stats

from samesource.engine.builders import (
    METHOD,
    cfa_marker_models,
    measured_method_model,
    measurement_model,
    method_factor_model,
    one_factor_model,
    only_method_variance_negative,
    substantive_measurement_model,
    tau_equivalent_model,
    without_method_factor,
)
from samesource.engine.chunked_moments import MomentSums
from samesource.engine.comparison import chi2_difference
from samesource.engine.fitting import FitResult, delta_method, fit_model
from samesource.engine.modelspec import ModelSpec
from samesource.input.design import Design
from samesource.input.missing import MissingPlan, moments_corr
from samesource.method_checks.collinearity import KOCK_THRESHOLD, vif_from_corr
from samesource.method_checks.harman import SHARE_THRESHOLD, harman_from_corr
from samesource.method_checks.marker import marker_adjustment
from samesource.method_checks.verdict import verdict
from samesource.options import AnalysisOptions
from samesource.statistics.scores import score_moments

ALPHA = 0.05  # significance level of every test here, but for the two below
# The more flexible method factors must clear a stricter bar: free loadings (one parameter per
# item) and the factor identified by the loading pattern alone capitalise on chance, and ML
# difference tests run liberal on few-category items (measured here: 3 of 20 clean 5-point
# surveys adopted free loadings at .05). Our rule.
ALPHA_FLEXIBLE = 0.01


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


# Our rule, not a published one: common-method variance, by its definition, reaches every
# measure taken from the same source (Podsakoff et al. 2003). Free loadings that leave some
# construct with under a tenth of the method share of the most affected construct look like
# a factor that absorbed trait covariance, not like a shared method.
CONCENTRATION_RATIO = 0.10


def concentration(by_construct: dict[str, float]) -> dict:
    """Is a method factor's variance concentrated on a few constructs? (rule above)"""
    vals = {c: float(v) for c, v in by_construct.items() if v is not None}
    if len(vals) < 2 or max(vals.values()) <= 0:
        return {"concentrated": False, "ratio": None, "rule": _CONC_RULE}
    ratio = min(vals.values()) / max(vals.values())
    low = sorted(c for c, v in vals.items() if v < CONCENTRATION_RATIO * max(vals.values()))
    return {"concentrated": bool(ratio < CONCENTRATION_RATIO), "ratio": ratio, "low": low, "rule": _CONC_RULE}


_CONC_RULE = (f"concentrated when some substantive construct's mean method share is below "
              f"{CONCENTRATION_RATIO:.0%} of the most affected construct's (a shared method reaches every "
              "same-source measure; our rule)")


def share_interval(fit: FitResult, method_latent: str, items: list[str],
                   confidence: float) -> dict | None:
    """The mean method share of ``items`` (mean squared completely standardized method
    loading) with a delta-method Wald interval, clipped to [0, 1]. None without an
    information matrix."""
    if fit.param_cov is None:
        return None
    rows = [fit._row("load", method_latent, it) for it in items]
    value, se = delta_method(fit, lambda std: float(np.mean(std[rows] ** 2)))
    if se is None:
        return {"share": value, "se": None, "ci": None}
    z = stats.norm.ppf(0.5 + confidence / 2)
    return {"share": value, "se": se, "ci": [max(0.0, value - z * se), min(1.0, value + z * se)]}


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


def _score_sums(design: Design, plan: MissingPlan, names: list[str]) -> MomentSums:
    """The scale scores' sums over the rows with every score: from the items' moments when
    the rows are complete, else a block of rows at a time."""
    items = [it for n in names for it in design.constructs[n].items]
    return score_moments(plan.rows, design, names, plan.moments(items))


# --- Harman -----------------------------------------------------------------------------

def harman_section(design: Design, plan: MissingPlan, fitter: Fitter) -> dict:
    items = [it for c in design.substantive for it in c.items]
    efa = harman_from_corr(moments_corr(plan.complete_moments(items).cov))
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
    scores = _score_sums(design, plan, names)
    n = scores.n
    corr = moments_corr(scores.cross)
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
        "smallest_substantive_r": _smallest_substantive(corr, names, marker.name, design),
        "pairs": pairs(adj["pairs"]),
        "sensitivity": [{"rule": s["rule"], "r_m": s["r_m"], "pairs": pairs(s["pairs"])}
                        for s in adj["sensitivity"]],
        "flag": bool(r_m > 0 and p_m < ALPHA),
        "note": "Scale-score correlations adjusted by r_M, the marker's smallest correlation with a "
                "substantive scale (Lindell & Whitney 2001); the sensitivity rows use the second-smallest "
                "correlation and the upper 95% bound of r_M (Malhotra, Kim & Patil 2006).",
    }


def _smallest_substantive(corr: np.ndarray, names: list[str], marker: str, design: Design) -> dict | None:
    """The smallest absolute correlation between two substantive scales: shared method adds to
    every such correlation, so it bounds what the marker should find (evidence, not a test)."""
    idx = [i for i, n in enumerate(names) if n != marker]
    pairs = [(abs(corr[i, j]), names[i], names[j]) for k, i in enumerate(idx) for j in idx[k + 1:]]
    if not pairs:
        return None
    r, a, b = min(pairs)
    return {"pair": design.pair_key(a, b), "abs_r": float(r)}


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
        "assumption": marker_own_trait(design, fitter.plan),
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


# A marker that measured nothing but the shared method would share as much with the
# substantive items as with its own items (equal method loadings). Our rule, from the
# logic of the technique (Williams, Hartman & Cavazotte 2010 take the marker's latent
# variable as the method): when its items share more than twice as much with each other,
# most of the marker's latent variable is a trait of its own.
OWN_TRAIT_RATIO = 2.0


def marker_own_trait(design: Design, plan: MissingPlan) -> dict:
    """Does the marker have a trait of its own? Mean correlation among the marker's items
    against their mean absolute correlation with the substantive items."""
    marker = design.marker
    subst = [it for c in design.substantive for it in c.items]
    corr = plan.corr(list(marker.items) + subst)
    mk = list(marker.items)
    within = corr.loc[mk, mk].to_numpy()[np.triu_indices(len(mk), k=1)]
    between = np.abs(corr.loc[mk, subst].to_numpy()).ravel()
    w, b = float(np.nanmean(within)), float(np.nanmean(between))
    own = bool(w > OWN_TRAIT_RATIO * max(b, 1e-12))
    return {
        "marker_has_own_trait": own,
        "mean_within_marker_r": w,
        "mean_marker_substantive_r": b,
        "rule": f"the marker has a trait of its own when its items correlate with each other more than "
                f"{OWN_TRAIT_RATIO:g} times as strongly as with the substantive items (our rule)",
        "status": "fails" if own else "holds",
        "message": ("The marker's items share much more with each other than with the other scales: its "
                    "latent variable is mostly a trait of its own, so this technique, which takes it as the "
                    "method source, understates the shared method and cannot show that there is none."
                    if own else
                    "The marker's items share about as much with the other scales as with each other, as "
                    "this technique assumes."),
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


def method_factor_section(design: Design, fitter: Fitter, mm: FitResult) -> dict:
    use_marker = design.marker is not None
    confidence = fitter.opts.confidence
    equal = fitter(method_factor_model(design, use_marker=use_marker, equal_loadings=True))
    no_method = fitter(without_method_factor(method_factor_model(design, use_marker=use_marker, equal_loadings=True)))
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
    test_free_none = chi2_difference(no_method, free)
    items = {c.name: list(c.items) for c in design.substantive}
    subst_items = [it for its in items.values() for it in its]

    method_var = equal.est("cov", METHOD, METHOD) if equal.converged else None
    # A negative method variance (a Heywood case) is what sampling error gives when the true
    # method variance is zero: read it as none detected, not as a failed model.
    equal_ok = equal.converged and equal.identified and not equal.capped and (
        equal.proper or (method_var is not None and method_var < 0 and only_method_variance_negative(equal)))
    degenerate = _degenerate(free, design, mm)
    free_shares = method_shares(free, METHOD, items) if free.converged else None
    conc = concentration(free_shares["by_construct"]) if free_shares else {"concentrated": False}
    # Free loadings are used only when they are a better, proper, significant method factor
    # that is not concentrated on a few constructs (methods.md pitfalls).
    free_reasons = []
    if free.status != "ok":
        free_reasons.append(f"the free-loading model ended with status '{free.status}'")
    if degenerate:
        free_reasons.append("it is degenerate: " + "; ".join(degenerate))
    if not (test_free["p"] is not None and test_free["p"] < ALPHA_FLEXIBLE):
        free_reasons.append(f"it does not fit better than equal loadings at p < {ALPHA_FLEXIBLE} (p "
                            f"{_p(test_free['p'])})")
    if not (test_free_none["p"] is not None and test_free_none["p"] < ALPHA_FLEXIBLE):
        free_reasons.append(f"it does not fit better than no method factor at p < {ALPHA_FLEXIBLE} (p "
                            f"{_p(test_free_none['p'])})")
    if conc.get("concentrated"):
        free_reasons.append(f"its method variance is concentrated on a few constructs (least affected: "
                            f"{', '.join(conc['low'])})")
    without_marker = plain_method_check(design, fitter) if use_marker else None
    if without_marker is not None and not without_marker["loadings_differ"]:
        # With tau-equivalent scales, free method loadings proportional to the trait loadings trade
        # against the trait correlations: the free model is not identified, its fit gain is chance
        # (methods.md, method_loadings)
        free_reasons.append("the items of each scale load equally (tau-equivalence not rejected), so free "
                            "method loadings are not identified")
    free_ok = not free_reasons
    if degenerate:
        warnings.append("The free-loading method factor is degenerate and is not used: " + "; ".join(degenerate) + ".")
    elif free.status != "ok":
        warnings.append(f"The free-loading method factor ended with status '{free.status}' and is not used.")
    elif conc.get("concentrated") and test_free["p"] is not None and test_free["p"] < ALPHA_FLEXIBLE:
        warnings.append("The free-loading method factor fits better but puts its variance on a few constructs "
                        f"only ({conc['rule']}): it is not used.")

    chosen = free if free_ok else equal
    test_used = test_free_none if free_ok else test_equal
    usable = free_ok or equal_ok
    if not use_marker and usable:
        # Without a marker the factor is identified only by the loading pattern; near
        # tau-equivalent items leave it empirically unidentified (methods.md).
        if test_used["p"] is None or test_used["p"] >= ALPHA:
            usable = False
            warnings.append("The plain method factor does not improve fit over no method factor; with no "
                            "marker to identify it, it is not used as a correction.")
    if not equal_ok and not free_ok:
        warnings.append(f"The equal-loading method factor ended with status '{equal.status}': "
                        + " ".join(equal.warnings))
    interval = None
    if method_var is not None and method_var < 0 and chosen is equal:
        shares = {"overall": 0.0, "by_construct": {c: 0.0 for c in items}}
        interval = {"share": 0.0, "se": None, "ci": [0.0, _share_upper_from_negative(equal, subst_items, confidence)]}
        warnings.append(f"The method variance was estimated below zero ({method_var:.3f}); read as no "
                        "method variance detected.")
    elif usable:
        shares = method_shares(chosen, METHOD, items)
        interval = share_interval(chosen, METHOD, subst_items, confidence)
    else:
        shares = {"overall": None, "by_construct": {}}
    p = test_used["p"]
    out = {
        "identified_by": "marker" if use_marker else "loading pattern only (no marker)",
        "loadings": "free" if free_ok else "equal",
        "free_loadings_not_used_because": free_reasons if not free_ok else [],
        "free_loadings_concentration": conc,
        # why the free-loading solution is not a clean one (status, degeneracy): its
        # chi-square difference against equal loadings is then no test of them
        "free_loadings_unclean": ([f"status '{free.status}'"] if free.status != "ok" else []) + degenerate,
        "method_share": shares["overall"],
        "method_share_ci": interval["ci"] if interval else None,
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
        "tests": {"method_vs_none": test_equal, "equal_vs_free": test_free, "free_vs_none": test_free_none,
                  "used_vs_none": test_used},
        "flag": bool(usable and p is not None and p < ALPHA and (shares["overall"] or 0) > 0),
        "warnings": warnings,
        "model": chosen.spec.name,
    }
    if without_marker is not None:
        out["without_marker"] = without_marker
    return out


def _share_upper_from_negative(fit: FitResult, items: list[str], confidence: float) -> float:
    """Upper end of the method share's interval when its variance was estimated below zero:
    the Wald upper bound of the method variance over the items' mean variance."""
    se = fit.se("cov", METHOD, METHOD)
    if not np.isfinite(se):
        return 0.0
    hi = fit.est("cov", METHOD, METHOD) + stats.norm.ppf(0.5 + confidence / 2) * se
    var = np.mean([fit.implied[fit.spec.observed.index(it), fit.spec.observed.index(it)] for it in items])
    return float(min(1.0, max(0.0, hi / var)))


def plain_method_check(design: Design, fitter: Fitter) -> dict:
    """Evidence on method variance that does not rest on the marker: the equal-loading
    method factor on the substantive items alone (identified by the loading pattern only,
    so often empirically unidentified: then it is no evidence either way)."""
    spec = method_factor_model(design, use_marker=False, equal_loadings=True)
    fit = fitter(spec)
    none = fitter(without_method_factor(spec))
    test = chi2_difference(none, fit)
    items = {c.name: list(c.items) for c in design.substantive}
    # Without the marker, equal method loadings are told apart from the traits only through
    # loadings that differ within a scale: with tau-equivalent items the method variance trades
    # off exactly against the trait loadings (not identified), and its test runs liberal
    # (measured: p < .01 in 8 of 60 clean surveys with equal loadings). So the check counts only
    # where tau-equivalence is rejected.
    tau = chi2_difference(fitter(tau_equivalent_model(design.substantive)),
                          fitter(substantive_measurement_model(design.substantive)))
    distinct = tau["p"] is not None and tau["p"] < ALPHA
    ok = fit.status == "ok" and distinct
    shares = method_shares(fit, METHOD, items) if ok else None
    interval = share_interval(fit, METHOD, [it for v in items.values() for it in v],
                              fitter.opts.confidence) if ok else None
    ci = interval["ci"] if interval else None
    return {
        "status": fit.status,
        "informative": bool(ok and ci is not None),
        "method_share": shares["overall"] if shares else None,
        "method_share_ci": ci,
        "test": test,
        "tau_equivalence_test": tau,
        "loadings_differ": bool(distinct),
        # found: significant at the stricter level, and an interval that excludes trivial shares
        "found_method": bool(ok and ci and test["p"] is not None and test["p"] < ALPHA_FLEXIBLE and ci[0] >= 0.03),
        # shown absent: an interval that excludes shares worth naming
        "shows_absence": bool(ok and ci and ci[1] < 0.03),
        "note": "equal-loading method factor on the substantive items only (not identified by the marker); "
                "it counts only where the items' loadings differ within a scale (tau-equivalence rejected at "
                "p < .05), as otherwise the method variance cannot be told apart from the traits",
    }


def _p(v: float | None) -> str:
    return "n/a" if v is None else f"{v:.3f}"


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
    interval = share_interval(fit, method.name, [it for v in items.values() for it in v],
                              fitter.opts.confidence) if ok else None
    return {
        "method_construct": method.name,
        "method_share": shares["overall"],
        "method_share_ci": interval["ci"] if interval else None,
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
    vif = vif_from_corr(moments_corr(_score_sums(design, plan, names).cross), names)
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
    return out


def method_variance_verdict(design: Design, plan: MissingPlan, mv: dict) -> list:
    """The assumption checks that need only the method-variance sections, and the verdict
    weighed with them (written into ``mv["verdict"]``). Returns the assumptions."""
    from samesource.method_checks.assumptions import method_assumptions, no_shared_method

    assumptions = method_assumptions(design, plan.rows, mv)
    mv["verdict"] = verdict(mv, assumptions)
    assumptions.append(no_shared_method(mv["verdict"]))
    return assumptions
