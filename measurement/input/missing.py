"""Which rows enter the analysis, and in what form the models see them.

Listwise deletion is the default (every model on the same complete rows). Full-information
ML (Arbuckle 1996; Enders 2010) keeps every row with at least one answer; the report
recommends it when listwise deletion would drop more than 5% of rows (Graham 2009 discusses
the bias of listwise deletion when data are not missing completely at random).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import pandas as pd

from samesource.engine.fitting import Moments, RawData
from samesource.input.prepare import PreparedData
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

    @property
    def rows_analyzed(self) -> int:
        return len(self.frame)

    @property
    def excluded_rows(self) -> int:
        return self.rows_total - self.rows_analyzed

    def data_for(self, items: Sequence[str]) -> Moments | RawData:
        """The model input for these items: sample moments (listwise) or raw rows (FIML)."""
        sub = self.frame[list(items)]
        if self.method == "fiml":
            sub = sub[sub.notna().any(axis=1)]
            return RawData(names=tuple(items), X=sub.to_numpy(dtype=float))
        return Moments.from_data(sub.to_numpy(dtype=float), names=tuple(items))

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
        frame = items[~has_missing]
        by_reason["missing_item"] = n_missing
        if share > LISTWISE_DROP_LIMIT:
            recommendation = (
                f"Listwise deletion dropped {share:.1%} of rows (more than {LISTWISE_DROP_LIMIT:.0%}). "
                "Run again with full-information ML (missing = \"fiml\"), which uses every answer "
                "and is less biased when answers are missing at random.")
    else:
        empty = items.isna().all(axis=1)
        frame = items[~empty]
        by_reason["no_answers"] = int(empty.sum())
    by_reason = {k: v for k, v in by_reason.items() if v}
    return MissingPlan(method=options.missing, frame=frame, rows_total=total,
                       rows_with_missing=n_missing, listwise_drop_share=share,
                       dropped_flagged=dropped_flagged, excluded_by_reason=by_reason,
                       recommendation=recommendation)

