"""Team-nested surveys: agreement, within- and between-team paths, and a split-team
cross-source estimate that individual-level common-method variance cannot produce.

No group's numbers are ever returned for a group smaller than the minimum size; pooled
statistics (ICCs, medians, team-level regressions) use every group.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from samesource.corrections.paths import disattenuate, standardized_coefficients

# --- Agreement and reliability of team means ---------------------------------------------

@dataclass(frozen=True)
class ICCResult:
    icc1: float | None
    icc2: float | None
    msb: float
    msw: float
    n_groups: int
    n0: float  # the ANOVA's average group size for unequal groups


def group_index(groups: np.ndarray) -> tuple[int, np.ndarray]:
    """(number of distinct groups, each row's group number 0.. in sorted order of the groups):
    what ``np.unique(groups, return_inverse=True)`` gives, without sorting the rows when the
    groups are already non-negative integer codes (the teams stage's are: one count per code)."""
    g = np.asarray(groups)
    if g.dtype.kind in "iu" and (len(g) == 0 or g.min() >= 0):
        present = np.bincount(g) > 0
        return int(present.sum()), (np.cumsum(present) - 1)[g]
    codes, inv = np.unique(g, return_inverse=True)
    return len(codes), inv


def icc_oneway(values: np.ndarray, groups: np.ndarray) -> ICCResult:
    """ICC(1) and ICC(2) from a one-way random-effects ANOVA (Bliese 2000; Shrout & Fleiss
    1979). With unequal group sizes the group size in ICC(1) is the ANOVA's
    n0 = (N - sum n_j^2 / N) / (J - 1).

    ICC(1) = (MSB - MSW) / (MSB + (n0 - 1) MSW): the share of variance between groups.
    ICC(2) = (MSB - MSW) / MSB: the reliability of the group means.
    """
    v = np.asarray(values, dtype=float)
    g = np.asarray(groups)
    ok = ~np.isnan(v)
    v, g = v[ok], g[ok]
    J, inv = group_index(g)
    N = len(v)
    n_j = np.bincount(inv)
    means = np.bincount(inv, weights=v) / n_j
    grand = v.mean()
    if J < 2 or N - J < 1:
        return ICCResult(None, None, float("nan"), float("nan"), J, float("nan"))
    msb = float(np.sum(n_j * (means - grand) ** 2) / (J - 1))
    msw = float(np.sum((v - means[inv]) ** 2) / (N - J))
    n0 = float((N - np.sum(n_j ** 2) / N) / (J - 1))
    denom1 = msb + (n0 - 1) * msw
    icc1 = (msb - msw) / denom1 if denom1 > 0 else None
    icc2 = (msb - msw) / msb if msb > 0 else None
    return ICCResult(icc1, icc2, msb, msw, J, n0)


def spearman_brown(icc1: float, n: float) -> float:
    """Reliability of a mean of n raters from ICC(1) (Spearman-Brown; Bliese 2000, eq. 5)."""
    return n * icc1 / (1 + (n - 1) * icc1)


def rwg_j(items: np.ndarray, n_options: int) -> float | None:
    """Within-group agreement on a J-item scale against a uniform null (James, Demaree &
    Wolf 1984): rwg(J) = J(1 - s2/e) / (J(1 - s2/e) + s2/e), with s2 the mean of the item
    variances within the group and e = (A^2 - 1)/12 the variance of a uniform null over A
    options. Values below 0 (more disagreement than the null) are set to 0, as LeBreton &
    Senter (2008) recommend. None for fewer than 2 respondents."""
    x = np.asarray(items, dtype=float)
    x = x[~np.isnan(x).any(axis=1)]
    if x.shape[0] < 2:
        return None
    return rwg_from_variance(float(np.mean(np.var(x, axis=0, ddof=1))), x.shape[1], n_options)


def rwg_from_variance(s2: float, J: int, n_options: int) -> float:
    """:func:`rwg_j` from s2, the mean item variance (divisor n - 1) of a group's complete rows."""
    e = (n_options ** 2 - 1) / 12.0
    q = s2 / e
    if q >= 1:
        return 0.0
    return float(J * (1 - q) / (J * (1 - q) + q))


def group_item_variances(rows, items: list[str], codes: np.ndarray, n_groups: int) -> tuple[np.ndarray, np.ndarray]:
    """Per group (``codes``: each row's group number, -1 for none): the count of rows complete
    on ``items`` and the mean over the items of their variance (divisor n - 1) on those rows,
    summed a block of rows at a time (``rows``: ItemRows), each group's answers shifted by the
    item's overall first-block mean so that no digits are lost to a large mean."""
    k = len(items)
    n = np.zeros(n_groups)
    s = np.zeros((n_groups, k))
    ss = np.zeros((n_groups, k))
    shift = None
    for start, X in rows.blocks(items):
        g = codes[start:start + len(X)]
        ok = (g >= 0) & ~np.isnan(X).any(axis=1)
        X, g = X[ok], g[ok]
        if not len(g):
            continue
        if shift is None:
            shift = X.mean(axis=0)
        D = X - shift
        n += np.bincount(g, minlength=n_groups)
        for j in range(k):
            s[:, j] += np.bincount(g, weights=D[:, j], minlength=n_groups)
            ss[:, j] += np.bincount(g, weights=D[:, j] * D[:, j], minlength=n_groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = (ss - s * s / n[:, None]) / (n[:, None] - 1)
    return n, var.mean(axis=1)


# --- Within and between ------------------------------------------------------------------

def _ols(y: np.ndarray, X: np.ndarray, clusters: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """OLS coefficients and their covariance: classical, or cluster-robust (CR1: Liang & Zeger
    1986, with the small-sample factor G/(G-1) (N-1)/(N-K) that statsmodels also uses)."""
    XtX_inv = np.linalg.pinv(X.T @ X)
    b = XtX_inv @ X.T @ y
    e = y - X @ b
    n, k = X.shape
    if clusters is None:
        return b, XtX_inv * float(e @ e) / (n - k)
    G, inv = group_index(clusters)
    scores = np.column_stack([np.bincount(inv, weights=X[:, j] * e, minlength=G) for j in range(k)])
    meat = scores.T @ scores
    c = G / (G - 1) * (n - 1) / (n - k)
    return b, c * XtX_inv @ meat @ XtX_inv


def within_between(y: np.ndarray, X: np.ndarray, groups: np.ndarray) -> dict | None:
    """Within- and between-team coefficients of y on the columns of X by group-mean centring,
    and the test of whether they differ (Mundlak 1978): regress y on X and the team means of
    X; the coefficients of the means are between minus within, tested with cluster-robust
    standard errors. When they differ, the predictors correlate with team effects, and a
    random-effects estimate that pools the two is biased. None with fewer than k + 3 teams of
    two or more members."""
    g = np.asarray(groups)
    _, inv = group_index(g)
    n_j = np.bincount(inv)

    def gmean(a: np.ndarray) -> np.ndarray:
        return np.stack([np.bincount(inv, weights=a[:, j]) / n_j for j in range(a.shape[1])], axis=1)

    k = X.shape[1]
    if int((n_j >= 2).sum()) < k + 3:
        return None  # too few teams with two or more members for a between-team regression
    Xm, ym = gmean(X), gmean(y[:, None])[:, 0]
    Xw, yw = X - Xm[inv], y - ym[inv]
    bw, vw = _ols(yw, Xw, clusters=g)
    keep = n_j >= 2
    Xb = np.column_stack([np.ones(keep.sum()), Xm[keep]])
    bb, vb = _ols(ym[keep], Xb)
    Z = np.column_stack([np.ones(len(y)), X, Xm[inv]])
    bz, vz = _ols(y, Z, clusters=g)
    d, vd = bz[1 + k:], vz[1 + k:, 1 + k:]
    wald = float(d @ np.linalg.pinv(vd) @ d)
    sw = Xw.std(axis=0, ddof=1) / yw.std(ddof=1)
    sb = Xm[keep].std(axis=0, ddof=1) / ym[keep].std(ddof=1)
    return {
        "within": {"b": bw, "se": np.sqrt(np.diag(vw)), "std": bw * sw},
        "between": {"b": bb[1:], "se": np.sqrt(np.diag(vb))[1:], "std": bb[1:] * sb,
                    "teams": int(keep.sum())},
        "difference": {"b": d, "se": np.sqrt(np.diag(vd)), "wald": wald, "df": k,
                       "p": float(stats.chi2.sf(wald, k))},
    }


# --- Split-team cross-source estimate ----------------------------------------------------

@dataclass(frozen=True)
class TeamMoments:
    """Per team, what every random split of its members gives on average: the team's size, the
    sizes of its parts (one per column, contiguous near-equal parts of a random order), its
    column means, and E[m m'] over the splits, m the vector of part means (column j averaged over
    part j). Columns are centred on their overall mean, so no digits are lost to a large mean."""

    n: np.ndarray        # (J,) members
    parts: np.ndarray    # (J, P) members in each column's part
    mean: np.ndarray     # (J, P) team means
    within: np.ndarray   # (J, P) sums of squares about the team mean (the ICC's within part)
    expected: np.ndarray  # (J, P, P) E[m m'] over the team's random splits


def team_moments(scores: np.ndarray, team: np.ndarray, n_teams: int) -> TeamMoments:
    """:class:`TeamMoments` of complete ``scores`` rows grouped by ``team`` (codes 0..n_teams-1).

    Over the random orders of a team's n members, part j (size s_j) is a simple random sample
    of the team without replacement, and parts are disjoint, so with S_j the team's sum of
    column j and C_jk its sum of x_j x_k over members (one person's own product):
    E[m_j m_k] = (S_j S_k - C_jk) / (n (n - 1)) for j != k (pairs of different people only),
    E[m_j^2] = mean_j^2 + var_j (n - s_j) / (s_j (n - 1)), var_j the team's variance with
    divisor n (the variance of a mean sampled without replacement; Cochran 1977, thm 2.2)."""
    x = np.asarray(scores, dtype=float)
    x = x - x.mean(axis=0)
    P = x.shape[1]
    n = np.bincount(team, minlength=n_teams).astype(float)
    S = np.column_stack([np.bincount(team, weights=x[:, j], minlength=n_teams) for j in range(P)])
    C = np.empty((n_teams, P, P))
    for j in range(P):
        for k in range(j, P):
            C[:, j, k] = C[:, k, j] = np.bincount(team, weights=x[:, j] * x[:, k], minlength=n_teams)
    # part j holds the members whose rank r in the random order has floor(r P / n) = j
    parts = np.floor((np.arange(1, P + 1)[None, :] * n[:, None] - 1) / P) \
        - np.floor((np.arange(P)[None, :] * n[:, None] - 1) / P)
    mean = S / n[:, None]
    diag = np.einsum("tjj->tj", C)
    within = diag - S * mean
    E = (S[:, :, None] * S[:, None, :] - C) / (n * (n - 1))[:, None, None]
    var = within / n[:, None]
    idx = np.arange(P)
    E[:, idx, idx] = mean ** 2 + var * (n[:, None] - parts) / (parts * (n[:, None] - 1))
    return TeamMoments(n=n, parts=parts, mean=mean, within=within, expected=E)


def _icc1_weighted(tm: TeamMoments, w: np.ndarray) -> np.ndarray:
    """ICC(1) of each column (:func:`icc_oneway`) with team t counted w_t times, from the
    teams' sizes, means and within sums of squares."""
    J = w.sum()
    N = float(w @ tm.n)
    grand = (w * tm.n) @ tm.mean / N
    msb = (w * tm.n) @ (tm.mean - grand) ** 2 / (J - 1)
    msw = w @ tm.within / (N - J)
    n0 = (N - float(w @ tm.n ** 2) / N) / (J - 1)
    denom = msb + (n0 - 1) * msw
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(denom > 0, (msb - msw) / denom, 0.0)


def _split_coefficients(tm: TeamMoments, w: np.ndarray) -> tuple[float, ...] | None:
    """The coefficients of column 0 on the others from the team-level covariances averaged over
    every split, team t counted w_t times (a team drawn twice in a bootstrap sample is two
    teams, split independently), corrected for the unreliability of part means."""
    P = tm.mean.shape[1]
    J = w.sum()
    if int(np.count_nonzero(w)) < P + 3:
        return None
    A = np.einsum("t,tjk->jk", w, tm.expected)
    T = w @ tm.mean
    B = np.einsum("t,tj,tk->jk", w, tm.mean, tm.mean)
    # E[sum_e (m_e - mean m)(m_e - mean m)'] over the entries e of the sample: copies of one team
    # are split independently, so E[m_e m_e''] = mean_e mean_e'' for e != e''
    scatter = A - (np.outer(T, T) - B + A) / J
    d = np.sqrt(np.diag(scatter))
    if np.any(d <= 0):
        return None
    corr = scatter / np.outer(d, d)
    # reliability of each part's team means: Spearman-Brown at the harmonic-mean part size
    h = J / (w @ (1.0 / tm.parts))
    icc1 = _icc1_weighted(tm, w)
    rel = np.array([spearman_brown(icc1[j], h[j]) for j in range(P)])
    if np.any(rel <= 0):
        return None
    rc = disattenuate(corr, rel)
    if np.any(np.linalg.eigvalsh(rc) <= 1e-10):
        return None
    return tuple(standardized_coefficients(rc, 0, list(range(1, P))))


def split_team_estimate(scores: np.ndarray, groups: np.ndarray, *, n_boot: int = 200, seed: int = 0,
                        confidence: float = 0.95) -> dict:
    """Team-level standardized coefficients of the outcome (column 0) on the predictors, with
    every construct's team mean taken from a different random part of each team's members,
    so no respondent contributes to both sides and individual-level common-method variance
    cannot produce the association. The team-level correlations are corrected for the
    unreliability of part-team means (Spearman-Brown from each construct's ICC(1)).

    The team-level covariances are averaged over every random split of every team, computed
    exactly from each team's sums and cross-products (:func:`team_moments`), and the
    coefficients solved from them: no Monte Carlo error, and the cost of one pass over the rows.
    The interval is the percentile interval of a team bootstrap (teams resampled with
    replacement, ICC(1) re-estimated). Teams need at least two members per part."""
    g = np.asarray(groups)
    _, inv = group_index(g)
    parts = scores.shape[1]
    n_j = np.bincount(inv)
    eligible = n_j >= 2 * parts
    out = {"splits": None, "teams_used": int(eligible.sum()), "min_team_size": 2 * parts,
           "estimate": None, "ci": None, "n_boot": n_boot}
    if eligible.sum() < parts + 3:
        out["note"] = (f"needs at least {parts + 3} teams with {2 * parts} or more members; "
                       f"{int(eligible.sum())} have that many")
        return out
    new_code = np.cumsum(eligible) - 1
    keep = eligible[inv]
    J = int(eligible.sum())
    tm = team_moments(np.asarray(scores, dtype=float)[keep], new_code[inv[keep]], J)
    est = _split_coefficients(tm, np.ones(J))
    if est is None:
        out["note"] = "the team-level correlations could not be corrected (ICC(1) near zero)"
        return out
    out["estimate"] = [float(v) for v in est]
    rng = np.random.default_rng(np.random.SeedSequence(seed).spawn(2)[1])
    boot = []
    for _ in range(n_boot):
        w = np.bincount(rng.integers(0, J, J), minlength=J).astype(float)
        b = _split_coefficients(tm, w)
        if b is not None:
            boot.append(b)
    if len(boot) >= 10:
        a = (1 - confidence) / 2
        q = np.quantile(np.array(boot), [a, 1 - a], axis=0)
        out["ci"] = [[float(q[0, j]), float(q[1, j])] for j in range(parts - 1)]
    out["n_boot_used"] = len(boot)
    return out


def same_source_team_estimate(scores: np.ndarray, groups: np.ndarray) -> list[float] | None:
    """Team-level standardized coefficients from full-team means (the same people rate both
    sides), corrected for the unreliability of team means by ICC(2): what a same-source team
    analysis reports, common-method inflation included."""
    g = np.asarray(groups)
    df = pd.DataFrame(scores).assign(_g=g)
    sizes = df.groupby("_g").size()
    means = df.groupby("_g").mean()[sizes >= 2].dropna().to_numpy()
    rel = [icc_oneway(scores[:, j], g).icc2 for j in range(scores.shape[1])]
    if any(r is None or r <= 0 for r in rel):
        return None
    rc = disattenuate(np.corrcoef(means, rowvar=False), np.array(rel))
    if np.any(np.linalg.eigvalsh(rc) <= 1e-10):
        return None
    return [float(v) for v in standardized_coefficients(rc, 0, list(range(1, scores.shape[1])))]


def group_means(values: np.ndarray, codes: np.ndarray, n_groups: int) -> np.ndarray:
    """Each group's mean of ``values`` over its members who have one (NaN for none)."""
    has = ~np.isnan(values)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (np.bincount(codes[has], weights=values[has], minlength=n_groups)
                / np.bincount(codes[has], minlength=n_groups))


def group_table_of(means: np.ndarray, sizes: np.ndarray, names: list[str], labels: np.ndarray,
                   min_size: int) -> tuple[list[dict], int]:
    """:func:`group_table` from the groups' means (groups x names) and sizes."""
    present = np.flatnonzero(sizes > 0)
    rows = [{"group": str(labels[t]), "n": int(sizes[t]), **{c: float(means[t, j]) for j, c in enumerate(names)}}
            for t in present if sizes[t] >= min_size]
    return rows, int((sizes[present] < min_size).sum())


def group_table(scores: np.ndarray, names: list[str], codes: np.ndarray, labels: np.ndarray,
                min_size: int) -> tuple[list[dict], int]:
    """Team means for teams of at least ``min_size`` respondents; and how many were withheld.
    ``codes``: each row's group number into ``labels`` (the group names, in order); a team's
    mean of a score is over its members who have that score."""
    G = len(labels)
    means = np.column_stack([group_means(scores[:, j], codes, G) for j in range(len(names))]) \
        if names else np.empty((G, 0))
    return group_table_of(means, np.bincount(codes, minlength=G), names, labels, min_size)
