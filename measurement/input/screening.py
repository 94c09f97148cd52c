"""Screening respondents for careless responding, outliers and missing answers.

Every row is measured and flagged; nothing is dropped (dropping is the caller's option).
The rules are common practice, not laws; the result carries them in words for the report.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Collection, Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import linalg, stats

from samesource.engine.chunked_moments import MomentSums
from samesource.engine.fitting import _single_threaded_blas
from samesource.engine.patterns import packed_patterns
from samesource.errors import DesignError
from samesource.input.rows import BLOCK_ROWS, FrameRows, ItemRows, map_in_threads

RULE_NAMES = ("longstring", "irv", "mahalanobis", "missing", "out_of_range")
ROW_BLOCK = BLOCK_ROWS  # rows read at a time (ItemRows.blocks)


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


@dataclass(frozen=True, eq=False)
class RowMeasures:
    """The screen's per-row measures as compact numpy columns, one entry per row in row order
    (at 10,000,000 rows about 230 MB, where a DataFrame of every measure took 1 GB).

    Counts are the smallest unsigned integers that hold them; ``irv`` and ``mahalanobis_d2``
    stay float64 (the report gives their median and maximum). ``share_missing`` and
    ``mahalanobis_p`` are computed from ``answered`` and ``mahalanobis_d2`` when asked for,
    with the same arithmetic as when they were stored. ``flags`` holds bit ``i`` for rule
    ``RULE_NAMES[i]``; ``rules`` names the rules in force.
    """

    index: pd.Index          # each row's label (the caller's row numbers)
    n_items: int             # items screened (the missing share's denominator)
    longstring: np.ndarray
    irv: np.ndarray
    mahalanobis_d2: np.ndarray
    answered: np.ndarray     # items answered: the Mahalanobis degrees of freedom
    n_out_of_range: np.ndarray
    flags: np.ndarray        # uint8 bit mask over RULE_NAMES
    rules: tuple[str, ...]

    def share_missing(self) -> np.ndarray:
        return 1.0 - self.answered.astype(np.int64) / self.n_items

    def mahalanobis_p(self) -> np.ndarray:
        """The upper-tail chi-square p-value of each row's d2 (NaN where d2 is), degrees of
        freedom the items it answered. Treating d2 as chi-square assumes multivariate normal
        answers: a rough guide for ordinal items."""
        return _chi2_sf(self.mahalanobis_d2, self.answered)

    def flag(self, rule: str) -> np.ndarray:
        return (self.flags & np.uint8(1 << RULE_NAMES.index(rule))) != 0

    def column(self, name: str) -> np.ndarray:
        """One column of :attr:`ScreeningResult.per_row` as a numpy array."""
        if name == "share_missing":
            return self.share_missing()
        if name == "mahalanobis_p":
            return self.mahalanobis_p()
        if name == "mahalanobis_df":
            return self.answered.astype(np.int64)
        if name == "flagged":
            return self.flags != 0
        if name.startswith("flag_") and name[5:] in self.rules:
            return self.flag(name[5:])
        if name in ("longstring", "n_out_of_range"):
            return getattr(self, name).astype(np.int64)
        if name in ("irv", "mahalanobis_d2"):
            return getattr(self, name)
        raise KeyError(name)

    def columns(self) -> list[str]:
        return [*MEASURES, *(f"flag_{r}" for r in self.rules), "flagged"]

    def spread(self, name: str) -> tuple[float, float]:
        """(median, maximum) of a measure over the rows where it is defined (NaN, NaN where
        it is defined for none): pandas' ``Series.median()`` and ``max()``, exactly."""
        v = np.asarray(self.column(name), dtype=float)
        v = v[~np.isnan(v)]
        if not v.size:
            return math.nan, math.nan
        return float(np.median(v)), float(v.max())


MEASURES = ("longstring", "irv", "mahalanobis_d2", "mahalanobis_df", "mahalanobis_p",
            "share_missing", "n_out_of_range")


