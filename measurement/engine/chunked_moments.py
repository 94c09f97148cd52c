"""Moments accumulated a chunk of rows at a time, for files larger than memory.

A model fitted by ML to complete rows needs only their count, means and covariance matrix;
FIML needs, per missing-data pattern, the same of the rows with that pattern (on the
variables they answered). Both are sums, so chunks of rows can be read one after another
and merged: chunk b with count n_b, means m_b and centred cross-products C_b joins the
running a as

    n = n_a + n_b,   m = m_a + (m_b - m_a) n_b / n,
    C = C_a + C_b + (m_b - m_a)(m_b - m_a)' n_a n_b / n

(Chan, Golub & LeVeque 1979, the pairwise update; centred per chunk, so no digits are lost
to large means). Peak memory is one chunk, whatever the number of rows.
docs/performance.md "Beyond memory" says what uses this and what does not yet.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from samesource.engine.fitting import Moments, centred_cross_products
from samesource.engine.patterns import row_patterns, rows_by_pattern


@dataclass(frozen=True)
class MomentSums:
    """Count, means and centred cross-products sum_i (x_i - m)(x_i - m)' of complete rows."""

    n: int
    mean: np.ndarray
    cross: np.ndarray

    @classmethod
    def of(cls, X: np.ndarray) -> MomentSums:
        """The sums of the complete rows ``X`` (no missing cell)."""
        X = np.asarray(X, dtype=float)
        if X.shape[0] == 0:
            return cls(0, np.zeros(X.shape[1]), np.zeros((X.shape[1], X.shape[1])))
        mean, cross = centred_cross_products(X)
        return cls(X.shape[0], mean, cross)

    def merged(self, other: MomentSums) -> MomentSums:
        """The sums of both sets of rows (the pairwise update in the module docstring)."""
        if other.n == 0:
            return self
        if self.n == 0:
            return other
        n = self.n + other.n
        delta = other.mean - self.mean
        return MomentSums(n, self.mean + delta * (other.n / n),
                          self.cross + other.cross + np.outer(delta, delta) * (self.n * other.n / n))

    def moments(self, names: Sequence[str]) -> Moments:
        """As :meth:`Moments.from_data` of all the rows: covariance with divisor n."""
        return Moments(names=tuple(names), cov=self.cross / self.n, n=self.n, mean=self.mean)


def chunked_moments(chunks: Iterable[np.ndarray], names: Sequence[str]) -> Moments:
    """Listwise moments of rows read in chunks (each n_chunk x len(names); rows with a
    missing cell are left out, as listwise deletion leaves them out)."""
    total = MomentSums.of(np.empty((0, len(names))))
    for X in chunks:
        X = np.asarray(X, dtype=float)
        total = total.merged(MomentSums.of(X[~np.isnan(X).any(axis=1)]))
    return total.moments(names)


@dataclass(frozen=True)
class PatternSums:
    """The rows of one missing-data pattern: which variables they answered, and either the
    sums of those answers (:class:`MomentSums` over the answered variables) or, while the
    pattern has no more rows than answered variables, the answers themselves (``rows``,
    n_g x k_g): a k_g x k_g cross-product matrix would then take more than the rows do, and
    with scattered gaps most patterns are of one or a few rows."""

    observed: np.ndarray  # bool (p,)
    summed: MomentSums | None = None
    rows: np.ndarray | None = None

    @property
    def n(self) -> int:
        return self.summed.n if self.rows is None else self.rows.shape[0]

    @property
    def total(self) -> np.ndarray:
        """The sum of the answers (n_g m_g), without forming the cross-products."""
        return self.rows.sum(axis=0) if self.rows is not None else self.summed.n * self.summed.mean

    @property
    def sums(self) -> MomentSums:
        """The sums (formed from the rows, each time, when the rows are held)."""
        return MomentSums.of(self.rows) if self.rows is not None else self.summed

    @classmethod
    def of(cls, observed: np.ndarray, rows: np.ndarray) -> PatternSums:
        """A pattern's answers (complete rows on its variables): held as they are up to k_g
        rows, as sums beyond."""
        if rows.shape[0] <= rows.shape[1]:
            return cls(observed, rows=rows)
        return cls(observed, summed=MomentSums.of(rows))

    def merged(self, other: PatternSums) -> PatternSums:
        """Both sets of rows (same pattern): rows while they are few, else exact sums."""
        if self.rows is not None and other.rows is not None:
            return PatternSums.of(self.observed, np.vstack([self.rows, other.rows]))
        return PatternSums(self.observed, summed=self.sums.merged(other.sums))


