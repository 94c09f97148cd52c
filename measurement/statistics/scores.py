"""Scale scores: the unit-weighted mean of a construct's (reverse-keyed) items."""

from __future__ import annotations

import pandas as pd

from samesource.input.design import Design


def scale_scores(frame: pd.DataFrame, design: Design, names: list[str] | None = None) -> pd.DataFrame:
    """Mean of each construct's items per row. Rows with gaps (under FIML) use the items they
    answered; a row with none of a construct's items gets NaN for it."""
    names = names if names is not None else list(design.constructs)
    return pd.DataFrame({n: frame[list(design.constructs[n].items)].mean(axis=1, skipna=True)
                         for n in names}, index=frame.index)
