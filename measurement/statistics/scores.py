"""Scale scores: the unit-weighted mean of a construct's (reverse-keyed) items."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from samesource.engine.chunked_moments import MomentSums
from samesource.engine.fitting import Moments
from samesource.input.design import Design
from samesource.input.rows import FrameRows, ItemRows


def score_block(X: np.ndarray, groups: Sequence[np.ndarray]) -> np.ndarray:
    """Scale scores of a block of answers: per construct (its items' column positions in
    ``groups``), the mean of the items each row answered; NaN where it answered none."""
    out = np.empty((X.shape[0], len(groups)))
    with np.errstate(invalid="ignore", divide="ignore"):
        for j, cols in enumerate(groups):
            part = X[:, cols]
            seen = ~np.isnan(part)
            out[:, j] = np.where(seen, part, 0.0).sum(axis=1) / seen.sum(axis=1)
    return out


def _positions(rows: ItemRows, design: Design, names: Sequence[str]) -> tuple[list[str], list[np.ndarray]]:
    """The items the scores read (in the rows' order) and each construct's columns among them."""
    wanted = {it for n in names for it in design.constructs[n].items}
    items = [it for it in rows.names if it in wanted]
    where = {it: i for i, it in enumerate(items)}
    return items, [np.array([where[it] for it in design.constructs[n].items], dtype=np.intp) for n in names]


def score_array(rows: ItemRows, design: Design, names: Sequence[str]) -> np.ndarray:
    """Every row's scale scores (rows x constructs), computed a block of rows at a time."""
    items, groups = _positions(rows, design, names)
    out = np.empty((len(rows), len(names)))
    for start, X in rows.blocks(items):
        out[start:start + len(X)] = score_block(X, groups)
    return out


def scale_scores(frame: pd.DataFrame | ItemRows, design: Design, names: list[str] | None = None) -> pd.DataFrame:
    """Mean of each construct's items per row. Rows with gaps (under FIML) use the items they
    answered; a row with none of a construct's items gets NaN for it."""
    names = names if names is not None else list(design.constructs)
    rows = frame if isinstance(frame, ItemRows) else FrameRows(frame)
    return pd.DataFrame(score_array(rows, design, names), columns=list(names),
                        index=pd.Index(rows.labels) if isinstance(frame, ItemRows) else frame.index)


def score_moments(rows: ItemRows, design: Design, names: Sequence[str],
                  item_moments: Moments | None = None) -> MomentSums:
    """Count, means and centred cross-products of the scale scores over the rows with every
    score (``scale_scores(...).dropna()``). From the items' moments when the rows are complete
    (``item_moments``: a score is A x, so its cross-products are A C A'); else from the scores
    of each block, summed."""
    if item_moments is not None:
        where = {it: i for i, it in enumerate(item_moments.names)}
        A = np.zeros((len(names), len(item_moments.names)))
        for j, n in enumerate(names):
            cols = [where[it] for it in design.constructs[n].items]
            A[j, cols] = 1.0 / len(cols)
        return MomentSums(item_moments.n, A @ item_moments.mean, A @ (item_moments.cov * item_moments.n) @ A.T)
    items, groups = _positions(rows, design, names)
    total = MomentSums.of(np.empty((0, len(names))))
    for _, X in rows.blocks(items):
        S = score_block(X, groups)
        total = total.merged(MomentSums.of(S[~np.isnan(S).any(axis=1)]))
    return total
