"""Planning advice for the next survey: the smallest sample, and the kind of marker or measured
method scale, that would let it test for shared method variance with 80% power.

The power of a likelihood-ratio test from its noncentrality (Satorra & Saris 1985): the
model without the method is fitted to the population's covariance matrix, and n times its
minimum discrepancy above the model with the method, F0, is the noncentrality of the test's
chi-square at sample size n; the power is P(chi2(df, n F0) > the test's critical value).
MacCallum, Browne & Sugawara (1996) use the same relation for the power of fit tests.

The population is the correction check's (measurement/corrections/correction_check.py): the main file's
items, loadings and trait correlations as fitted, with the estimated method share, or
PLANNED_SHARE where the survey found less (the smallest share worth detecting; our rule).
Each kind of design adds to it what the next survey would carry: a marker that shares the
method (three items loading .70 on a trait of their own, unrelated to the others), or a
measured method scale (four items loading .65 on the method itself). The calculation treats
the answers as continuous and normal; the correction check measures what the categories do.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy import optimize, stats

from samesource.corrections.correction_check import Population, with_method_shares
from samesource.engine.builders import (
    measured_method_model,
    method_factor_model,
    without_method_factor,
)
from samesource.engine.fitting import Moments, fit_model
from samesource.engine.modelspec import ModelSpec
from samesource.input.design import MAIN, Construct, Design
from samesource.input.missing import MissingPlan
from samesource.method_checks.method_variance import ALPHA
from samesource.options import AnalysisOptions

POWER = 0.80
PLANNED_SHARE = 0.05
MARKER = ("planned_marker", 3, 0.70)        # name, items, trait loading: our choice, a typical short scale
METHOD_SCALE = ("planned_method_scale", 4, 0.65)  # the bundled impression scale's loadings are .60-.70
N_MAX = 100_000
REFERENCE_N = 1000  # the sample size the population moments are fitted at (F0 does not depend on it)


def power_at(n: float, f0: float, df: int, alpha: float = ALPHA) -> float:
    """Power of a chi-square difference test with ``df`` degrees of freedom at sample size n."""
    if f0 <= 0 or df < 1:
        return alpha
    crit = stats.chi2.ppf(1 - alpha, df)
    return float(stats.ncx2.sf(crit, df, n * f0))


def smallest_n(f0: float, df: int, power: float = POWER, alpha: float = ALPHA) -> int | None:
    """The smallest sample with at least ``power``; None above N_MAX."""
    if power_at(N_MAX, f0, df, alpha) < power:
        return None
    lo = 2.0
    if power_at(lo, f0, df, alpha) >= power:
        return int(lo)
    root = optimize.brentq(lambda n: power_at(n, f0, df, alpha) - power, lo, N_MAX, xtol=0.5)
    return int(np.ceil(root))


def next_time_section(design: Design, population: Population | None, plan: MissingPlan,
                      opts: AnalysisOptions) -> dict:
    """report["next_time"]: the planning advice (see the module)."""
    if population is None:
        return {"status": "not_run", "why_not": "the correction check had no population to plan from"}
    main = design.main_part()
    keep = [i for i, s in enumerate(population.item_source) if s == MAIN]
    pop = _subset(population, keep)
    found = pop.main_share()
    share = max(found, PLANNED_SHARE)
    shared = [i for i, t in enumerate(pop.trait_of) if t >= 0]
    pop = with_method_shares(pop, {i: share for i in shared})
    n_now = plan.rows_analyzed
    options = []
    current = _current_test(main, pop, opts)
    if current is not None:
        options.append(current)
    if main.marker is None:
        options.append(_with_marker(main, pop, opts))
    if main.method is None:
        options.append(_with_method_scale(main, pop, opts))
    for o in options:
        o["power_now"] = power_at(n_now, o["f0"], o["df"]) if o["f0"] is not None else None
        o["smallest_n"] = smallest_n(o["f0"], o["df"]) if o["f0"] is not None else None
    usable = [o for o in options if o["smallest_n"] is not None]
    best = min(usable, key=lambda o: (o["smallest_n"], o["kind"] != "measured_method_scale"), default=None)
    basis = (f"the method share this survey estimated ({found:.0%})" if found >= PLANNED_SHARE else
             f"a share of {PLANNED_SHARE:.0%} (this survey found {found:.0%}; a smaller share is hardly worth "
             "correcting)")
    advice = []
    if best is not None:
        advice.append(f"To test for a shared answering style with {POWER:.0%} power at {basis}, the next survey needs "
                      f"at least {best['smallest_n']:,} complete answers with {best['what']}.")
    for o in options:
        if o is best:
            continue
        if o["smallest_n"] is None:
            advice.append(f"With {o['what']}, no sample up to {N_MAX:,} reaches {POWER:.0%} power.")
        else:
            advice.append(f"With {o['what']}: at least {o['smallest_n']:,} (power now, at {n_now:,} rows: "
                          f"{o['power_now']:.0%}).")
    advice.append("A marker helps only if it shares the answering style; one that does not hides the method and "
                  "cannot vouch for its absence, so a measured method scale (or a second source, such as manager "
                  "ratings) is the safer choice.")
    return {
        "status": "ok",
        "power": POWER, "alpha": ALPHA, "planned_share": share, "estimated_share": found, "basis": basis,
        "rows_now": n_now,
        "options": [{k: v for k, v in o.items()} for o in options],
        "recommended": best["kind"] if best else None,
        "advice": advice,
        "method": "noncentrality of the likelihood-ratio test of the method (Satorra & Saris 1985), from the "
                  "population of the correction check, answers treated as continuous",
    }


def _subset(pop: Population, keep: list[int]) -> Population:
    return dataclasses.replace(
        pop, items=tuple(pop.items[i] for i in keep), item_source=tuple(pop.item_source[i] for i in keep),
        trait_of=tuple(pop.trait_of[i] for i in keep), loadings=pop.loadings[keep], method=pop.method[keep],
        answers=tuple(pop.answers[i] for i in keep), raw_scale=tuple(pop.raw_scale[i] for i in keep),
        reverse=tuple(pop.reverse[i] for i in keep), missing=pop.missing[:, keep])


def _extended(pop: Population, name: str, k: int, loading: float, *, own_trait: bool) -> Population:
    """The population with a planned scale added: its own unrelated trait (a marker) carrying the
    method like the other items, or items of the method alone (a method scale)."""
    items = pop.items + tuple(f"{name}{i}" for i in range(1, k + 1))
    t = len(pop.traits)
    if own_trait:
        traits = pop.traits + (name,)
        corr = np.eye(t + 1)
        corr[:t, :t] = pop.trait_corr
        share = pop.main_share()
        new_lam = [loading * np.sqrt(1 - share)] * k
        new_m = [np.sqrt(share)] * k
        trait_of = pop.trait_of + (t,) * k
        method_trait = np.append(pop.method_trait, 0.0)
    else:
        traits, corr, method_trait = pop.traits, pop.trait_corr, pop.method_trait
        new_lam, new_m = [0.0] * k, [loading] * k
        trait_of = pop.trait_of + (-1,) * k
    return dataclasses.replace(pop, items=items, item_source=pop.item_source + (MAIN,) * k, traits=traits,
                               trait_of=trait_of, trait_corr=corr, loadings=np.append(pop.loadings, new_lam),
                               method=np.append(pop.method, new_m), method_trait=method_trait)


def _moments(pop: Population) -> Moments:
    return Moments(names=pop.items, cov=pop.implied_corr(), n=REFERENCE_N)


def _f0(full: ModelSpec, restricted: ModelSpec, moments: Moments, opts: AnalysisOptions) -> float | None:
    g = fit_model(full, moments, time_limit=opts.fit_time_limit, n_starts=2, seed=opts.seed, compute_se=False)
    r = fit_model(restricted, moments, time_limit=opts.fit_time_limit, n_starts=2, seed=opts.seed,
                  compute_se=False)
    if not (g.converged and r.converged):
        return None
    return max(float(r.fmin - g.fmin), 0.0)


def _marker_test(design: Design, moments: Moments, opts: AnalysisOptions, plain: bool = False) -> float | None:
    spec = method_factor_model(design, use_marker=not plain, equal_loadings=True)
    return _f0(spec, without_method_factor(spec), moments, opts)


def _measured_test(design: Design, moments: Moments, opts: AnalysisOptions) -> tuple[float | None, int]:
    spec = measured_method_model(design)
    method = design.method
    base = [p for p in spec.params if not (p.op == "load" and p.lhs == method.name and p.rhs not in method.items)]
    without = spec.with_params(base, name=spec.name + ":without", description="no method loadings")
    return _f0(spec, without, moments, opts), len(spec.params) - len(base)


def _current_test(design: Design, pop: Population, opts: AnalysisOptions) -> dict | None:
    m = _moments(pop)
    if design.marker is not None:
        return {"kind": "current_marker", "what": f"the marker '{design.marker.name}' as in this survey (if it "
                "shares the answering style as much as the other scales)", "df": 1, "f0": _marker_test(design, m, opts)}
    if design.method is not None:
        f0, df = _measured_test(design, m, opts)
        return {"kind": "current_method_scale", "what": f"the method scale '{design.method.name}' as in this survey",
                "df": df, "f0": f0}
    return {"kind": "no_marker", "what": "no marker and no method scale (the method factor identified by the "
            "loading pattern alone, which often cannot tell method from traits)", "df": 1,
            "f0": _marker_test(design, m, opts, plain=True)}


def _with_marker(design: Design, pop: Population, opts: AnalysisOptions) -> dict:
    name, k, loading = MARKER
    ext = _extended(pop, name, k, loading, own_trait=True)
    d = _design_with(design, Construct(name=name, items=ext.items[-k:], role="marker"))
    return {"kind": "marker", "what": f"a marker of {k} items that shares the answering style (a topic unrelated "
            "to work, answered in the same way)", "df": 1, "f0": _marker_test(d, _moments(ext), opts)}


def _with_method_scale(design: Design, pop: Population, opts: AnalysisOptions) -> dict:
    name, k, loading = METHOD_SCALE
    ext = _extended(pop, name, k, loading, own_trait=False)
    d = _design_with(design, Construct(name=name, items=ext.items[-k:], role="method"))
    f0, df = _measured_test(d, _moments(ext), opts)
    return {"kind": "measured_method_scale", "what": f"a measured method scale of {k} items (a short social-"
            "desirability or impression-management scale, say)", "df": df, "f0": f0}


def _design_with(design: Design, extra: Construct) -> Design:
    return dataclasses.replace(design, constructs={**design.constructs, extra.name: extra})


__all__ = ["next_time_section", "power_at", "smallest_n", "POWER", "PLANNED_SHARE"]
