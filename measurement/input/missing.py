"""Which rows enter the analysis, and in what form the models see them.

Listwise deletion is the default (every model on the same complete rows). Full-information
ML (Arbuckle 1996; Enders 2010) keeps every row with at least one answer; the report
recommends it when listwise deletion would drop more than 5% of rows (Graham 2009 discusses
the bias of listwise deletion when data are not missing completely at random).

The plan reads its rows a block at a time (:class:`~samesource.input.rows.ItemRows`): the
moments, pairwise correlations and FIML pattern sums it hands out are sums over blocks, so
one code path serves a DataFrame in memory and answers kept as one byte per cell.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from samesource.engine.chunked_moments import (
    MomentSums,
    PatternAccumulator,
    PatternSums,
    project_patterns,
)
from samesource.engine.fiml import PatternData
from samesource.engine.fitting import Moments
from samesource.errors import DataError
from samesource.input.prepare import PreparedData
from samesource.input.rows import FrameRows, ItemRows
from samesource.options import LISTWISE_DROP_LIMIT, AnalysisOptions


@dataclass
class MissingPlan:
    method: str                      # "listwise" | "fiml"
    rows: ItemRows                   # the analysis rows (items only, reverse-keyed), a block at a time
    rows_total: int
    rows_with_missing: int
    listwise_drop_share: float       # share of rows that listwise deletion drops (or would)
    dropped_flagged: int = 0
    excluded_by_reason: dict[str, int] = field(default_factory=dict)
    recommendation: str | None = None
    # Sums over the rows formed once, on first use: every item's listwise moments (a model's
    # covariance matrix is a block of them, not another pass over the rows), FIML's pattern
    # sums, and the pairwise-complete sums of the correlations.
    _all_moments: Moments | None = field(default=None, init=False, repr=False, compare=False)
    _moments_done: bool = field(default=False, init=False, repr=False, compare=False)
    _patterns: list[PatternSums] | None = field(default=None, init=False, repr=False, compare=False)
    _pairwise: PairwiseSums | None = field(default=None, init=False, repr=False, compare=False)
    _frame: pd.DataFrame | None = field(default=None, init=False, repr=False, compare=False)

    @property
    def frame(self) -> pd.DataFrame:
        """The analysis rows as a DataFrame (index = row labels), for in-memory callers that
        still need one: the stages read :attr:`rows`. Built from the blocks (once) unless the
        rows are a DataFrame's already."""
        if isinstance(self.rows, FrameRows):
            return self.rows.frame
        if self._frame is None:
            X = np.empty((len(self.rows), len(self.rows.names)))
            for start, B in self.rows.blocks():
                X[start:start + len(B)] = B
            self._frame = pd.DataFrame(X, columns=list(self.rows.names),
                                       index=pd.Index(self.rows.labels))
        return self._frame

    @property
    def rows_analyzed(self) -> int:
        return len(self.rows)

    @property
    def excluded_rows(self) -> int:
        return self.rows_total - self.rows_analyzed

    def data_for(self, items: Sequence[str]) -> Moments | PatternData:
        """The model input for these items: sample moments (listwise) or per-pattern sums
        (FIML: rows with none of these items left out), both formed once over the rows."""
        if self.method == "fiml":
            idx = self._positions(items)
            return PatternData(names=tuple(items), patterns=tuple(project_patterns(self._pattern_sums(), idx)))
        found = self.complete_moments(items)
        if found is None:
            raise DataError(f"need at least 2 complete rows on the model's items, got {len(self.complete(items))}")
        return found

    def moments(self, items: Sequence[str]) -> Moments | None:
        """These items' means and covariance (divisor n) on the analysis rows, a block of the
        moments formed once, when the rows are complete (else None: rows with gaps)."""
        full = self._moments()
        if full is None:
            return None
        idx = self._positions(items)
        return Moments(names=tuple(items), cov=full.cov[np.ix_(idx, idx)], n=full.n, mean=full.mean[idx])

    def complete_moments(self, items: Sequence[str]) -> Moments | None:
        """Means and covariance (divisor n) of the rows complete on these items (listwise on
        them, for statistics that need complete rows, e.g. alpha); None below two such rows."""
        found = self.moments(items)
        if found is not None:
            return found
        sums = _listwise_sums(self.rows, items)
        return sums.moments(items) if sums.n >= 2 else None

    def complete(self, items: Iterable[str]) -> ItemRows:
        """The rows complete on these items, as a selection of :attr:`rows` (no copy of them)."""
        items = list(items)
        keep = np.empty(len(self.rows), dtype=bool)
        for start, X in self.rows.blocks(items):
            keep[start:start + len(X)] = ~np.isnan(X).any(axis=1)
        return self.rows if keep.all() else self.rows.select(keep)

    def _positions(self, items: Sequence[str]) -> np.ndarray:
        where = {n: i for i, n in enumerate(self.rows.names)}
        return np.array([where[i] for i in items], dtype=np.intp)

    def _moments(self) -> Moments | None:
        """Moments of every column, when the rows are complete (else None)."""
        if not self._moments_done:
            self._moments_done = True
            if self.method == "listwise" and len(self.rows) >= 2:
                sums = _listwise_sums(self.rows, self.rows.names, require_complete=True)
                if sums is not None:
                    self._all_moments = sums.moments(self.rows.names)
        return self._all_moments

    def _pattern_sums(self) -> list[PatternSums]:
        """FIML's per-pattern sums of every item over the rows, accumulated block by block once."""
        if self._patterns is None:
            acc = PatternAccumulator()
            for _, X in self.rows.blocks():
                acc.add(X)
            self._patterns = acc.result()
        return self._patterns

    def corr(self, items: Sequence[str]) -> pd.DataFrame:
        """Item correlations on the analysis rows, as ``DataFrame.corr`` gives them
        (pairwise-complete where rows have gaps); from the moments when rows are complete."""
        full = self._moments()
        idx = self._positions(items)
        if full is None:
            if self._pairwise is None:
                self._pairwise = PairwiseSums.of(self.rows)
            r = self._pairwise.corr(idx)
        else:
            r = moments_corr(full.cov[np.ix_(idx, idx)])
        names = pd.Index(list(items), dtype=object)
        return pd.DataFrame(r, index=names, columns=names)

    def describe(self) -> str:
        what = "listwise deletion of rows with a missing item" if self.method == "listwise" \
            else "full-information ML (rows with at least one answer)"
        if self.dropped_flagged:
            what += f" and dropping {self.dropped_flagged} flagged rows"
        return what

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "description": self.describe(),
            "rows_with_missing": self.rows_with_missing,
            "listwise_drop_share": self.listwise_drop_share,
            "recommendation": self.recommendation,
        }


