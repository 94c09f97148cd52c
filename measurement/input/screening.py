"""Screening respondents for careless responding, outliers and missing answers.

Every row is measured and flagged; nothing is dropped (dropping is the caller's option).
The rules are common practice, not laws; the result carries them in words for the report.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import linalg, stats

from samesource.engine.fitting import _single_threaded_blas, centred_cross_products
from samesource.engine.patterns import row_patterns, rows_by_pattern
from samesource.errors import DesignError

RULE_NAMES = ("longstring", "irv", "mahalanobis", "missing", "out_of_range")
ROW_BLOCK = 65_536  # rows per block where a measure needs a temporary the size of its rows


@dataclass(frozen=True)
class ScreeningRules:
    """Thresholds for the flags. Set a field to ``None`` to switch its rule off.

    - ``longstring_min``, ``longstring_share``: flag a longest run of identical
      consecutive answers of at least ``max(longstring_min, longstring_share * items)``.
    - ``irv_min_items``: flag the same answer to every item (IRV 0) when at least this many
      items are answered.
    - ``mahalanobis_alpha``: flag when the Mahalanobis p-value is below it.
    - ``max_share_missing``: flag when more than this share of items is unanswered.
    - ``flag_out_of_range``: flag answers outside the response scale.
    """

    longstring_min: int | None = 10
    longstring_share: float = 0.5
    irv_min_items: int | None = 5
    mahalanobis_alpha: float | None = 0.001
    max_share_missing: float | None = 0.5
    flag_out_of_range: bool = True


@dataclass
class ScreeningResult:
    """Per-row measures and flags.

    ``per_row`` (index = the caller's row numbers) holds ``longstring``, ``irv``,
    ``mahalanobis_d2``, ``mahalanobis_df``, ``mahalanobis_p``, ``share_missing``,
    ``n_out_of_range``, one bool column ``flag_<rule>`` per rule and ``flagged`` (any
    flag). ``irv``, ``mahalanobis_d2`` and ``mahalanobis_p`` are NaN where undefined
    (see :func:`screen_respondents`); callers map NaN to null. ``reasons`` lists the rules
    each flagged row broke; ``counts`` the rows per rule; ``rules`` each rule in words;
    ``notes`` any caveat about this data (e.g. a covariance matrix that could not be
    inverted).
    """

    per_row: pd.DataFrame
    flagged_rows: list
    reasons: dict
    counts: dict[str, int]
    rules: dict[str, str]
    notes: list[str] = field(default_factory=list)


def _check_numeric(df: pd.DataFrame, what: str) -> None:
    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"{what} must be a pandas DataFrame")
    bad = [c for c in df.columns if df[c].dtype.kind not in "bifu"]
    if bad:
        raise ValueError(f"{what}: columns must be numeric: {bad}")


def _numeric_array(df: pd.DataFrame, what: str) -> np.ndarray:
    _check_numeric(df, what)
    return df.to_numpy(dtype=float)


def _same_answer(raw: np.ndarray, min_items: int) -> np.ndarray:
    """The same answer to every answered item, over at least ``min_items`` answered ones
    (tested exactly rather than as a floating-point SD of 0)."""
    m = (~np.isnan(raw)).sum(axis=1)
    same = np.zeros(raw.shape[0], dtype=bool)
    ok = m >= max(min_items, 1)
    if ok.all():  # no copy of the rows when every row qualifies
        same[:] = np.nanmax(raw, axis=1) == np.nanmin(raw, axis=1)
    elif ok.any():
        same[ok] = np.nanmax(raw[ok], axis=1) == np.nanmin(raw[ok], axis=1)
    return same


def _longstring(x: np.ndarray) -> np.ndarray:
    """Longest run of identical consecutive answers in each row.

    A missing answer (NaN) breaks a run and does not count towards one; a row with no
    answers has longstring 0.

    References
    ----------
    Johnson, J. A. (2005). Ascertaining the validity of individual protocols from
    Web-based personality inventories. Journal of Research in Personality, 39(1), 103-129.

    Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in
    survey data. Journal of Experimental Social Psychology, 66, 4-19.
    """
    x = np.asarray(x, dtype=float)
    n, k = x.shape
    best = np.zeros(n, dtype=int)
    run = np.zeros(n, dtype=int)
    for j in range(k):
        answered = ~np.isnan(x[:, j])
        same = answered & (x[:, j] == x[:, j - 1]) if j > 0 else np.zeros(n, dtype=bool)
        run = np.where(answered, np.where(same, run + 1, 1), 0)
        best = np.maximum(best, run)
    return best


def _intra_individual_variability(x: np.ndarray) -> np.ndarray:
    """Intra-individual response variability: SD of each row's answered items.

    The sample SD (divisor m - 1 over the m answered items); NaN when fewer than two items
    are answered.

    References
    ----------
    Dunn, A. M., Heggestad, E. D., Shanock, L. R., & Theilgard, N. (2018). Intra-individual
    response variability as an indicator of insufficient effort responding: Comparison to
    other indicators and relationships with individual differences. Journal of Business
    and Psychology, 33(1), 105-121.
    """
    x = np.asarray(x, dtype=float)
    m = (~np.isnan(x)).sum(axis=1)
    out = np.full(x.shape[0], np.nan)
    ok = m >= 2
    if ok.all() and m.min() == x.shape[1]:  # every row complete: the same SDs without NaN handling
        for s in range(0, x.shape[0], ROW_BLOCK):  # a block at a time: no copy of every row
            out[s:s + ROW_BLOCK] = np.std(x[s:s + ROW_BLOCK], axis=1, ddof=1)
    elif ok.any():
        out[ok] = np.nanstd(x[ok], axis=1, ddof=1)
    return out


def _mahalanobis_distances(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
    """Squared Mahalanobis distance of each row and its upper-tail chi-square p-value.

    The mean vector and covariance matrix (divisor n - 1) come from the complete rows. A
    row with missing items is measured on its answered items, with the matching
    sub-vector of the mean and sub-matrix of the covariance; its degrees of freedom are
    the number of items it answered. The p-value treats d2 as chi-square, which assumes
    multivariate normal answers: a rough guide for ordinal items.

    Returns ``(d2, df, p, notes)``; d2 and p are NaN for a row with no answers, and for
    rows whose (sub-)covariance matrix cannot be inverted (fewer complete rows than items,
    or items that are exact linear combinations of others) — ``notes`` then says so.

    References
    ----------
    Mahalanobis, P. C. (1936). On the generalized distance in statistics. Proceedings of
    the National Institute of Sciences of India, 2, 49-55.

    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455.
    """
    x = np.asarray(x, dtype=float)
    n, k = x.shape
    d2 = np.full(n, np.nan)
    p = np.full(n, np.nan)
    answered = ~np.isnan(x)
    df = answered.sum(axis=1)
    notes: list[str] = []
    whole = answered.all(axis=1)
    complete = x if whole.all() else x[whole]  # no copy of the rows when every row is complete
    if complete.shape[0] < 2:
        notes.append(
            "Mahalanobis distance not computed: fewer than two rows answer every item, so "
            "there is no covariance matrix to measure against."
        )
        return d2, df, p, notes
    mean, cross = centred_cross_products(complete)
    cov = cross / (complete.shape[0] - 1)
    singular_rows = 0
    # Rows that share a pattern of answered items share one sub-matrix: factor it once.
    patterns, inverse = row_patterns(answered)
    every = complete.shape[0] == n
    with _single_threaded_blas():
        for pattern, rows in zip(patterns, rows_by_pattern(inverse, len(patterns)), strict=True):
            if not pattern.any():
                continue
            sub = cov[np.ix_(pattern, pattern)]
            eig = np.linalg.eigvalsh(sub)
            if not eig[0] > 1e-10 * max(eig[-1], 1e-300):
                singular_rows += rows.size
                continue
            # One solve per pattern: the inverse of the Cholesky factor L of the sub-matrix, so a
            # row's d2 is the squared length of L^-1 d (a sum of squares, never below zero).
            L = linalg.cholesky(sub, lower=True)
            white = linalg.solve_triangular(L, np.eye(L.shape[0]), lower=True, check_finite=False).T
            for s in range(0, rows.size, ROW_BLOCK):
                r = rows[s:s + ROW_BLOCK]
                # every row complete: a slice of the rows, not a copy of them first
                dev = x[s:s + r.size] - mean if every else x[np.ix_(r, pattern)] - mean[pattern]
                z = dev @ white
                d2[r] = np.einsum("ij,ij->i", z, z)
            p[rows] = stats.chi2.sf(d2[rows], int(pattern.sum()))
    if singular_rows:
        notes.append(
            f"Mahalanobis distance not computed for {singular_rows} row(s): the covariance "
            f"of their answered items (from {complete.shape[0]} complete rows) cannot be "
            "inverted — too few complete rows for the number of items, or items that are "
            "exact combinations of others."
        )
    return d2, df, p, notes


def _rule_texts(
    rules: ScreeningRules, n_items: int, ls_threshold: int | None, raw_given: bool
) -> dict[str, str]:
    order = "questionnaire order, answers as given" if raw_given else "item order given"
    texts: dict[str, str] = {}
    if ls_threshold is not None:
        texts["longstring"] = (
            f"Longest run of identical consecutive answers ({order}) is at least "
            f"{ls_threshold:g} — the larger of {rules.longstring_min} and "
            f"{rules.longstring_share:.0%} of the {n_items} items. A run that long is unlikely "
            "from attentive answering when scales mix positively and negatively keyed "
            "items. Threshold: common practice; method: longstring (Johnson 2005; "
            "Curran 2016)."
        )
    if rules.irv_min_items is not None:
        texts["irv"] = (
            f"The same answer to every answered item (intra-individual response variability "
            f"of 0) over at least {rules.irv_min_items} answered items. Threshold: common "
            "practice; method: Dunn, Heggestad, Shanock & Theilgard (2018)."
        )
    if rules.mahalanobis_alpha is not None:
        texts["mahalanobis"] = (
            f"Pattern of answers far from the sample's: squared Mahalanobis distance with a "
            f"chi-square p-value below {rules.mahalanobis_alpha:g} (degrees of freedom = "
            "items answered; mean and covariance from the complete rows). Threshold: common "
            "practice (e.g. Tabachnick & Fidell); method: Mahalanobis (1936), discussed for "
            "surveys by Meade & Craig (2012)."
        )
    if rules.max_share_missing is not None:
        texts["missing"] = (
            f"More than {rules.max_share_missing:.0%} of the items unanswered. Threshold: "
            "common practice."
        )
    if rules.flag_out_of_range:
        texts["out_of_range"] = (
            "At least one answer outside the response scale — usually a data-entry error or "
            "an undeclared missing-value code. Not a judgement on the respondent; check the "
            "data."
        )
    return texts


def screen_respondents(
    items: pd.DataFrame,
    raw_items: pd.DataFrame | None = None,
    *,
    scale_min: float | None,
    scale_max: float | None,
    rules: ScreeningRules | None = None,
) -> ScreeningResult:
    """Measure and flag each respondent for careless responding, outliers and missingness.

    Measures per row: ``longstring`` (Johnson 2005; Curran 2016), ``irv``
    (intra-individual response variability, Dunn et al. 2018), ``mahalanobis_d2`` and
    ``mahalanobis_p`` (Mahalanobis 1936; Meade & Craig 2012), ``share_missing`` and
    ``n_out_of_range``. See :class:`ScreeningRules` for the flags.

    Longstring and IRV describe how a person answered the questionnaire, so they run on
    ``raw_items``: the answers as given (not reverse-keyed), columns in questionnaire
    order. Reverse-keying would break a straight-liner's run at every reversed item. When
    ``raw_items`` is ``None`` they run on ``items`` in its column order, and ``notes`` says
    so. Mahalanobis distance is unchanged by reverse-keying (an affine change of each item)
    and, like the missing share and the range check, runs on ``items``.

    Parameters
    ----------
    items : pandas.DataFrame
        All item columns (reverse-keyed or not), one row per respondent; the index holds
        the user-visible row numbers and is kept.
    raw_items : pandas.DataFrame or None
        The same respondents' answers as given, in questionnaire column order; its index
        must equal ``items``'s index. The longstring share counts its columns.
    scale_min, scale_max : float or None
        The response scale; answers outside it are counted in ``n_out_of_range``. ``None``
        for both skips the range check.
    rules : ScreeningRules or None
        Thresholds; the defaults when ``None``.

    Returns
    -------
    ScreeningResult
        NaN in ``per_row`` where a measure is undefined: ``irv`` with fewer than two
        answers, Mahalanobis with no answers or a covariance that cannot be inverted. An
        undefined measure never raises a flag.

    References
    ----------
    Curran, P. G. (2016). Methods for the detection of carelessly invalid responses in
    survey data. Journal of Experimental Social Psychology, 66, 4-19.

    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455.
    """
    rules = rules or ScreeningRules()
    x = _numeric_array(items, "items")
    if x.shape[1] == 0:
        raise ValueError("items has no columns")
    if raw_items is None:
        raw_width = x.shape[1]
    else:
        if not raw_items.index.equals(items.index):
            raise ValueError("raw_items must have the same rows (index) as items")
        _check_numeric(raw_items, "raw_items")
        raw_width = raw_items.shape[1]
    if (scale_min is None) != (scale_max is None):
        raise DesignError("give both ends of the response scale or neither", field="scale_min")
    if scale_min is not None and not scale_min < scale_max:
        raise DesignError(
            f"response scale minimum {scale_min:g} must be below the maximum {scale_max:g}",
            field="scale_min",
        )

    n, k = x.shape
    notes: list[str] = []
    # Longstring, IRV and the same-answer test look at one row at a time: a block of rows of
    # the raw answers at a time, so they are never copied whole into one array.
    ls = np.zeros(n, dtype=int)
    irv = np.full(n, np.nan)
    same = np.zeros(n, dtype=bool)
    for s in range(0, n, ROW_BLOCK):
        raw = x[s:s + ROW_BLOCK] if raw_items is None else raw_items.iloc[s:s + ROW_BLOCK].to_numpy(dtype=float)
        ls[s:s + len(raw)] = _longstring(raw)
        irv[s:s + len(raw)] = _intra_individual_variability(raw)
        if rules.irv_min_items is not None:
            same[s:s + len(raw)] = _same_answer(raw, rules.irv_min_items)
    d2, df, p, maha_notes = _mahalanobis_distances(x)
    notes += maha_notes
    answered = ~np.isnan(x)
    share_missing = 1.0 - answered.sum(axis=1) / k
    if scale_min is None:
        n_oor = np.zeros(n, dtype=int)
    else:
        n_oor = (answered & ((x < scale_min) | (x > scale_max))).sum(axis=1)
    if raw_items is None:
        notes.append(
            "Longstring and response variability were computed on the items as given to "
            "screening, not on the raw answers in questionnaire order."
        )

    ls_threshold = None
    if rules.longstring_min is not None:
        # Runs are whole numbers: "at least half of 25 items" means a run of 13.
        half = math.ceil(rules.longstring_share * raw_width - 1e-9)
        ls_threshold = max(int(rules.longstring_min), half)
        # A run can be at most as long as the questionnaire.
        if ls_threshold > raw_width:
            notes.append(
                f"Longstring rule cannot fire: the threshold {ls_threshold:g} exceeds the "
                f"{raw_width} items."
            )
    flags: dict[str, np.ndarray] = {}
    if ls_threshold is not None:
        flags["longstring"] = ls >= ls_threshold
    if rules.irv_min_items is not None:
        flags["irv"] = same
    if rules.mahalanobis_alpha is not None:
        flags["mahalanobis"] = np.where(np.isnan(p), False, p < rules.mahalanobis_alpha)
    if rules.max_share_missing is not None:
        flags["missing"] = share_missing > rules.max_share_missing
    if rules.flag_out_of_range and scale_min is not None:
        flags["out_of_range"] = n_oor > 0

    per_row = pd.DataFrame(
        {
            "longstring": ls,
            "irv": irv,
            "mahalanobis_d2": d2,
            "mahalanobis_df": df,
            "mahalanobis_p": p,
            "share_missing": share_missing,
            "n_out_of_range": n_oor,
        },
        index=items.index.copy(),
    )
    for name in RULE_NAMES:
        if name in flags:
            per_row[f"flag_{name}"] = flags[name].astype(bool)
    flag_cols = [f"flag_{r}" for r in RULE_NAMES if r in flags]
    per_row["flagged"] = per_row[flag_cols].any(axis=1) if flag_cols else False

    def plain(v):
        return v.item() if isinstance(v, np.generic) else v

    hit = per_row["flagged"].to_numpy(dtype=bool)
    flagged_rows = [plain(i) for i in per_row.index[hit]]
    broke = {r: flags[r][hit] for r in RULE_NAMES if r in flags}  # the flagged rows only
    reasons = {idx: [r for r, f in broke.items() if f[j]] for j, idx in enumerate(flagged_rows)}
    counts = {r: int(flags[r].sum()) for r in RULE_NAMES if r in flags}
    texts = _rule_texts(rules, raw_width, ls_threshold, raw_items is not None)
    if "out_of_range" in texts and "out_of_range" not in flags:
        del texts["out_of_range"]
    return ScreeningResult(per_row, flagged_rows, reasons, counts, texts, notes)