@dataclass
class ScreeningResult:
    """Per-row measures and flags.

    ``per_row`` (index = the caller's row numbers) holds ``longstring``, ``irv``,
    ``mahalanobis_d2``, ``mahalanobis_df``, ``mahalanobis_p``, ``share_missing``,
    ``n_out_of_range``, one bool column ``flag_<rule>`` per rule and ``flagged`` (any
    flag). ``irv``, ``mahalanobis_d2`` and ``mahalanobis_p`` are NaN where undefined
    (see :func:`screen_respondents`); callers map NaN to null. ``per_row`` is built when
    asked for, from ``measures`` (:class:`RowMeasures`, compact columns): a caller that
    needs a summary uses ``measures.spread``. ``reasons`` lists the rules each flagged row
    broke; ``counts`` the rows per rule; ``rules`` each rule in words; ``notes`` any caveat
    about this data (e.g. a covariance matrix that could not be inverted).
    """

    measures: RowMeasures = field(repr=False)
    flagged_rows: list
    reasons: dict
    counts: dict[str, int]
    rules: dict[str, str]
    notes: list[str] = field(default_factory=list)

    @property
    def per_row(self) -> pd.DataFrame:
        m = self.measures
        return pd.DataFrame({c: m.column(c) for c in m.columns()}, index=m.index.copy())


def _check_numeric(df: pd.DataFrame, what: str) -> None:
    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"{what} must be a pandas DataFrame")
    bad = [c for c in df.columns if df[c].dtype.kind not in "bifu"]
    if bad:
        raise ValueError(f"{what}: columns must be numeric: {bad}")


def _chi2_sf(d2: np.ndarray, df: np.ndarray) -> np.ndarray:
    """chi2.sf(d2, df) a block of rows at a time (NaN where d2 is NaN or df is 0)."""
    out = np.full(d2.shape, np.nan)
    for s in range(0, d2.size, ROW_BLOCK):
        d, k = d2[s:s + ROW_BLOCK], df[s:s + ROW_BLOCK]
        ok = ~np.isnan(d)
        if ok.any():
            out[s:s + ROW_BLOCK][ok] = stats.chi2.sf(d[ok], k[ok].astype(float))
    return out


# Rows whose d2 lies within this share of the critical value get their p-value itself.
_NEAR_CRITICAL = 1e-9


def _p_below(d2: np.ndarray, df: np.ndarray, alpha: float) -> np.ndarray:
    """Whether each row's chi-square p-value (:func:`_chi2_sf`) is below ``alpha`` (False where
    it is NaN), without the p-value of every row: the p-value falls as d2 rises, so d2 clearly
    above the critical value of its degrees of freedom (chi2.isf(alpha, df), one per count of
    answered items) is below, clearly under it is not, and only a d2 within a billionth of the
    critical value has its p-value computed and compared."""
    df = np.asarray(df, dtype=np.int64)
    top = int(df.max(initial=0))
    with np.errstate(invalid="ignore"):
        critical = np.full(top + 1, np.inf)
        if top >= 1:
            critical[1:] = stats.chi2.isf(alpha, np.arange(1, top + 1, dtype=float))
        c = critical[df]
        above = d2 > c * (1 + _NEAR_CRITICAL)
        near = ~np.isnan(d2) & ~above & ~(d2 < c * (1 - _NEAR_CRITICAL))
    if near.any():
        p = _chi2_sf(d2[near], df[near])
        above[near] = np.where(np.isnan(p), False, p < alpha)
    return above


def _count_dtype(most: int) -> np.dtype:
    return np.dtype(np.uint8 if most <= 255 else np.uint16 if most <= 65_535 else np.uint32)


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
    if 2 <= k <= 65:
        return _longstring_by_bits(x)
    best = np.zeros(n, dtype=int)
    run = np.zeros(n, dtype=int)
    for j in range(k):
        answered = ~np.isnan(x[:, j])
        same = answered & (x[:, j] == x[:, j - 1]) if j > 0 else np.zeros(n, dtype=bool)
        run = np.where(answered, np.where(same, run + 1, 1), 0)
        best = np.maximum(best, run)
    return best


