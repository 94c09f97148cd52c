"""Which rows enter the analysis, and in what form the models see them.

Listwise deletion is the default (every model on the same complete rows). Full-information
ML (Arbuckle 1996; Enders 2010) keeps every row with at least one answer; the report
recommends it when listwise deletion would drop more than 5% of rows (Graham 2009 discusses
the bias of listwise deletion when data are not missing completely at random).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from samesource.engine.fitting import Moments, RawData
from samesource.input.prepare import PreparedData
from samesource.input.rows import FrameRows, ItemRows
from samesource.options import LISTWISE_DROP_LIMIT, AnalysisOptions


@dataclass
class MissingPlan:
    method: str                      # "listwise" | "fiml"
    frame: pd.DataFrame              # the analysis rows (items only, reverse-keyed)
    rows_total: int
    rows_with_missing: int
    listwise_drop_share: float       # share of rows that listwise deletion drops (or would)
    dropped_flagged: int = 0
    excluded_by_reason: dict[str, int] = field(default_factory=dict)
    recommendation: str | None = None
    # Moments of every item over the rows, formed once (listwise, complete rows): a model's
    # covariance matrix is a block of it, not another pass over the rows.
    _all_moments: Moments | None = field(default=None, init=False, repr=False, compare=False)
    _rows: ItemRows | None = field(default=None, init=False, repr=False, compare=False)

    @property
    def rows(self) -> ItemRows:
        """The analysis rows' answers a block at a time (measurement/input/rows.py): how a
        stage that reads rows is to read them."""
        if self._rows is None:
            self._rows = FrameRows(self.frame)
        return self._rows

    @property
    def rows_analyzed(self) -> int:
        return len(self.frame)

    @property
    def excluded_rows(self) -> int:
        return self.rows_total - self.rows_analyzed

    def data_for(self, items: Sequence[str]) -> Moments | RawData:
        """The model input for these items: sample moments (listwise) or raw rows (FIML)."""
        if self.method == "fiml":
            sub = self.frame[list(items)]
            sub = sub[sub.notna().any(axis=1)]
            return RawData(names=tuple(items), X=sub.to_numpy(dtype=float))
        return self.moments(items) or Moments.from_data(self.frame[list(items)].to_numpy(dtype=float),
                                                        names=tuple(items))

    def moments(self, items: Sequence[str]) -> Moments | None:
        """These items' means and covariance (divisor n) on the analysis rows, a block of the
        moments formed once, when the rows are complete (else None: rows with gaps)."""
        full = self._moments()
        if full is None:
            return None
        idx = np.array([full.names.index(i) for i in items], dtype=np.intp)
        return Moments(names=tuple(items), cov=full.cov[np.ix_(idx, idx)], n=full.n, mean=full.mean[idx])

    def _moments(self) -> Moments | None:
        """Moments of every column, when the rows are complete (else None)."""
        if self._all_moments is None and self.method == "listwise" and len(self.frame) >= 2:
            X = self.frame.to_numpy(dtype=float)
            if not np.isnan(X).any():
                self._all_moments = Moments.from_data(X, names=tuple(str(c) for c in self.frame.columns))
        return self._all_moments

    def corr(self, items: Sequence[str]) -> pd.DataFrame:
        """Item correlations on the analysis rows, as ``DataFrame.corr`` gives them
        (pairwise-complete where rows have gaps); from the moments when rows are complete."""
        full = self._moments()
        if full is None:
            return self.frame[list(items)].corr()
        idx = np.array([full.names.index(i) for i in items], dtype=np.intp)
        cov = full.cov[np.ix_(idx, idx)]
        sd = np.sqrt(np.diag(cov))
        with np.errstate(invalid="ignore", divide="ignore"):
            r = cov / np.outer(sd, sd)
        r = np.clip(r, -1.0, 1.0)
        np.fill_diagonal(r, np.where(sd > 0, 1.0, np.nan))
        names = pd.Index(list(items), dtype=object)
        return pd.DataFrame(r, index=names, columns=names)

    def complete(self, items: Iterable[str]) -> pd.DataFrame:
        """Rows complete on these items (for statistics that need complete data, e.g. alpha)."""
        return self.frame[list(items)].dropna()

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


def plan_missing(prepared: PreparedData, options: AnalysisOptions,
                 flagged: Iterable[int] = ()) -> MissingPlan:
    items = prepared.items
    total = len(items)
    by_reason: dict[str, int] = {}
    dropped_flagged = 0
    if options.drop_flagged:
        flagged_set = set(flagged)
        keep = ~items.index.isin(list(flagged_set))
        dropped_flagged = int((~keep).sum())
        items = items[keep]
        by_reason["flagged_by_screening"] = dropped_flagged
    has_missing = items.isna().any(axis=1)
    n_missing = int(has_missing.sum())
    share = float(n_missing / total) if total else 0.0

    recommendation = None
    if options.missing == "listwise":
        frame = items[~has_missing] if n_missing else items  # the same rows: no copy of them
        by_reason["missing_item"] = n_missing
        if share > LISTWISE_DROP_LIMIT:
            recommendation = (
                f"Listwise deletion dropped {share:.1%} of rows (more than {LISTWISE_DROP_LIMIT:.0%}). "
                "Run again with full-information ML (missing = \"fiml\"), which uses every answer "
                "and is less biased when answers are missing at random.")
    else:
        empty = items.isna().all(axis=1)
        frame = items[~empty] if empty.any() else items
        by_reason["no_answers"] = int(empty.sum())
    by_reason = {k: v for k, v in by_reason.items() if v}
    return MissingPlan(method=options.missing, frame=frame, rows_total=total,
                       rows_with_missing=n_missing, listwise_drop_share=share,
                       dropped_flagged=dropped_flagged, excluded_by_reason=by_reason,
                       recommendation=recommendation)

