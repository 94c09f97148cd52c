"""FIML's sufficient statistics: per missing-data pattern, a few weighted pseudo-rows.

The casewise normal -2 log-likelihood of the rows with pattern g (n_g rows answering the
items o, means m_g, centred cross-products C_g = sum_i (y_i - m_g)(y_i - m_g)') is

    n_g [k_g log 2pi + log|Sigma_oo|] + tr(Sigma_oo^-1 [C_g + n_g (m_g - mu_o)(m_g - mu_o)'])

(Arbuckle 1996; Enders 2010, "Applied Missing Data Analysis", ch. 3-4), so the rows enter
only through (n_g, m_g, C_g). Writing C_g = R_g' R_g with R_g the eigen-factor of C_g (at most
min(n_g - 1, k_g) rows: its rank) and adding one row sqrt(n_g) m_g, the quadratic terms and
their gradient are those of the original rows with each pattern's rows replaced by these
pseudo-rows: deviation rows with no mean to subtract, and a mean row from which
sqrt(n_g) mu_o is subtracted. The objective (:class:`~samesource.engine.fitting._FIMLObjective`,
with its Schur-complement inverses) then runs over at most sum_g (min(n_g - 1, k_g) + 1)
pseudo-rows: never more than the rows, and a bounded number (patterns x (items + 1)) however
many rows there are, so the statistics can also be accumulated chunk by chunk
(:func:`~samesource.engine.chunked_moments.pattern_sums`). A pattern of no more rows than
items (n_g <= k_g, as many pseudo-rows as rows) is held as its rows, which are then its own
pseudo-rows, each a mean row of weight 1: sum_i (y_i - mu_o)(y_i - mu_o)' is the same
C_g + n_g (m_g - mu_o)(m_g - mu_o)'.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from samesource.errors import DataError

if TYPE_CHECKING:  # chunked_moments imports fitting, which imports this module
    from samesource.engine.chunked_moments import PatternSums


@dataclass(frozen=True, eq=False)
class FIMLRows:
    """Per-pattern statistics as pseudo-rows (see the module docstring).

    ``Y0`` (r x p) holds each pseudo-row's answers, 0 where its pattern has none; ``obs``
    its pattern; ``scale`` sqrt(n_g) on a pattern's mean row (the multiple of mu it
    deviates from) and 0 on its deviation rows; ``pattern`` the pattern number of each
    pseudo-row, into ``observed`` (G x p, the sorted order of
    :func:`~samesource.engine.patterns.row_patterns`) and ``counts`` (rows per pattern).
    ``n`` rows with an answer, ``dropped`` rows without; ``ac_*`` each variable's
    available-case count, mean and variance (divisor: its count).
    """

    n: int
    dropped: int
    Y0: np.ndarray
    obs: np.ndarray
    scale: np.ndarray
    pattern: np.ndarray
    observed: np.ndarray
    counts: np.ndarray
    ac_n: np.ndarray
    ac_mean: np.ndarray
    ac_var: np.ndarray

    @property
    def k_sum(self) -> float:
        """Observed cells over all rows (the log 2pi term's multiplier)."""
        return float(self.counts @ self.observed.sum(axis=1))

    @property
    def complete(self) -> bool:
        return bool(self.observed.all())

    @classmethod
    def from_rows(cls, X: np.ndarray) -> FIMLRows:
        """The statistics of raw rows (NaN for a missing answer; rows with no answer are
        counted in ``dropped`` and left out)."""
        from samesource.engine.chunked_moments import pattern_sums  # see TYPE_CHECKING above

        X = np.asarray(X, dtype=float)
        dropped = int((~(~np.isnan(X)).any(axis=1)).sum())
        return cls.from_patterns(pattern_sums([X]), X.shape[1], dropped=dropped)

    @classmethod
    def from_patterns(cls, patterns: Sequence[PatternSums], p: int, *, dropped: int = 0) -> FIMLRows:
        """The statistics from :func:`~samesource.engine.chunked_moments.pattern_sums`
        (patterns in its order, ``p`` variables)."""
        ys, obs, scale, pattern = [], [], [], []
        observed = np.zeros((len(patterns), p), dtype=bool)
        counts = np.zeros(len(patterns))
        ac_n = np.zeros(p)
        ac_sum = np.zeros(p)
        for g, ps in enumerate(patterns):
            o = np.flatnonzero(ps.observed)
            observed[g] = ps.observed
            counts[g] = ps.n
            ac_n[o] += ps.n
            ac_sum[o] += ps.total
            if ps.rows is not None:  # few rows, held as they are: their own pseudo-rows
                rows = ps.rows
                sc = np.ones(rows.shape[0])
            else:
                s = ps.summed
                rank = min(s.n - 1, len(o))
                rows = np.zeros((0, len(o)))
                if rank > 0:
                    vals, vecs = np.linalg.eigh((s.cross + s.cross.T) / 2.0)
                    vals, vecs = vals[-rank:], vecs[:, -rank:]
                    pos = vals > 0
                    rows = np.sqrt(vals[pos])[:, None] * vecs[:, pos].T
                rows = np.vstack([rows, math.sqrt(s.n) * s.mean[None, :]])
                sc = np.zeros(rows.shape[0])
                sc[-1] = math.sqrt(s.n)
            full = np.zeros((rows.shape[0], p))
            full[:, o] = rows
            ys.append(full)
            obs.append(np.broadcast_to(ps.observed, full.shape))
            scale.append(sc)
            pattern.append(np.full(rows.shape[0], g, dtype=np.intp))
        n = int(counts.sum())
        if n < 2:
            raise DataError(f"need at least 2 rows with an answer, got {n}")
        with np.errstate(invalid="ignore", divide="ignore"):
            ac_mean = ac_sum / ac_n
            dev = np.zeros(p)
            for ps in patterns:
                o = np.flatnonzero(ps.observed)
                if ps.rows is not None:
                    dev[o] += np.sum((ps.rows - ac_mean[o]) ** 2, axis=0)
                else:
                    s = ps.summed
                    dev[o] += np.diag(s.cross) + s.n * (s.mean - ac_mean[o]) ** 2
            ac_var = dev / ac_n
        return cls(n=n, dropped=int(dropped), Y0=np.vstack(ys), obs=np.vstack(obs),
                   scale=np.concatenate(scale), pattern=np.concatenate(pattern),
                   observed=observed, counts=counts, ac_n=ac_n, ac_mean=ac_mean, ac_var=ac_var)


@dataclass(frozen=True, eq=False)
class PatternData:
    """FIML's input as per-pattern sums (:func:`~samesource.engine.chunked_moments.pattern_sums`
    of the rows on ``names``) instead of the rows: :func:`~samesource.engine.fitting.fit_model`
    takes it where it takes :class:`~samesource.engine.fitting.RawData`, with the same result."""

    names: tuple[str, ...]
    patterns: tuple[PatternSums, ...]

    def rows_for(self, columns: np.ndarray) -> FIMLRows:
        """The statistics on these columns (positions in ``names``, in the model's order)."""
        from samesource.engine.chunked_moments import project_patterns  # see TYPE_CHECKING above

        return FIMLRows.from_patterns(project_patterns(self.patterns, columns), len(columns))


__all__ = ["FIMLRows", "PatternData"]