class PatternAccumulator:
    """:func:`pattern_sums` built up one chunk of rows at a time (:meth:`add`, then :meth:`result`)."""

    def __init__(self) -> None:
        self._acc: dict[bytes, PatternSums] = {}

    def add(self, X: np.ndarray) -> None:
        X = np.asarray(X, dtype=float)
        obs = ~np.isnan(X)
        pats, inv = row_patterns(obs)
        for pat, rows in zip(pats, rows_by_pattern(inv, len(pats)), strict=True):
            if pat.any():
                self._merge(PatternSums.of(pat.copy(), X[np.ix_(rows, np.flatnonzero(pat))]))

    def _merge(self, part: PatternSums) -> None:
        key = np.packbits(part.observed).tobytes()
        prev = self._acc.get(key)
        self._acc[key] = part if prev is None else prev.merged(part)

    def result(self) -> list[PatternSums]:
        if not self._acc:
            return []
        ordered, _ = row_patterns(np.array([p.observed for p in self._acc.values()]))
        return [self._acc[np.packbits(pat).tobytes()] for pat in ordered]


def pattern_sums(chunks: Iterable[np.ndarray]) -> list[PatternSums]:
    """FIML's sufficient statistics, per missing-data pattern, from rows read in chunks;
    patterns in the order :func:`~samesource.engine.patterns.row_patterns` sorts them, rows
    with no answer left out (FIML leaves them out)."""
    acc = PatternAccumulator()
    for X in chunks:
        acc.add(X)
    return acc.result()


def project_patterns(patterns: Sequence[PatternSums], columns: Sequence[int]) -> list[PatternSums]:
    """The pattern sums of the same rows on a subset of the variables (``columns``, in that
    order): each pattern's sums on the columns it answered, patterns that now coincide merged,
    rows with none of the columns left out. The sums of one pattern are exact sums, so this
    equals :func:`pattern_sums` of the rows' ``columns``."""
    cols = np.asarray(columns, dtype=np.intp)
    acc = PatternAccumulator()
    for ps in patterns:
        pat = ps.observed[cols]
        if not pat.any():
            continue
        pos = np.cumsum(ps.observed) - 1          # column -> place among the answered ones
        sel = pos[cols[pat]]
        if ps.rows is not None:
            acc._merge(PatternSums.of(pat, ps.rows[:, sel]))
        else:
            s = ps.summed
            acc._merge(PatternSums(pat, summed=MomentSums(s.n, s.mean[sel], s.cross[np.ix_(sel, sel)])))
    return acc.result()


def csv_chunks(path: str, columns: Sequence[str], rows: int = 100_000) -> Iterator[np.ndarray]:
    """The named numeric columns of a plain delimited file, ``rows`` rows at a time (pandas'
    C parser; an empty cell is NaN). For numeric files only: the full reader's checks and
    its row-and-column messages for a bad cell are not streamed yet (docs/performance.md)."""
    import pandas as pd

    with pd.read_csv(path, usecols=list(columns), chunksize=rows, dtype=float) as reader:
        for chunk in reader:
            yield chunk[list(columns)].to_numpy(dtype=float)


__all__ = ["MomentSums", "PatternSums", "PatternAccumulator", "chunked_moments", "pattern_sums",
           "project_patterns", "csv_chunks"]
