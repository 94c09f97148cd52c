"""Comparing nested models by the chi-square difference (likelihood-ratio) test."""

from __future__ import annotations

from scipy import stats


def chi2_difference(restricted, general) -> dict:
    """Likelihood-ratio test of a restricted model against the more general one it is
    nested in (Bollen 1989, ch. 7): chi2_diff = chi2_r - chi2_g on df_r - df_g.

    Both arguments are fit results on the same data. ``p`` is None when the test is not
    defined (a fit that did not converge, or no difference in degrees of freedom)."""
    out = {"restricted": restricted.spec.name, "general": general.spec.name,
           "chi2_diff": None, "df_diff": None, "p": None}
    if not (restricted.converged and general.converged):
        out["note"] = "not tested: a model did not converge"
        return out
    d = float(restricted.chi2 - general.chi2)
    df = int(restricted.df - general.df)
    out["chi2_diff"], out["df_diff"] = d, df
    if df > 0:
        out["p"] = float(stats.chi2.sf(max(d, 0.0), df))
    return out