def _longstring_by_bits(x: np.ndarray) -> np.ndarray:
    """:func:`_longstring` of rows of 2 to 65 answers: whether each answer equals the one before
    (NaN equals nothing, so a gap breaks a run) as the bits of one 64-bit word per row; a run
    of r equal answers is r - 1 consecutive set bits, and ``w & (w << 1)`` shortens every run of
    set bits by one, so the longest run is how many such steps leave the word non-zero (each
    step on the rows still non-zero only)."""
    n, k = x.shape
    same = np.zeros((n, 64), dtype=bool)
    np.equal(x[:, 1:], x[:, :-1], out=same[:, :k - 1])
    words = np.packbits(same, axis=1).view(">u8").ravel().astype(np.uint64)  # answer 2 = top bit
    steps = np.zeros(n, dtype=int)
    live = np.flatnonzero(words)
    w = words[live]
    step, one = 0, np.uint64(1)
    while w.size:
        step += 1
        steps[live] = step
        w &= w << one
        keep = w != 0
        live, w = live[keep], w[keep]
    return np.where((x == x).any(axis=1), steps + 1, 0)


def _intra_individual_variability(x: np.ndarray) -> np.ndarray:
    """Intra-individual response variability: SD of each row's answered items.

    The sample SD (divisor m - 1 over the m answered items); NaN when fewer than two items
    are answered. Each row's SD is computed the same way whatever the other rows of its block
    (a complete row by ``np.std``, one with gaps by ``np.nanstd``), so blocks of other sizes
    give the same numbers.

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
    whole = (m == x.shape[1]) & (m >= 2)
    part = (m >= 2) & ~whole
    if x.shape[0] and whole.all():  # no copy of the rows when every row is complete
        out[:] = np.std(x, axis=1, ddof=1)
    elif whole.any():
        out[whole] = np.std(x[whole], axis=1, ddof=1)
    if part.any():
        out[part] = np.nanstd(x[part], axis=1, ddof=1)
    return out


def _whitener(sub: np.ndarray) -> np.ndarray | None:
    """The transposed inverse Cholesky factor W of a covariance matrix S (L L' = S, W = L^-T),
    so a row's d2 is the squared length of (x - m) W (a sum of squares, never below zero);
    None where S cannot be inverted."""
    eig = np.linalg.eigvalsh(sub)
    if not eig[0] > 1e-10 * max(eig[-1], 1e-300):
        return None
    L = linalg.cholesky(sub, lower=True)
    return linalg.solve_triangular(L, np.eye(L.shape[0]), lower=True, check_finite=False).T


class _Whiteners:
    """Each missing-data pattern's whitener (:func:`_whitener` of the covariance on its
    answered items), factored once and kept until the block with the pattern's last row;
    beyond ``budget`` bytes kept, a pattern's is factored again where it is needed (the same
    numbers)."""

    def __init__(self, cov: np.ndarray, patterns: np.ndarray, counts: np.ndarray,
                 budget: int) -> None:
        self.cov, self.patterns, self.left = cov, patterns, counts.copy()
        self.budget, self.kept, self.memo = budget, 0, {}

    def get(self, j: int) -> np.ndarray | None:
        if j in self.memo:
            return self.memo[j]
        pat = self.patterns[j]
        white = _whitener(self.cov[np.ix_(pat, pat)])
        size = 0 if white is None else white.nbytes
        if self.kept + size <= self.budget:
            self.memo[j] = white
            self.kept += size
        return white

    def done(self, j: int, rows: int) -> None:
        self.left[j] -= rows
        if self.left[j] == 0 and j in self.memo:
            white = self.memo.pop(j)
            self.kept -= 0 if white is None else white.nbytes


WHITENERS_BYTES = 256 * 2**20  # whitening matrices kept between blocks (~9,000 of 60 items)


class _Answers:
    """The rows read for the screen, a block at a time: the screened items (C order, so a
    row's numbers never depend on how it is stored) and the answers as given (reverse keying
    undone, questionnaire order) or the raw answers handed in as a DataFrame."""

    def __init__(self, rows: ItemRows, columns: list[str], order: list[str] | None,
                 reversed_items: set[str], lo_hi: float | None, raw_frame: pd.DataFrame | None) -> None:
        known = set(rows.names)
        for what, names in (("columns", columns), ("order", order or [])):
            unknown = [c for c in names if c not in known]
            if unknown:
                raise ValueError(f"screening: {what} names {unknown[0]!r}, not an item of these rows")
        self.rows, self.k = rows, len(columns)
        # answers as given handed in as a DataFrame: its numbers once (C order), so the threads
        # measuring blocks slice an array, not the frame
        self.raw_values = None if raw_frame is None else np.ascontiguousarray(raw_frame.to_numpy(dtype=float))
        screened = set(columns)
        self.read = columns + [c for c in (order or []) if c not in screened]
        pos = {c: i for i, c in enumerate(self.read)}
        self.raw_idx = None if order is None else np.array([pos[c] for c in order], dtype=np.intp)
        self.rev = np.array([i for i, c in enumerate(order or []) if c in reversed_items], dtype=np.intp)
        self.lo_hi = lo_hi
        # the questionnaire's order is the screened columns' own: the answers as given are X
        self.as_screened = self.raw_idx is not None and np.array_equal(self.raw_idx, np.arange(self.k))

    def blocks(self) -> Iterator[tuple[int, np.ndarray]]:
        """The rows as read (position, block): :meth:`items` and :meth:`both` of a block give
        the arrays a pass measures (in the thread that measures them)."""
        cols = None if self.read == list(self.rows.names) else self.read
        return self.rows.blocks(cols, size=ROW_BLOCK)

    def items(self, s: int, B: np.ndarray) -> np.ndarray:
        """The screened items of the block read at ``s`` (C order)."""
        return np.ascontiguousarray(B[:, :self.k])

    def both(self, s: int, B: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The screened items and the answers as given of the block read at ``s``."""
        X = self.items(s, B)
        if self.raw_values is not None:
            raw = self.raw_values[s:s + len(B)]
        elif self.raw_idx is None or (self.as_screened and not self.rev.size):
            raw = X
        else:
            # from the C-order copy where the questionnaire's items are among the screened (one
            # copy, not two); a copy either way, as the keying is undone in place
            raw = X[:, self.raw_idx] if self.raw_idx.size and self.raw_idx.max() < self.k \
                else np.ascontiguousarray(B[:, self.raw_idx])
            if self.rev.size:
                raw[:, self.rev] = self.lo_hi - raw[:, self.rev]
        return X, raw


