"""Harman's single-factor test, exploratory form (Harman 1976; Podsakoff et al. 2003)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

SHARE_THRESHOLD = 0.50  # common practice: a first factor above half the variance is a flag


@dataclass(frozen=True)
class HarmanEFA:
    eigenvalues: list[float]
    first_factor_share: float
    factors_eigen_gt_1: int

    @property
    def flag(self) -> bool:
        return self.factors_eigen_gt_1 == 1 or self.first_factor_share > SHARE_THRESHOLD


def harman_efa(items: pd.DataFrame) -> HarmanEFA:
    """Unrotated principal-components solution of the item correlation matrix: the share of
    total item variance on the first factor (first eigenvalue / number of items) and the
    number of eigenvalues above 1 (Kaiser's rule). Rows with a missing item are dropped."""
    return harman_from_corr(np.corrcoef(items.dropna().to_numpy(dtype=float), rowvar=False))


def harman_from_corr(corr: np.ndarray) -> HarmanEFA:
    """:func:`harman_efa` from the items' correlation matrix (of the complete rows), formed
    elsewhere: the stage takes it from moments summed a block of rows at a time."""
    ev = np.sort(np.linalg.eigvalsh(corr))[::-1]
    return HarmanEFA(eigenvalues=[float(v) for v in ev], first_factor_share=float(ev[0] / len(ev)),
                     factors_eigen_gt_1=int(np.sum(ev > 1.0)))
