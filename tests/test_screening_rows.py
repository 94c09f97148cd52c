"""The respondent screen read a block of rows at a time: the same measures from a DataFrame,
FrameRows and CodedRows of the same answers, and the same as before it read ItemRows.

Outside references: the measures' published definitions as tests/test_screening.py checks
them (longstring: Johnson 2005; IRV: Dunn et al. 2018, here numpy's row SD with divisor
m - 1; Mahalanobis distance: scipy.spatial.distance.mahalanobis against numpy's covariance
of the complete rows, Mahalanobis 1936), and pandas' median. The regression pin
tests/data/screening_before.npz holds what the DataFrame implementation gave on this
module's survey before the screen read ItemRows (``python tests/test_screening_rows.py``
rewrote it then); it is a pin of our own behaviour, not an outside check.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd

PIN = Path(__file__).resolve().parent / "data" / "screening_before.npz"
COLUMNS = ("longstring", "irv", "mahalanobis_d2", "mahalanobis_df", "mahalanobis_p",
           "share_missing", "n_out_of_range", "flag_longstring", "flag_irv", "flag_mahalanobis",
           "flag_missing", "flag_out_of_range", "flagged")


def survey(seed: int = 3, n: int = 1500):
    """Invented answers (a simulation, not a check of a statistic): four constructs of six
    5-point items, items 2 and 5 of each stored reverse-keyed; 3% of cells blank at random,
    planted straight-liners, rows with no or one answer, answers outside the scale.
    Returns (keyed items, answers as given in questionnaire order, reversed items)."""
    rng = np.random.default_rng(seed)
    traits = rng.multivariate_normal(np.zeros(4), 0.3 + 0.7 * np.eye(4), n)
    names, rev, cols = [], [], []
    for c in range(4):
        for i in range(6):
            y = 0.7 * traits[:, c] + np.sqrt(0.51) * rng.standard_normal(n)
            cols.append(np.digitize(y, [-1.3, -0.45, 0.45, 1.3]) + 1.0)
            names.append(f"t{c}_{i}")
            if i in (1, 4):
                rev.append(names[-1])
    keyed = np.column_stack(cols)
    keyed[rng.random(keyed.shape) < 0.03] = np.nan
    order = list(rng.permutation(names))  # the questionnaire's order, not the design's
    raw = pd.DataFrame(keyed.copy(), columns=names)
    raw[rev] = 6.0 - raw[rev]
    raw = raw[order].to_numpy()
    for r in rng.choice(n, 12, replace=False):  # straight-liners, answers as given
        raw[r] = rng.integers(1, 6)
    raw[20] = np.nan                 # no answer at all
    raw[21] = np.nan
    raw[21, 3] = 2.0                 # one answer
    raw[30, 5] = 7.0                 # outside the 1-5 scale
    raw[31, [0, 9]] = [0.0, 9.0]
    back = pd.DataFrame(raw, columns=order)
    keyed = back[names].copy()
    keyed[rev] = 6.0 - keyed[rev]
    index = np.arange(2, n + 2)      # the file's row numbers
    keyed.index = back.index = index
    return keyed, back, rev


def _pin() -> None:
    from samesource.input.screening import screen_respondents

    keyed, raw, _ = survey()
    res = screen_respondents(keyed, raw, scale_min=1, scale_max=5)
    pr = res.per_row
    np.savez_compressed(PIN, index=pr.index.to_numpy(), **{c: pr[c].to_numpy() for c in COLUMNS})


if __name__ == "__main__":
    sys.exit(_pin())