def moments_corr(cov: np.ndarray) -> np.ndarray:
    """The correlation matrix of a covariance matrix (NaN on the diagonal of a constant item)."""
    sd = np.sqrt(np.diag(cov))
    with np.errstate(invalid="ignore", divide="ignore"):
        r = cov / np.outer(sd, sd)
    r = np.clip(r, -1.0, 1.0)
    np.fill_diagonal(r, np.where(sd > 0, 1.0, np.nan))
    return r


def _listwise_sums(rows: ItemRows, items: Sequence[str], *,
                   require_complete: bool = False) -> MomentSums | None:
    """Count, means and centred cross-products of the rows complete on ``items``, block by
    block (:class:`MomentSums`' pairwise update). With ``require_complete``, None as soon as a
    row has a gap."""
    total = MomentSums.of(np.empty((0, len(items))))
    for _, X in rows.blocks(items):
        gaps = np.isnan(X).any(axis=1)
        if gaps.any():
            if require_complete:
                return None
            X = X[~gaps]
        total = total.merged(MomentSums.of(X))
    return total


@dataclass(frozen=True)
class PairwiseSums:
    """Per pair of items (j, k), over the rows answering both: the count ``n[j, k]``, the sum
    of item j's answers ``s[j, k]``, of their squares ``ss[j, k]``, and the cross-products
    ``sp[j, k]``; answers shifted by ``shift`` (the first block's item means) so that the
    centred sums lose no digits to large means. A correlation is shift-free."""

    n: np.ndarray
    s: np.ndarray
    ss: np.ndarray
    sp: np.ndarray

    @classmethod
    def of(cls, rows: ItemRows) -> PairwiseSums:
        p = len(rows.names)
        n, s, ss, sp = (np.zeros((p, p)) for _ in range(4))
        shift = None
        for _, X in rows.blocks():
            answered = ~np.isnan(X)
            if shift is None:
                with np.errstate(invalid="ignore"):
                    seen = answered.sum(axis=0)
                    shift = np.where(seen > 0, np.where(answered, X, 0.0).sum(axis=0) / np.maximum(seen, 1), 0.0)
            V = answered.astype(float)
            Z = np.where(answered, X - shift, 0.0)
            n += V.T @ V
            s += Z.T @ V
            ss += (Z * Z).T @ V
            sp += Z.T @ Z
        return cls(n, s, ss, sp)

    def corr(self, idx: np.ndarray) -> np.ndarray:
        """Pearson correlations of the items at ``idx``, each pair on its rows answering both
        (``DataFrame.corr``'s pairwise-complete rule): NaN for a pair with fewer than two such
        rows or a constant item among them."""
        sel = np.ix_(idx, idx)
        n, sx, sxx, sxy = self.n[sel], self.s[sel], self.ss[sel], self.sp[sel]
        sy, syy = sx.T, sxx.T
        with np.errstate(invalid="ignore", divide="ignore"):
            cxy = sxy - sx * sy / n
            vx = sxx - sx * sx / n
            vy = syy - sy * sy / n
            # a constant item leaves rounding's variance at most: none (pandas gives NaN)
            tiny = 1e-13 * np.maximum(1.0, (sxx + syy) / np.maximum(n, 1))
            ok = (n >= 2) & (vx > tiny * n) & (vy > tiny * n)
            r = np.where(ok, cxy / np.sqrt(np.where(ok, vx * vy, 1.0)), np.nan)
        return np.clip(r, -1.0, 1.0)


