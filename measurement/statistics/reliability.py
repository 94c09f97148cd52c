"""Reliability of one construct's items: alpha, item statistics, omega, CR and AVE.

Inputs are the items of a single construct, already reverse-keyed. Functions that take item
data drop rows with any missing value (listwise) before computing. Undefined values are
returned as ``None`` (scalars) or as a documented NaN (cells of a DataFrame), never as a
silent NaN in a float.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

# Common practice, often cited to Nunnally (1978); there is no single source for it.
RELIABILITY_THRESHOLD = 0.70
# Common practice for a standardized loading to count as an adequate indicator.
LOADING_THRESHOLD = 0.50
# Fornell & Larcker (1981): the construct should explain at least half its items' variance.
AVE_THRESHOLD = 0.50


@dataclass(frozen=True)
class AlphaResult:
    """Cronbach's alpha with its Feldt confidence interval.

    ``alpha`` and ``ci`` are ``None`` when alpha is undefined; ``reason`` then says why.
    ``n`` is the number of complete rows used, ``k`` the number of items.
    """

    alpha: float | None
    ci: tuple[float, float] | None
    n: int
    k: int
    confidence: float = 0.95
    reason: str | None = None


def _complete_numeric(items: pd.DataFrame) -> np.ndarray:
    """Items as a float array after listwise deletion; rejects non-numeric columns."""
    if not isinstance(items, pd.DataFrame):
        raise TypeError("items must be a pandas DataFrame")
    bad = [c for c in items.columns if items[c].dtype.kind not in "bifu"]
    if bad:
        raise ValueError(f"item columns must be numeric: {bad}")
    return items.dropna(axis=0, how="any").to_numpy(dtype=float)


def alpha_from_cov(cov: np.ndarray) -> float | None:
    """Cronbach's (1951) alpha from an item covariance matrix (any divisor); None when the
    sum of the items has no variance."""
    k = cov.shape[0]
    total_var = cov.sum()
    # A sum score with no variance (constant items, or items that cancel out) leaves
    # alpha as 0/0 or a division by zero.
    if k < 2 or not total_var > 1e-12 * max(np.trace(cov), 1.0):
        return None
    return float(k / (k - 1) * (1.0 - np.trace(cov) / total_var))


def _alpha_checked(cov: np.ndarray | None, n: int, k: int) -> tuple[float | None, str | None]:
    if k < 2:
        return None, "alpha needs at least 2 items"
    if n < 2:
        return None, "alpha needs at least 2 complete rows"
    alpha = alpha_from_cov(cov)
    if alpha is None:
        return None, "the sum of the items has no variance"
    return alpha, None


def _complete_moments(x: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Means and covariance (divisor n - 1) of complete rows; no covariance below 2 rows."""
    n, k = x.shape
    mean = x.mean(axis=0) if n else np.full(k, np.nan)
    return mean, (np.atleast_2d(np.cov(x, rowvar=False, ddof=1)) if n >= 2 else None)


def cronbach_alpha(items: pd.DataFrame, confidence: float = 0.95) -> AlphaResult:
    """Cronbach's alpha with a Feldt confidence interval.

    alpha = k/(k-1) * (1 - sum of item variances / variance of the sum score), from the
    sample covariance matrix (divisor n-1) of the complete rows.

    The confidence interval is Feldt's: (1 - alpha) / (1 - alpha_pop) follows an F
    distribution with df1 = n-1 and df2 = (n-1)(k-1), so the bounds are
    ``1 - (1 - alpha) * F_{1-g/2}`` and ``1 - (1 - alpha) * F_{g/2}`` with g = 1 - confidence.

    Parameters
    ----------
    items : pandas.DataFrame
        One construct's items (columns), respondents in rows, reverse-keyed already. Rows
        with any missing item are dropped.
    confidence : float
        Coverage of the interval, strictly between 0 and 1.

    Returns
    -------
    AlphaResult
        ``alpha`` and ``ci`` are ``None`` (with ``reason``) when there are fewer than two
        items or two complete rows, or the sum score has no variance. Alpha can be negative;
        that is reported as is.

    References
    ----------
    Cronbach, L. J. (1951). Coefficient alpha and the internal structure of tests.
    Psychometrika, 16(3), 297-334.

    Feldt, L. S. (1965). The approximate sampling distribution of Kuder-Richardson
    reliability coefficient twenty. Psychometrika, 30(3), 357-370.

    Feldt, L. S., Woodruff, D. J., & Salih, F. A. (1987). Statistical inference for
    coefficient alpha. Applied Psychological Measurement, 11(1), 93-103.
    """
    if not 0.0 < confidence < 1.0:
        raise ValueError("confidence must be strictly between 0 and 1")
    x = _complete_numeric(items)
    n, k = x.shape
    return alpha_from_moments(np.cov(x, rowvar=False, ddof=1) if n >= 2 and k >= 2 else None, n, k, confidence)


