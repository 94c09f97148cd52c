"""Full collinearity variance inflation factors (Kock 2015)."""

from __future__ import annotations

import numpy as np
import pandas as pd

KOCK_THRESHOLD = 3.3  # Kock (2015): a VIF above 3.3 suggests common-method contamination


def full_collinearity_vif(scores: pd.DataFrame) -> dict[str, float]:
    """Kock (2015): regress each construct score on all the others; VIF = 1 / (1 - R^2).

    Computed from the inverse of the score correlation matrix, whose diagonal holds exactly
    these VIFs (the OLS R^2 of each score on the rest)."""
    return vif_from_corr(np.corrcoef(scores.dropna().to_numpy(dtype=float), rowvar=False),
                         list(scores.columns))


def vif_from_corr(corr: np.ndarray, names: list) -> dict[str, float]:
    """:func:`full_collinearity_vif` from the scores' correlation matrix (rows with every
    score), formed elsewhere."""
    inv = np.linalg.pinv(corr)
    return {c: float(inv[i, i]) for i, c in enumerate(names)}
