"""How large would shared method have to be to explain a path away?

The latent path model is refitted with a method factor whose loadings are fixed so that a
given share of every item's variance is method (0 to 50%). The curve shows the path at
each assumed share; the break-even share is where the estimate reaches zero, and a second
share where its interval first covers zero. This is a sensitivity analysis in the spirit of
omitted-variable bounds: it asks "what would it take", it does not estimate the share.
"""

from __future__ import annotations

import numpy as np

from samesource.corrections.paths import wald
from samesource.engine.builders import assumed_method_model
from samesource.engine.fitting import FitResult, Moments, fit_model
from samesource.input.design import Design

SHARES = tuple(np.round(np.arange(0.0, 0.5001, 0.025), 3))

MEANING = ("Each point re-estimates the path assuming that the given share of every item's variance "
           "comes from one shared method source (same rater, same moment, same response style). "
           "Where the line crosses zero, that much shared method would explain the association away; "
           "compare it with the method share the checks estimated. Beyond the last point the model "
           "cannot hold that much method variance (an item would be left with negative error variance).")


def _crossing(xs: list[float], ys: list[float]) -> float | None:
    """First x where ys changes sign (linear interpolation), or None."""
    for i in range(1, len(xs)):
        y0, y1 = ys[i - 1], ys[i]
        if y0 == 0:
            return xs[i - 1]
        if y0 * y1 < 0:
            return float(xs[i - 1] + (xs[i] - xs[i - 1]) * y0 / (y0 - y1))
        if y1 == 0:
            return xs[i]
    return None


def sensitivity_curves(design: Design, moments: Moments, *, confidence: float = 0.95,
                       time_limit: float = 60.0, shares: tuple[float, ...] = SHARES) -> dict:
    """For every declared (outcome, predictor): the curve and its two break-even shares."""
    item_var = dict(zip(moments.names, np.diag(moments.cov), strict=True))
    keys = [(p.outcome, x) for p in design.paths for x in p.predictors]
    curves: dict[tuple[str, str], list[dict]] = {k: [] for k in keys}
    prev: FitResult | None = None
    stopped_at = None
    for s in shares:
        spec = assumed_method_model(design, item_var, float(s))
        fit = fit_model(spec, moments, time_limit=time_limit, n_starts=1 if prev else 2, start=prev)
        if fit.status != "ok":
            stopped_at = float(s)
            break
        prev = fit
        for (o, x) in keys:
            est = fit.std("reg", o, x)
            ci, _ = wald(est, fit.std_se("reg", o, x), confidence)
            curves[(o, x)].append({"method_share": float(s), "estimate": est, "ci": ci})

    out = {}
    for k, curve in curves.items():
        xs = [c["method_share"] for c in curve]
        est = [c["estimate"] for c in curve]
        sign = np.sign(est[0]) if est else 0.0
        # the interval covers zero once the bound nearer zero crosses it
        near = [(c["ci"][0] if sign > 0 else -c["ci"][1]) if c["ci"] else np.nan for c in curve]
        covers = 0.0 if near and near[0] <= 0 else _crossing(xs, near)
        out[k] = {
            "curve": curve,
            "break_even_method_share": _crossing(xs, est) if est else None,
            "ci_covers_zero_at": covers,
            "model_holds_up_to": xs[-1] if xs else None,
            "stopped_at": stopped_at,
            "meaning": MEANING,
        }
    return out
