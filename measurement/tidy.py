"""One function per published statistic, for direct use: item answers in, a tidy DataFrame out.

Each function takes the answers as a DataFrame (one row per respondent, one numeric column
per item, reverse-keyed items already recoded as min + max - x) and the constructs as a
mapping NAME -> item columns, and returns one row per construct, item, pair or factor.
Rows with a missing answer are left out per construct (per pair for HTMT, whose item
correlations are pairwise-complete). :func:`samesource.analyze` computes the same numbers
from a design, with missing codes, reverse keys and screening applied first; these are for a
table of one statistic, or for data prepared elsewhere.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from samesource.engine.builders import single_factor_model
from samesource.engine.fitting import Moments, fit_model
from samesource.errors import DataError
from samesource.input.design import MIN_ITEMS_OMEGA, Construct
from samesource.method_checks.collinearity import full_collinearity_vif
from samesource.method_checks.harman import harman_efa
from samesource.method_checks.marker import RULES, marker_adjustment
from samesource.statistics import reliability, validity

Constructs = Mapping[str, Sequence[str]]


def _items(data: pd.DataFrame, constructs: Constructs) -> pd.DataFrame:
    """The item columns the constructs name, as floats; a clear error for what is missing."""
    if not isinstance(data, pd.DataFrame):
        raise DataError(f"data must be a pandas DataFrame, not {type(data).__name__}", field="data")
    items = [it for its in constructs.values() for it in its]
    missing = [it for it in items if it not in data.columns]
    if missing:
        raise DataError(f"no column named {', '.join(map(repr, missing))} in the data",
                        field="constructs")
    out = {}
    for it in dict.fromkeys(items):
        col = pd.to_numeric(data[it], errors="coerce")
        bad = col.isna() & data[it].notna()
        if bad.any():
            row = bad.to_numpy().argmax()
            raise DataError(f"item column {it!r} must hold numbers: {data[it].iloc[row]!r} at row "
                            f"{row + 1} (index {data.index[row]!r}) is not one; recode or blank it",
                            field="data")
        out[it] = col.astype(float)
    return pd.DataFrame(out, index=data.index)


def alpha(data: pd.DataFrame, constructs: Constructs, confidence: float = 0.95) -> pd.DataFrame:
    """Cronbach's alpha of each construct with its Feldt confidence interval.

    Cronbach, L. J. (1951). Coefficient alpha and the internal structure of tests.
    Psychometrika, 16, 297-334. Feldt, L. S. (1965). The approximate sampling distribution of
    Kuder-Richardson reliability coefficient twenty. Psychometrika, 30, 357-370.

    Columns: construct, items, n (complete rows), alpha, ci_low, ci_high.

    >>> samesource.alpha(df, {"support": ["sup1", "sup2", "sup3", "sup4r"]})  # doctest: +SKIP
    """
    x = _items(data, constructs)
    rows = []
    for name, its in constructs.items():
        a = reliability.cronbach_alpha(x[list(its)].dropna(), confidence=confidence)
        lo, hi = a.ci if a.ci is not None else (None, None)
        rows.append({"construct": name, "items": len(its), "n": int(a.n), "alpha": a.alpha,
                     "ci_low": lo, "ci_high": hi})
    return pd.DataFrame(rows)


def item_stats(data: pd.DataFrame, constructs: Constructs) -> pd.DataFrame:
    """Each item's mean, SD, corrected item-total (item-rest) correlation and alpha if deleted.

    Nunnally, J. C., & Bernstein, I. H. (1994). Psychometric theory (3rd ed.), ch. 7.

    Columns: construct, item, mean, sd, item_rest_r, alpha_if_deleted.

    >>> samesource.item_stats(df, {"support": ["sup1", "sup2", "sup3", "sup4r"]})  # doctest: +SKIP
    """
    x = _items(data, constructs)
    frames = []
    for name, its in constructs.items():
        t = reliability.item_statistics(x[list(its)].dropna()).reset_index()
        frames.append(t.assign(construct=name)[["construct", "item", "mean", "sd", "item_rest_r",
                                                 "alpha_if_deleted"]])
    return pd.concat(frames, ignore_index=True)


def omega(data: pd.DataFrame, constructs: Constructs, *, fit_time_limit: float = 60.0) -> pd.DataFrame:
    """McDonald's omega total of each construct, from a one-factor model fitted by maximum
    likelihood to its complete rows (at least 3 items; fewer give None with a note).

    McDonald, R. P. (1999). Test theory: A unified treatment. Mahwah, NJ: Erlbaum.

    Columns: construct, items, n, omega, status (the fit's: "ok", or why there is no omega).

    >>> samesource.omega(df, {"engagement": ["eng1", "eng2", "eng3", "eng4", "eng5"]})  # doctest: +SKIP
    """
    x = _items(data, constructs)
    rows = []
    for name, its in constructs.items():
        complete = x[list(its)].dropna()
        row = {"construct": name, "items": len(its), "n": len(complete), "omega": None}
        if len(its) < MIN_ITEMS_OMEGA:
            rows.append({**row, "status": f"needs {MIN_ITEMS_OMEGA} items"})
            continue
        fit = fit_model(single_factor_model(Construct(name=name, items=tuple(its))),
                        Moments.from_data(complete), time_limit=fit_time_limit)
        if fit.status == "ok":
            row["omega"] = reliability.omega_total([fit.est("load", name, it) for it in its],
                                                   [fit.est("cov", it, it) for it in its])
        rows.append({**row, "status": fit.status})
    return pd.DataFrame(rows)


def htmt(data: pd.DataFrame, constructs: Constructs) -> pd.DataFrame:
    """The heterotrait-monotrait ratio of every pair of constructs, and its geometric-mean
    form HTMT2 (pairwise-complete item correlations).

    Henseler, J., Ringle, C. M., & Sarstedt, M. (2015). A new criterion for assessing
    discriminant validity in variance-based structural equation modeling. Journal of the
    Academy of Marketing Science, 43, 115-135. Roemer, E., Schuberth, F., & Henseler, J.
    (2021). HTMT2. Industrial Management & Data Systems, 121, 2637-2650.

    Columns: construct_a, construct_b (in the order given), htmt, htmt2.

    >>> samesource.htmt(df, {"support": [...], "engagement": [...]})  # doctest: +SKIP
    """
    x = _items(data, constructs)
    blocks = {n: list(its) for n, its in constructs.items()}
    corr = x.corr()
    h, h2 = validity.htmt(corr, blocks), validity.htmt2(corr, blocks)
    return pd.DataFrame([{"construct_a": a, "construct_b": b, "htmt": v, "htmt2": h2.get((a, b))}
                         for (a, b), v in h.items()],
                        columns=["construct_a", "construct_b", "htmt", "htmt2"])


def harman(data: pd.DataFrame, constructs: Constructs) -> pd.DataFrame:
    """Harman's single-factor test, exploratory form: the unrotated principal components of
    every item's correlations (complete rows), each component's eigenvalue and share of the
    total variance. Common practice reads a first share above 0.5, or a single eigenvalue
    above 1, as a sign of common-method variance; the test is weak (Podsakoff et al. 2003).

    Harman, H. H. (1976). Modern factor analysis (3rd ed.). University of Chicago Press.
    Podsakoff, P. M., MacKenzie, S. B., Lee, J.-Y., & Podsakoff, N. P. (2003). Common method
    biases in behavioral research. Journal of Applied Psychology, 88, 879-903.

    Columns: factor (1, 2, ...), eigenvalue, share, cumulative_share.

    >>> samesource.harman(df, constructs).head(3)  # doctest: +SKIP
    """
    x = _items(data, constructs)
    ev = np.asarray(harman_efa(x).eigenvalues, dtype=float)
    share = ev / ev.size
    return pd.DataFrame({"factor": np.arange(1, ev.size + 1), "eigenvalue": ev, "share": share,
                         "cumulative_share": np.cumsum(share)})


def _scores(x: pd.DataFrame, constructs: Constructs) -> pd.DataFrame:
    """Scale scores (item means) on the rows complete on every item."""
    x = x.dropna()
    return pd.DataFrame({n: x[list(its)].mean(axis=1) for n, its in constructs.items()})


def marker_adjusted(data: pd.DataFrame, constructs: Constructs, marker: str,
                    rule: str = "smallest") -> pd.DataFrame:
    """Correlations of the substantive scale scores adjusted for a marker (a construct
    theoretically unrelated to them) under each rule for r_M: r_A = (r - r_M) / (1 - r_M),
    t on N - 3 degrees of freedom (eqs. 4-5). ``rule`` marks the row set the analysis uses.

    Lindell, M. K., & Whitney, D. J. (2001). Accounting for common method variance in
    cross-sectional research designs. Journal of Applied Psychology, 86, 114-121.

    Columns: rule, chosen, r_m, construct_a, construct_b, r, r_adjusted, t, p.

    >>> samesource.marker_adjusted(df, constructs, marker="weather")  # doctest: +SKIP
    """
    if marker not in constructs:
        raise DataError(f"the marker {marker!r} is not one of the constructs given", field="marker")
    if rule not in RULES:
        raise DataError(f"unknown rule {rule!r} (rules: {', '.join(RULES)})", field="rule")
    scores = _scores(_items(data, constructs), constructs)
    names = list(scores.columns)
    res = marker_adjustment(np.corrcoef(scores.to_numpy(), rowvar=False), names, marker,
                            len(scores), rule)
    return pd.DataFrame([{"rule": s["rule"], "chosen": s["rule"] == rule, "r_m": s["r_m"],
                          "construct_a": a, "construct_b": b, "r": v.r, "r_adjusted": v.r_adjusted,
                          "t": v.t, "p": v.p}
                         for s in res["sensitivity"] for (a, b), v in s["pairs"].items()])


def vif(data: pd.DataFrame, constructs: Constructs) -> pd.DataFrame:
    """Full collinearity VIF of each scale score on all the others (complete rows). Common
    practice (Kock 2015) reads a VIF above 3.3 as a sign of common-method variance.

    Kock, N. (2015). Common method bias in PLS-SEM: A full collinearity assessment approach.
    International Journal of e-Collaboration, 11(4), 1-10.

    Columns: construct, vif.

    >>> samesource.vif(df, constructs)  # doctest: +SKIP
    """
    values = full_collinearity_vif(_scores(_items(data, constructs), constructs))
    return pd.DataFrame({"construct": list(values), "vif": list(values.values())})


__all__ = ["alpha", "item_stats", "omega", "htmt", "harman", "marker_adjusted", "vif"]