def _mahalanobis_distances(answers: _Answers, n: int, sums: MomentSums, keys: np.ndarray | None,
                           d2: np.ndarray) -> list[str]:
    """Squared Mahalanobis distance of each row, into ``d2`` (NaN where undefined); returns
    the notes. A second pass over the rows, after the first gave the complete rows' sums and,
    where some rows have gaps, each row's packed pattern of answered items (``keys``).

    The mean vector and covariance matrix (divisor n - 1) come from the complete rows. A
    row with missing items is measured on its answered items, with the matching
    sub-vector of the mean and sub-matrix of the covariance; its degrees of freedom are
    the number of items it answered. d2 is NaN for a row with no answers, and for
    rows whose (sub-)covariance matrix cannot be inverted (fewer complete rows than items,
    or items that are exact linear combinations of others) — a note then says so.

    References
    ----------
    Mahalanobis, P. C. (1936). On the generalized distance in statistics. Proceedings of
    the National Institute of Sciences of India, 2, 49-55.

    Meade, A. W., & Craig, S. B. (2012). Identifying careless responses in survey data.
    Psychological Methods, 17(3), 437-455.
    """
    if sums.n < 2:
        return ["Mahalanobis distance not computed: fewer than two rows answer every item, so "
                "there is no covariance matrix to measure against."]
    mean, cov = sums.mean, sums.cross / (sums.n - 1)
    if keys is None:  # every row complete: one pattern
        patterns, inverse = np.ones((1, answers.k), dtype=bool), None
        counts = np.array([n])
    else:  # rows that share a pattern of answered items share one sub-matrix: factor it once
        patterns, inverse = packed_patterns(keys, answers.k)
        counts = np.bincount(inverse, minlength=len(patterns))
    whiteners = _Whiteners(cov, patterns, counts, WHITENERS_BYTES)
    lock = threading.Lock()  # the whiteners kept are shared by the threads

    def measure(block: tuple[int, np.ndarray]) -> int:
        """The block's distances into d2; returns its rows whose covariance cannot be inverted."""
        s, B = block
        X = answers.items(s, B)
        if inverse is None:
            groups = [(0, slice(None))]
        else:
            ids = inverse[s:s + len(X)]
            order = np.argsort(ids, kind="stable")
            cuts = np.flatnonzero(ids[order][1:] != ids[order][:-1]) + 1
            groups = [(int(ids[g[0]]), g) for g in np.split(order, cuts)]
        singular = 0
        for j, rows in groups:
            pat = patterns[j]
            if not pat.any():
                continue
            with lock:
                white = whiteners.get(j)
            m = len(X) if inverse is None else rows.size
            if white is None:
                singular += m
            else:
                if inverse is None:
                    dev = X - mean  # every row complete: the block itself, not a copy first
                else:
                    cols = np.flatnonzero(pat)
                    dev = X[np.ix_(rows, cols)] - mean[cols]
                z = dev @ white
                d2[s:s + len(X)][rows] = np.einsum("ij,ij->i", z, z)
            with lock:
                whiteners.done(j, m)
        return singular

    with _single_threaded_blas():
        singular_rows = sum(map_in_threads(measure, answers.blocks()))
    if singular_rows:
        return [f"Mahalanobis distance not computed for {singular_rows} row(s): the covariance "
                f"of their answered items (from {sums.n} complete rows) cannot be "
                "inverted — too few complete rows for the number of items, or items that are "
                "exact combinations of others."]
    return []


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
    items: pd.DataFrame | ItemRows,
    raw_items: pd.DataFrame | None = None,
    *,
    scale_min: float | None,
    scale_max: float | None,
    rules: ScreeningRules | None = None,
    columns: Sequence[str] | None = None,
    order: Sequence[str] | None = None,
    reversed_items: Collection[str] = (),
    moments: MomentSums | None = None,
) -> ScreeningResult:
    """Measure and flag each respondent for careless responding, outliers and missingness.

    Measures per row: ``longstring`` (Johnson 2005; Curran 2016), ``irv``
    (intra-individual response variability, Dunn et al. 2018), ``mahalanobis_d2`` and
    ``mahalanobis_p`` (Mahalanobis 1936; Meade & Craig 2012), ``share_missing`` and
    ``n_out_of_range``. See :class:`ScreeningRules` for the flags.

    Longstring and IRV describe how a person answered the questionnaire, so they run on
    the answers as given (not reverse-keyed), in questionnaire order: ``raw_items``, or
    ``order`` and ``reversed_items``, which undo the keying a block of rows at a time
    (``scale_min + scale_max - x``) instead of a second copy of the answers. Reverse-keying
    would break a straight-liner's run at every reversed item. Given neither, they run on
    ``items`` in its column order, and ``notes`` says so. Mahalanobis distance is unchanged
    by reverse-keying (an affine change of each item) and, like the missing share and the
    range check, runs on ``items``.

    The rows are read a block at a time (:class:`~samesource.input.rows.ItemRows`), twice:
    the first pass measures each row and sums the complete rows (means and covariance), the
    second measures the Mahalanobis distances against them.

    Parameters
    ----------
    items : pandas.DataFrame or ItemRows
        All item columns (reverse-keyed or not), one row per respondent. A DataFrame's index
        holds the user-visible row numbers and is kept; ItemRows give theirs as ``labels``.
    raw_items : pandas.DataFrame or None
        The same respondents' answers as given, in questionnaire column order; its index
        must equal ``items``'s index. The longstring share counts its columns.
    scale_min, scale_max : float or None
        The response scale; answers outside it are counted in ``n_out_of_range``. ``None``
        for both skips the range check.
    rules : ScreeningRules or None
        Thresholds; the defaults when ``None``.
    columns : sequence of str or None
        The items screened, among the rows' items (all of them when ``None``).
    order : sequence of str or None
        The questionnaire's items in the order asked (among the rows' items): the answers
        as given are these columns, with ``reversed_items`` recoded back. Not with
        ``raw_items``. The longstring share counts these items.
    reversed_items : collection of str
        The reverse-keyed items among ``order`` (needs both ends of the scale).
    moments : MomentSums or None
        The count, means and centred cross-products of the rows that answer every screened
        item, in the screened columns' order (as a reader that summed them already has);
        ``None`` sums them in the first pass.

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
    if isinstance(items, pd.DataFrame):
        _check_numeric(items, "items")
        index = items.index
        rows: ItemRows = FrameRows(items)
    elif isinstance(items, ItemRows):
        rows = items
        index = pd.Index(rows.labels, copy=False)  # the labels themselves, not a copy
    else:
        raise TypeError("items must be a pandas DataFrame or ItemRows")
    screened = list(rows.names) if columns is None else [str(c) for c in columns]
    if not screened:
        raise ValueError("items has no columns")
    if raw_items is not None:
        if order is not None:
            raise ValueError("give the answers as given either as raw_items or as order, not both")
        _check_numeric(raw_items, "raw_items")
        if not raw_items.index.equals(index):
            raise ValueError("raw_items must have the same rows (index) as items")
    if reversed_items and order is None:
        raise ValueError("reversed_items needs order, the questionnaire's items")
    if (scale_min is None) != (scale_max is None):
        raise DesignError("give both ends of the response scale or neither", field="scale_min")
    if scale_min is not None and not scale_min < scale_max:
        raise DesignError(
            f"response scale minimum {scale_min:g} must be below the maximum {scale_max:g}",
            field="scale_min",
        )
    if reversed_items and scale_min is None:
        raise DesignError("undoing reverse keying needs both ends of the response scale", field="scale_min")
    if moments is not None and moments.mean.shape != (len(screened),):
        raise ValueError(f"moments are of {moments.mean.size} items, not the {len(screened)} screened")
    order = None if order is None else [str(c) for c in order]
    answers = _Answers(rows, screened, order, set(map(str, reversed_items)),
                       None if scale_min is None else scale_min + scale_max, raw_items)
    raw_given = raw_items is not None or order is not None
    raw_width = raw_items.shape[1] if raw_items is not None else len(order) if order is not None else len(screened)

    n, k = len(rows), len(screened)
    notes: list[str] = []
    ls_threshold = None
    if rules.longstring_min is not None:
        # Runs are whole numbers: "at least half of 25 items" means a run of 13.
        half = math.ceil(rules.longstring_share * raw_width - 1e-9)
        ls_threshold = max(int(rules.longstring_min), half)
    in_force = tuple(r for r, on in zip(RULE_NAMES, (
        ls_threshold is not None, rules.irv_min_items is not None, rules.mahalanobis_alpha is not None,
        rules.max_share_missing is not None, rules.flag_out_of_range and scale_min is not None),
        strict=True) if on)
    bit = {r: np.uint8(1 << i) for i, r in enumerate(RULE_NAMES)}

    counts_t = _count_dtype(max(k, raw_width))
    ls = np.zeros(n, dtype=counts_t)
    irv = np.full(n, np.nan)
    answered = np.zeros(n, dtype=counts_t)
    n_oor = np.zeros(n, dtype=counts_t)
    flags = np.zeros(n, dtype=np.uint8)
    d2 = np.full(n, np.nan)
    keys = None  # each row's packed pattern of answered items, once some row has a gap
    every = np.packbits(np.ones(k, dtype=bool))
    sums = MomentSums.of(np.empty((0, k))) if moments is None else moments

    # First pass: the per-row measures, the complete rows' sums, the rows' patterns.
    def measure(block: tuple[int, np.ndarray]) -> tuple[int, int, np.ndarray | None, MomentSums | None]:
        """The block's measures into the per-row arrays; returns where it lies, its rows'
        packed patterns (None when every row is complete) and its complete rows' sums."""
        s, B = block
        X, raw = answers.both(s, B)
        e = s + len(X)
        ls[s:e] = _longstring(raw)
        irv[s:e] = _intra_individual_variability(raw)
        if rules.irv_min_items is not None:
            flags[s:e] |= _same_answer(raw, rules.irv_min_items) * bit["irv"]
        obs = ~np.isnan(X)
        m = obs.sum(axis=1)
        answered[s:e] = m
        if scale_min is not None:
            n_oor[s:e] = (obs & ((X < scale_min) | (X > scale_max))).sum(axis=1)
        whole = m == k
        packed = None if whole.all() else np.packbits(obs, axis=1)
        block_sums = None if moments is not None else MomentSums.of(X if packed is None else X[whole])
        return s, e, packed, block_sums

    with _single_threaded_blas():
        for s, e, packed, block_sums in map_in_threads(measure, answers.blocks()):
            if keys is None and packed is not None:
                keys = np.empty((n, every.size), dtype=np.uint8)
                keys[:s] = every
            if keys is not None:
                keys[s:e] = every if packed is None else packed
            if block_sums is not None:  # added in the blocks' order: the same sums however many threads
                sums = sums.merged(block_sums)
    notes += _mahalanobis_distances(answers, n, sums, keys, d2)
    del keys
    if not raw_given:
        notes.append(
            "Longstring and response variability were computed on the items as given to "
            "screening, not on the raw answers in questionnaire order."
        )
    if ls_threshold is not None and ls_threshold > raw_width:  # a run is at most the questionnaire
        notes.append(
            f"Longstring rule cannot fire: the threshold {ls_threshold:g} exceeds the "
            f"{raw_width} items."
        )

    for s in range(0, n, ROW_BLOCK):  # the other flags, a block of rows at a time
        e = min(s + ROW_BLOCK, n)
        if ls_threshold is not None:
            flags[s:e] |= (ls[s:e] >= ls_threshold) * bit["longstring"]
        if rules.mahalanobis_alpha is not None:
            flags[s:e] |= _p_below(d2[s:e], answered[s:e], rules.mahalanobis_alpha) * bit["mahalanobis"]
        if rules.max_share_missing is not None:
            share = 1.0 - answered[s:e].astype(np.int64) / k
            flags[s:e] |= (share > rules.max_share_missing) * bit["missing"]
        if "out_of_range" in in_force:
            flags[s:e] |= (n_oor[s:e] > 0) * bit["out_of_range"]

    measures = RowMeasures(index, k, ls, irv, d2, answered, n_oor, flags, in_force)
    hit = np.flatnonzero(flags)
    flagged_rows = index[hit].tolist()
    reasons = {label: [r for r in in_force if f & bit[r]] for label, f in zip(flagged_rows, flags[hit], strict=True)}
    counts = {r: int(np.count_nonzero(flags & bit[r])) for r in in_force}
    texts = _rule_texts(rules, raw_width, ls_threshold, raw_given)
    if "out_of_range" in texts and "out_of_range" not in in_force:
        del texts["out_of_range"]
    return ScreeningResult(measures, flagged_rows, reasons, counts, texts, notes)
