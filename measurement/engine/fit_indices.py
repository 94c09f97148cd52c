"""Global fit indices of a covariance-structure model.

Pure functions of the chi-square statistics, sample size and the sample and model-implied
covariance matrices; :mod:`samesource.engine.fitting` calls them once a model is fitted.
Undefined values (for example TLI of a saturated model) are ``None``, never NaN, so a
report can print them as they are.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special, stats


def chi2_pvalue(chi2: float, df: int) -> float | None:
    """Upper-tail p-value of the likelihood-ratio chi-square; ``None`` when df <= 0."""
    if df <= 0:
        return None
    return float(stats.chi2.sf(max(chi2, 0.0), df))


def cfi(chi2: float, df: int, base_chi2: float, base_df: int) -> float | None:
    """Comparative fit index (Bentler 1990).

    ``1 - max(chi2 - df, 0) / max(chi2 - df, base_chi2 - base_df, 0)``; 1 when both
    noncentralities are zero (a model and baseline that both fit perfectly).
    """
    if df < 0 or base_df <= 0:
        return None
    d_model = max(chi2 - df, 0.0)
    d_base = max(chi2 - df, base_chi2 - base_df, 0.0)
    if d_base <= 0.0:
        return 1.0
    return float(1.0 - d_model / d_base)


def tli(chi2: float, df: int, base_chi2: float, base_df: int) -> float | None:
    """Tucker-Lewis index (Tucker & Lewis 1973), the non-normed fit index.

    ``(base_chi2/base_df - chi2/df) / (base_chi2/base_df - 1)``. Undefined (``None``) for a
    saturated model (df = 0) or a baseline whose chi2/df is 1.
    """
    if df <= 0 or base_df <= 0:
        return None
    rb = base_chi2 / base_df
    if abs(rb - 1.0) < 1e-12:
        return None
    return float((rb - chi2 / df) / (rb - 1.0))


def rmsea(chi2: float, df: int, n: int) -> float | None:
    """Root mean square error of approximation (Steiger & Lind 1980; Browne & Cudeck 1993).

    ``sqrt(max(chi2 - df, 0) / (df (N - 1)))``; 0 for a saturated model, ``None`` if df < 0.
    """
    if df < 0 or n <= 1:
        return None
    if df == 0:
        return 0.0
    return float(math.sqrt(max(chi2 - df, 0.0) / (df * (n - 1))))


def _ncp_for_cdf(chi2: float, df: int, target: float) -> float:
    """The noncentrality lambda with ``ncx2.cdf(chi2, df, lambda) = target`` (0 if none).

    The cdf falls as lambda grows, so a root exists only when the central cdf is above target.
    """
    # scipy.special's chdtr and chndtr are what stats.chi2.cdf and stats.ncx2.cdf evaluate
    # (lambda > 0 here), called without the distribution machinery: the same numbers, and the
    # interval no longer a quarter of every bootstrap replicate's time.
    if special.chdtr(df, chi2) <= target:
        return 0.0

    def h(lam: float) -> float:
        return float(special.chndtr(chi2, df, lam)) - target

    hi = max(chi2, 1.0)
    while h(hi) > 0.0:
        hi *= 2.0
        if hi > 1e9:  # pragma: no cover - chi2 values this large do not occur
            return hi
    return float(optimize.brentq(h, 1e-12, hi, xtol=1e-10, rtol=1e-12))


def rmsea_ci(chi2: float, df: int, n: int, level: float = 0.90) -> list[float] | None:
    """Confidence interval of the RMSEA by inverting the noncentral chi-square
    (Browne & Cudeck 1993).

    For a 90% interval the lower noncentrality solves ``ncx2.cdf(chi2, df, lam) = .95`` and
    the upper one ``= .05`` (0 when not attainable); each bound is ``sqrt(lam/(df (N-1)))``.
    """
    if df < 0 or n <= 1:
        return None
    if df == 0:
        return [0.0, 0.0]
    tail = (1.0 - level) / 2.0
    lo = _ncp_for_cdf(chi2, df, 1.0 - tail)
    hi = _ncp_for_cdf(chi2, df, tail)
    scale = df * (n - 1)
    return [float(math.sqrt(lo / scale)), float(math.sqrt(hi / scale))]


def srmr(sample_cov: np.ndarray, implied_cov: np.ndarray) -> float:
    """Standardized root mean square residual: root mean square of the residual
    correlations, lower triangle including the diagonal (Bollen 1989; Hu & Bentler 1999).

    Each residual is the sample correlation minus the model-implied correlation,
    ``s_ij/sqrt(s_ii s_jj) - sigma_ij/sqrt(sigma_ii sigma_jj)``, so the diagonal terms are 0.
    On the three-factor Holzinger & Swineford model it gives .0652, the published .065.
    The other common definition, residual covariances divided by the sample sds
    (:func:`srmr_by_sample_sd`), gives the same value there, because at the ML solution of a
    scale-invariant model the implied variances equal the sample variances; the two differ
    when a model constrains variances (fixed error variances, equality labels across
    items). We report the residual-correlation form: it compares correlations with
    correlations whatever the implied variances are.
    """
    s = np.asarray(sample_cov, dtype=float)
    m = np.asarray(implied_cov, dtype=float)
    ds = np.sqrt(np.diag(s))
    dm = np.sqrt(np.abs(np.diag(m)))
    with np.errstate(divide="ignore", invalid="ignore"):
        r = s / np.outer(ds, ds) - m / np.outer(dm, dm)
    il = np.tril_indices(s.shape[0])
    return float(np.sqrt(np.mean(r[il] ** 2)))


def srmr_by_sample_sd(sample_cov: np.ndarray, implied_cov: np.ndarray) -> float:
    """SRMR variant with residual covariances divided by the sample sds
    (``(s_ij - sigma_ij)/sqrt(s_ii s_jj)``), lower triangle including the diagonal."""
    s = np.asarray(sample_cov, dtype=float)
    m = np.asarray(implied_cov, dtype=float)
    ds = np.sqrt(np.diag(s))
    r = (s - m) / np.outer(ds, ds)
    il = np.tril_indices(s.shape[0])
    return float(np.sqrt(np.mean(r[il] ** 2)))
