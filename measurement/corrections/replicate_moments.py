"""Bootstrap and jackknife replicates as weighted cross-products instead of resampled rows.

A case-resampling replicate draws n rows with replacement; its sample moments depend only on
how often each row was drawn, its multinomial count vector ``w`` (sum n): the mean is
``X'w / n`` and the covariance (divisor n) ``X' diag(w) X / n - mean mean'`` (Efron &
Tibshirani 1993, *An Introduction to the Bootstrap*, ch. 6 and 21, resampling as reweighting).
A jackknife deletion is the same with 0/1 weights. So a statistic that needs only the
moments of complete rows is computed without materialising the resampled rows.

For a batch of ``BATCH`` replicates the cross-products of every pair of columns are one
matrix product ``W (b x n) @ F (n x (p + p(p+1)/2))``, F holding the centred columns and
their pairwise products (the upper triangle; the covariance is symmetric), formed one block
of ``ROW_BLOCK`` rows at a time so memory stays bounded. The columns are centred at the full
sample's means first, so the products do not lose digits to large means (the covariance is
shift-invariant).

The rows are read a block at a time (:class:`~samesource.input.rows.ItemRows`) and so are the
weights: a replicate's draw counts come one draw block at a time
(:class:`~samesource.corrections.bootstrap.ReplicateWeights`), so memory is that of a block of
rows and of a block of weights per replicate held, whatever the number of rows.

Reproducibility: batches are fixed runs of replicate numbers (``BATCH`` r apart; a short last
batch is padded with zero weights, so every product has the same shape) and rows enter in
fixed blocks, single-threaded, so a replicate's matrix is the same bit for bit whatever the
chunk it is computed in, the executor, the number of workers or of replicates.

Not for incomplete rows: FIML fits per-pattern sums of the rows, which weights would need
per pattern and per replicate; the bootstrap then resamples rows (for ItemRows: each block's
rows repeated as often as drawn, corrections/paths.py ``ResampledRows``).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd

from samesource.corrections.paths import PathEstimator
from samesource.engine.robust_se import pair_products
from samesource.input.rows import FrameRows, ItemRows

BATCH = 32  # replicates per matrix product (and the unit chunks are rounded to)
ROW_BLOCK = 4096  # rows per block of pair products
READ_ROWS = 16 * ROW_BLOCK  # rows read at a time (a multiple of ROW_BLOCK: the same blocks of products)
# Weights held at once: a pass holds its replicates' weights of one read block (float64) and
# forms the pair products once: 512 replicates a pass at READ_ROWS rows.
WEIGHT_BYTES = 256 * 2**20


@dataclass(frozen=True)
class ReplicateMoments:
    """The moments of one replicate: ``n`` rows (sum of its weights), means and covariance
    with divisor n (as ``np.cov(..., bias=True)`` of the resampled rows)."""

    n: int
    mean: np.ndarray  # (p,)
    cov: np.ndarray  # (p, p)
    names: tuple[str, ...] = ()  # the columns (the rows' names; empty: as the estimator's items)


def weighted_moments(rows: ItemRows | np.ndarray, count: int,
                     weights: Callable[[int, int], Callable[[int, int], np.ndarray]]) -> list[ReplicateMoments]:
    """The moments of ``count`` weighted replicates of the complete rows (ItemRows, or an
    n x p array); ``weights(first, stop)`` gives, for replicates first..stop-1, a function
    ``w(start, end)`` of their weights of rows start..end-1 ((stop - first) x (end - start):
    draw counts, or 0/1 for deletions). Replicates are taken in passes whose weights of one
    read block fit :data:`WEIGHT_BYTES`; each pass reads the rows once, forms their pair
    products once and multiplies them by :data:`BATCH` weight rows at a time (see the module
    docstring)."""
    names = tuple(rows.names) if isinstance(rows, ItemRows) else ()  # an array's columns are positional
    if not isinstance(rows, ItemRows):
        X = np.asarray(rows, dtype=float)
        rows = FrameRows(pd.DataFrame(X, columns=[str(j) for j in range(X.shape[1])], copy=False))
    n, p = len(rows), len(rows.names)
    total = np.zeros(p)
    for _, X in rows.blocks(size=READ_ROWS):
        total += X.sum(axis=0)
    center = total / n
    iu, ju = np.triu_indices(p)
    sums = np.zeros((count, p + iu.size))
    totals = np.zeros(count)
    per_pass = max(BATCH, (WEIGHT_BYTES // (8 * min(max(n, 1), READ_ROWS))) // BATCH * BATCH)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):  # the same sums in every process
        for first in range(0, count, per_pass):
            stop = min(first + per_pass, count)
            w = weights(first, stop)
            for s, F in _pair_blocks(rows, center, iu, ju):
                W = np.asarray(w(s, s + F.shape[0]), dtype=float)
                if W.shape != (stop - first, F.shape[0]):
                    raise ValueError(f"weights are {W.shape}, expected ({stop - first}, {F.shape[0]})")
                totals[first:stop] += W.sum(axis=1)
                for b in range(first, stop, BATCH):
                    e = min(b + BATCH, stop)
                    part = W[b - first:e - first]
                    if e - b < BATCH:  # a short last batch, padded: the same product shape always
                        part = np.vstack([part, np.zeros((BATCH - (e - b), part.shape[1]))])
                    sums[b:e] += (part @ F)[:e - b]
    out = []
    for r in range(count):
        total_r = float(totals[r])
        m = sums[r, :p] / total_r
        cross = np.empty((p, p))
        cross[iu, ju] = sums[r, p:] / total_r
        cross[ju, iu] = cross[iu, ju]
        out.append(ReplicateMoments(n=int(round(total_r)), mean=center + m, cov=cross - np.outer(m, m),
                                    names=names))
    return out


def _pair_blocks(rows: ItemRows, center: np.ndarray, iu: np.ndarray, ju: np.ndarray
                 ) -> Iterator[tuple[int, np.ndarray]]:
    p = len(center)
    buf = np.empty((ROW_BLOCK, p + iu.size))  # one buffer for every block (each is used up first)
    for start, X in rows.blocks(size=READ_ROWS):
        for s in range(0, X.shape[0], ROW_BLOCK):
            F = buf[:min(ROW_BLOCK, X.shape[0] - s)]
            np.subtract(X[s:s + ROW_BLOCK], center, out=F[:, :p])
            pair_products(F[:, :p], out=F[:, p:])
            yield start + s, F


def moment_form(statistic):
    """``statistic`` as an object with ``from_moments(ReplicateMoments)``, or None when it
    needs the rows themselves. A statistic may offer ``from_moments`` itself; the path
    estimator gets it here (it computes everything from the item covariance matrix and the
    number of rows when no cell is missing)."""
    if callable(getattr(statistic, "from_moments", None)):
        return statistic
    if type(statistic) is PathEstimator:
        out = MomentPathEstimator.__new__(MomentPathEstimator)
        out.__dict__.update(statistic.__dict__)
        return out
    return None


class MomentPathEstimator(PathEstimator):
    """The path estimator fed a replicate's moments instead of its rows.

    Replaces only the two places where :class:`~samesource.corrections.paths.PathEstimator` reads its
    item matrix (the model input with the item covariance, and the scale-score covariance);
    a scale score is the mean of its items, so its covariance is ``A S A'`` with A the
    averaging weights. tests/test_bootstrap.py checks it against the estimator on the
    resampled rows."""

    def _item_data(self, X, moments=None):
        if isinstance(X, ReplicateMoments):
            from samesource.engine.fitting import Moments

            cov = X.cov
            if X.names and list(X.names) != self.items:  # the rows hold more columns, or in another order
                idx = [X.names.index(i) for i in self.items]
                cov = cov[np.ix_(idx, idx)]
            return Moments(names=tuple(self.items), cov=cov, n=X.n), cov
        return super()._item_data(X, moments)

    def _scores(self, X):
        if isinstance(X, ReplicateMoments):
            _, cov = self._item_data(X)
            A = np.zeros((len(self.score_names), len(self.items)))
            for k, c in enumerate(self.score_names):
                cols = [self.col[i] for i in self.design.constructs[c].items]
                A[k, cols] = 1.0 / len(cols)
            return A @ cov @ A.T, X.n, None   # no rows: replicates need no robust SEs
        return super()._scores(X)

    def from_moments(self, m: ReplicateMoments) -> np.ndarray:
        est, _ = self.estimate(m, compute_se=False)
        return self.vector(est)


__all__ = ["ReplicateMoments", "weighted_moments", "moment_form",
           "MomentPathEstimator", "BATCH", "ROW_BLOCK"]
