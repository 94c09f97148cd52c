"""Marker-variable adjustment of correlations (Lindell & Whitney 2001).

A marker is a construct theoretically unrelated to the substantive ones; its smallest
correlation with them, r_M, estimates the shared-method part of every correlation.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

RULES = ("smallest", "second_smallest", "upper_95")


@dataclass(frozen=True)
class AdjustedCorrelation:
    r: float
    r_adjusted: float
    t: float
    p: float


def adjust_correlation(r_u: float, r_m: float, n: int) -> AdjustedCorrelation:
    """Lindell & Whitney (2001), eqs. 4-5: r_A = (r_U - r_M) / (1 - r_M) and
    t = r_A / sqrt((1 - r_A^2) / (N - 3)), two-sided p on N - 3 degrees of freedom."""
    if not -1 < r_m < 1:
        raise ValueError("r_M must lie strictly between -1 and 1")
    r_a = (r_u - r_m) / (1.0 - r_m)
    df = n - 3
    t = r_a / math.sqrt(max(1.0 - r_a * r_a, 1e-300) / df)
    p = float(2 * stats.t.sf(abs(t), df))
    return AdjustedCorrelation(r=float(r_u), r_adjusted=float(r_a), t=float(t), p=p)


def r_m_source(marker_correlations: list[float], rule: str = "smallest") -> int:
    """Which of the marker correlations a rule takes r_M from (its position in the list)."""
    if rule not in RULES:
        raise ValueError(f"unknown rule {rule!r}")
    if rule == "second_smallest" and len(marker_correlations) < 2:
        raise ValueError("the second-smallest rule needs at least two marker correlations")
    order = sorted(range(len(marker_correlations)), key=lambda i: float(marker_correlations[i]))
    return order[1] if rule == "second_smallest" else order[0]


def choose_r_m(marker_correlations: list[float], n: int, rule: str = "smallest",
               confidence: float = 0.95, *, index: int | None = None) -> float:
    """r_M by one of the rules: the smallest marker correlation (Lindell & Whitney 2001),
    the second smallest (their more conservative suggestion), or the upper bound of the
    confidence interval of the smallest (Malhotra, Kim & Patil 2006), by Fisher's z.

    A negative smallest correlation carries no evidence of shared method; r_M is floored at 0.
    ``index`` takes r_M from that correlation instead of choosing again (see
    :func:`r_m_source`): bootstrap replicates keep the full sample's choice, because the
    bootstrap of a smallest value is biased and unstable (Bickel & Freedman 1981, from
    memory) while that of one correlation is not.
    """
    if rule not in RULES:
        raise ValueError(f"unknown rule {rule!r}")
    if index is None:
        index = r_m_source(marker_correlations, rule)
    r = max(float(marker_correlations[index]), 0.0)
    if rule == "upper_95":
        z = math.atanh(r) + stats.norm.ppf(0.5 + confidence / 2) / math.sqrt(n - 3)
        r = math.tanh(z)
    return float(r)


def marker_adjustment(score_corr: np.ndarray, names: list[str], marker: str, n: int,
                      rule: str = "smallest") -> dict:
    """Adjust every pair of substantive correlations under each rule for r_M.

    ``score_corr`` is the correlation matrix of scale scores in ``names`` order.
    Returns the chosen rule's r_M and adjusted pairs, and the sensitivity under all rules.
    """
    idx = {nm: i for i, nm in enumerate(names)}
    subst = [nm for nm in names if nm != marker]
    m_corr = [score_corr[idx[marker], idx[s]] for s in subst]

    def pairs(r_m: float) -> dict[tuple[str, str], AdjustedCorrelation]:
        return {(a, b): adjust_correlation(score_corr[idx[a], idx[b]], r_m, n)
                for i, a in enumerate(subst) for b in subst[i + 1:]}

    sensitivity = []
    for rl in RULES:
        if rl == "second_smallest" and len(m_corr) < 2:
            continue
        r_m = choose_r_m(m_corr, n, rl)
        sensitivity.append({"rule": rl, "r_m": r_m, "pairs": pairs(r_m)})
    chosen = next(s for s in sensitivity if s["rule"] == rule)
    return {"r_m": chosen["r_m"], "rule": rule, "pairs": chosen["pairs"],
            "marker_correlations": dict(zip(subst, map(float, m_corr), strict=True)),
            "sensitivity": sensitivity}