def plan_missing(prepared: PreparedData, options: AnalysisOptions,
                 flagged: Iterable[int] = ()) -> MissingPlan:
    rows = prepared.rows
    total = len(rows)
    labels = rows.labels
    by_reason: dict[str, int] = {}
    dropped_flagged = 0
    keep = np.ones(total, dtype=bool)
    if options.drop_flagged:
        keep = ~np.isin(labels, np.fromiter(set(flagged), dtype=np.int64))
        dropped_flagged = int((~keep).sum())
        by_reason["flagged_by_screening"] = dropped_flagged
    # per row among the kept: a gap, and no answer at all
    has_missing = np.zeros(total, dtype=bool)
    empty = np.zeros(total, dtype=bool)
    for start, X in rows.blocks():
        gaps = np.isnan(X)
        has_missing[start:start + len(X)] = gaps.any(axis=1)
        empty[start:start + len(X)] = gaps.all(axis=1)
    has_missing &= keep
    empty &= keep
    n_missing = int(has_missing.sum())
    share = float(n_missing / total) if total else 0.0

    recommendation = None
    if options.missing == "listwise":
        keep &= ~has_missing
        by_reason["missing_item"] = n_missing
        if share > LISTWISE_DROP_LIMIT:
            recommendation = (
                f"Listwise deletion dropped {share:.1%} of rows (more than {LISTWISE_DROP_LIMIT:.0%}). "
                "Run again with full-information ML (missing = \"fiml\"), which uses every answer "
                "and is less biased when answers are missing at random.")
    else:
        keep &= ~empty
        by_reason["no_answers"] = int(empty.sum())
    by_reason = {k: v for k, v in by_reason.items() if v}
    return MissingPlan(method=options.missing, rows=rows if keep.all() else rows.select(keep),
                       rows_total=total, rows_with_missing=n_missing, listwise_drop_share=share,
                       dropped_flagged=dropped_flagged, excluded_by_reason=by_reason,
                       recommendation=recommendation)