def alpha_from_moments(cov: np.ndarray | None, n: int, k: int, confidence: float = 0.95) -> AlphaResult:
    """:func:`cronbach_alpha` from the covariance matrix (divisor n - 1) of ``n`` complete
    rows of ``k`` items, formed once elsewhere (None below two rows)."""
    if not 0.0 < confidence < 1.0:
        raise ValueError("confidence must be strictly between 0 and 1")
    alpha, reason = _alpha_checked(cov, n, k)
    if alpha is None:
        return AlphaResult(None, None, n, k, confidence, reason)
    g = 1.0 - confidence
    df1, df2 = n - 1, (n - 1) * (k - 1)
    lower = 1.0 - (1.0 - alpha) * stats.f.isf(g / 2, df1, df2)
    upper = 1.0 - (1.0 - alpha) * stats.f.isf(1.0 - g / 2, df1, df2)
    return AlphaResult(alpha, (float(lower), float(upper)), n, k, confidence, None)


def item_statistics(items: pd.DataFrame) -> pd.DataFrame:
    """Per-item mean, SD, corrected item-total correlation and alpha if the item is deleted.

    The corrected item-total (item-rest) correlation is the Pearson correlation of an item
    with the sum of the *other* items, so the item does not correlate with itself
    (Cronbach 1951 discusses item-test correlations; the corrected form removes the
    part-whole overlap).

    Parameters
    ----------
    items : pandas.DataFrame
        One construct's items, reverse-keyed already; rows with any missing item dropped.

    Returns
    -------
    pandas.DataFrame
        Index ``item`` (the column names, in order); columns ``mean``, ``sd`` (divisor n-1),
        ``item_rest_r`` and ``alpha_if_deleted``. A cell is NaN where the value is
        undefined: ``item_rest_r`` when the item or the rest sum is constant (or fewer than
        two complete rows); ``alpha_if_deleted`` when fewer than two items would remain or
        alpha of the remaining items is undefined (see :func:`cronbach_alpha`). Callers
        map these NaN to null.

    References
    ----------
    Cronbach, L. J. (1951). Coefficient alpha and the internal structure of tests.
    Psychometrika, 16(3), 297-334.
    """
    x = _complete_numeric(items)
    mean, cov = _complete_moments(x)
    return item_statistics_from_moments(list(items.columns), mean, cov, x.shape[0])


def _constant(var: float, mean: float) -> bool:
    # No variance but rounding's: a column of one value leaves at most ~(1e-16 x its mean)^2.
    return not var > 1e-13 * max(1.0, mean * mean)


def item_statistics_from_moments(names: Sequence[str], mean: np.ndarray, cov: np.ndarray | None,
                                 n: int) -> pd.DataFrame:
    """:func:`item_statistics` from the means and covariance matrix (divisor n - 1) of ``n``
    complete rows, formed once elsewhere (``cov`` None below two rows): the item-rest
    covariance is the item's row sum less its variance, the rest's variance the total's
    less twice that row sum plus the item's variance."""
    k = len(names)
    rows = []
    for j in range(k):
        r = a_del = np.nan
        sd = np.nan
        if cov is not None:
            v = float(cov[j, j])
            sd = float(np.sqrt(v)) if v >= 0 else np.nan
            row = float(cov[j].sum())
            rest_var = float(cov.sum()) - 2.0 * row + v
            rest_mean = float(mean.sum() - mean[j])
            if k >= 2 and not _constant(v, float(mean[j])) and not _constant(rest_var, rest_mean):
                r = float(np.clip((row - v) / np.sqrt(v * rest_var), -1.0, 1.0))
            if k - 1 >= 2:
                keep = np.arange(k) != j
                a, _ = _alpha_checked(cov[np.ix_(keep, keep)], n, k - 1)
                a_del = np.nan if a is None else a
        rows.append({"mean": float(mean[j]) if n else np.nan, "sd": sd, "item_rest_r": r,
                     "alpha_if_deleted": a_del})
    out = pd.DataFrame(rows, index=pd.Index(list(names), name="item"))
    return out[["mean", "sd", "item_rest_r", "alpha_if_deleted"]]


def _as_vector(values: Sequence[float] | np.ndarray | pd.Series, name: str) -> np.ndarray:
    v = np.asarray(values, dtype=float).ravel()
    if v.size == 0:
        raise ValueError(f"{name} must not be empty")
    return v


def omega_total(
    loadings: Sequence[float] | np.ndarray | pd.Series,
    error_variances: Sequence[float] | np.ndarray | pd.Series,
) -> float | None:
    """McDonald's omega total from a one-factor solution.

    omega = (sum of loadings)^2 / ((sum of loadings)^2 + sum of error variances), with the
    factor variance fixed at 1. Loadings and error variances may be unstandardized or
    standardized; the caller passes both on the same metric.

    A one-factor model is identified on its own only with at least 3 items (with 2 items
    the loadings are not separately identified), so the solution this formula takes should
    come from a fit of 3 or more items, or from a larger measurement model.

    Parameters
    ----------
    loadings : sequence of float
        Factor loadings, factor variance 1.
    error_variances : sequence of float
        Unique (error) variances of the same items, in the same order.

    Returns
    -------
    float or None
        ``None`` when any input is missing (NaN) or the denominator is not positive.
        Negative error variances (Heywood cases) are used as given; the fitting code
        reports them.

    References
    ----------
    McDonald, R. P. (1999). Test theory: A unified treatment. Mahwah, NJ: Erlbaum.
    """
    lam = _as_vector(loadings, "loadings")
    theta = _as_vector(error_variances, "error_variances")
    if lam.shape != theta.shape:
        raise ValueError("loadings and error_variances must have the same length")
    if not (np.all(np.isfinite(lam)) and np.all(np.isfinite(theta))):
        return None
    common = lam.sum() ** 2
    denom = common + theta.sum()
    if not denom > 0:
        return None
    return float(common / denom)


def _std_loadings(std_loadings: Sequence[float] | np.ndarray | pd.Series) -> np.ndarray | None:
    lam = _as_vector(std_loadings, "std_loadings")
    # NaN, or a standardized loading above 1 in absolute value (a Heywood case: the
    # implied error variance 1 - lambda^2 is negative), leaves CR and AVE undefined.
    if not np.all(np.isfinite(lam)) or np.any(np.abs(lam) > 1.0):
        return None
    return lam


def composite_reliability(std_loadings: Sequence[float] | np.ndarray | pd.Series) -> float | None:
    """Composite (construct) reliability from standardized loadings.

    CR = (sum of lambda)^2 / ((sum of lambda)^2 + sum of (1 - lambda^2)): omega's formula
    with each error variance implied by a standardized loading.

    Parameters
    ----------
    std_loadings : sequence of float
        Standardized loadings of one construct's items, typically from the full
        measurement model.

    Returns
    -------
    float or None
        ``None`` when a loading is missing or exceeds 1 in absolute value (a Heywood case).

    References
    ----------
    Jöreskog, K. G. (1971). Statistical analysis of sets of congeneric tests.
    Psychometrika, 36(2), 109-133.

    Fornell, C., & Larcker, D. F. (1981). Evaluating structural equation models with
    unobservable variables and measurement error. Journal of Marketing Research, 18(1),
    39-50.
    """
    lam = _std_loadings(std_loadings)
    if lam is None:
        return None
    return omega_total(lam, 1.0 - lam**2)


def average_variance_extracted(
    std_loadings: Sequence[float] | np.ndarray | pd.Series,
) -> float | None:
    """Average variance extracted: the mean squared standardized loading.

    Parameters
    ----------
    std_loadings : sequence of float
        Standardized loadings of one construct's items.

    Returns
    -------
    float or None
        ``None`` when a loading is missing or exceeds 1 in absolute value (a Heywood case).

    References
    ----------
    Fornell, C., & Larcker, D. F. (1981). Evaluating structural equation models with
    unobservable variables and measurement error. Journal of Marketing Research, 18(1),
    39-50.
    """
    lam = _std_loadings(std_loadings)
    if lam is None:
        return None
    return float(np.mean(lam**2))
