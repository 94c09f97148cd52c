"""Moments accumulated chunk by chunk (samesource.engine.chunked_moments) against the same
moments of all rows in memory.

Outside references: numpy's covariance (``np.cov(..., bias=True)``) and means of the whole
matrix, pandas reading the whole file, and, per missing-data pattern, numpy on the rows of
that pattern picked out by hand. The data: the Holzinger & Swineford (1939) items shipped
with semopy (301 rows), with holes punched at random for the pattern sums.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from semopy.examples import holzinger39

from samesource.engine.chunked_moments import (
    MomentSums,
    chunked_moments,
    csv_chunks,
    pattern_sums,
    project_patterns,
)
from samesource.engine.fitting import Moments, fit_model

ITEMS = [f"x{i}" for i in range(1, 10)]


def _hs() -> np.ndarray:
    return holzinger39.get_data()[ITEMS].to_numpy(dtype=float)


def _chunks(X: np.ndarray, size: int):
    return (X[s:s + size] for s in range(0, len(X), size))


@pytest.mark.parametrize("size", [1, 7, 100, 301, 1000])
def test_chunked_covariance_equals_the_whole_matrix(size):
    X = _hs()
    m = chunked_moments(_chunks(X, size), ITEMS)
    assert m.n == len(X)
    np.testing.assert_allclose(m.mean, X.mean(axis=0), rtol=1e-13)
    np.testing.assert_allclose(m.cov, np.cov(X, rowvar=False, bias=True), rtol=1e-12, atol=1e-14)  # numpy


def test_chunked_listwise_leaves_out_incomplete_rows_and_fits_the_same():
    X = _hs()
    holes = X.copy()
    holes[[3, 50, 51, 200], [0, 4, 4, 8]] = np.nan
    m = chunked_moments(_chunks(holes, 64), ITEMS)
    keep = ~np.isnan(holes).any(axis=1)
    np.testing.assert_allclose(m.cov, np.cov(holes[keep], rowvar=False, bias=True), rtol=1e-12, atol=1e-14)
    # a model fitted to the chunked moments is the model fitted to the rows in memory
    from samesource.engine.modelspec import ModelSpec, Param

    ps = [Param("load", "F", it) for it in ITEMS[:3]] + [Param("cov", "F", "F", free=False, value=1.0)]
    ps += [Param("cov", it, it) for it in ITEMS[:3]]
    spec = ModelSpec("visual", tuple(ITEMS[:3]), ("F",), tuple(ps))
    sub = Moments(names=tuple(ITEMS[:3]), cov=m.cov[:3, :3], n=m.n)
    a = fit_model(spec, sub)
    b = fit_model(spec, Moments.from_data(holes[keep][:, :3], names=ITEMS[:3]))
    np.testing.assert_allclose(a.x, b.x, rtol=1e-8, atol=1e-10)


def test_merging_is_order_free_and_empty_chunks_are_nothing():
    X = _hs()
    a, b = MomentSums.of(X[:120]), MomentSums.of(X[120:])
    e = MomentSums.of(X[:0])
    ab, ba = a.merged(b), e.merged(b).merged(e).merged(a)
    np.testing.assert_allclose(ab.cross, ba.cross, rtol=1e-12)
    np.testing.assert_allclose(ab.cross / ab.n, np.cov(X, rowvar=False, bias=True), rtol=1e-12)


@pytest.mark.parametrize("size", [1, 37])   # one row a chunk: patterns pass k_g rows while merged
def test_pattern_sums_equal_numpy_per_pattern(size):
    rng = np.random.default_rng(11)
    X = _hs()
    X[rng.random(X.shape) < 0.08] = np.nan
    X[5] = np.nan  # a row with no answer: left out
    parts = pattern_sums(_chunks(X, size))
    assert any(p.rows is None for p in parts) and any(p.rows is not None for p in parts)
    obs = ~np.isnan(X)
    seen = 0
    for part in parts:
        rows = np.flatnonzero((obs == part.observed).all(axis=1))
        Y = X[np.ix_(rows, np.flatnonzero(part.observed))]
        assert part.sums.n == len(rows)
        np.testing.assert_allclose(part.sums.mean, Y.mean(axis=0), rtol=1e-12)
        np.testing.assert_allclose(part.sums.cross / len(rows), np.cov(Y, rowvar=False, bias=True).reshape(
            part.sums.cross.shape), rtol=1e-10, atol=1e-12)
        seen += len(rows)
    assert seen == int(obs.any(axis=1).sum())
    # the patterns come in one order however the rows were chunked
    again = pattern_sums(_chunks(X, 301))
    assert [p.observed.tolist() for p in again] == [p.observed.tolist() for p in parts]


def test_projected_pattern_sums_are_those_of_the_columns():
    rng = np.random.default_rng(12)
    X = _hs()
    X[rng.random(X.shape) < 0.1] = np.nan
    cols = [7, 2, 3]                       # a model's items, in its own order
    got = project_patterns(pattern_sums(_chunks(X, 50)), cols)
    want = pattern_sums([X[:, cols]])      # the rows' columns, checked against numpy above
    assert [p.observed.tolist() for p in got] == [p.observed.tolist() for p in want]
    for a, b in zip(got, want, strict=True):
        assert a.sums.n == b.sums.n
        np.testing.assert_allclose(a.sums.mean, b.sums.mean, rtol=1e-12)
        np.testing.assert_allclose(a.sums.cross, b.sums.cross, rtol=1e-10, atol=1e-12)


def test_csv_chunks_give_the_moments_pandas_gives(tmp_path):
    df = holzinger39.get_data()[ITEMS]
    path = tmp_path / "hs.csv"
    df.to_csv(path, index=False)
    m = chunked_moments(csv_chunks(str(path), ITEMS, rows=50), ITEMS)
    whole = pd.read_csv(path)[ITEMS]   # pandas reference, the whole file at once
    n = len(whole)
    np.testing.assert_allclose(m.cov, whole.cov().to_numpy() * (n - 1) / n, rtol=1e-12, atol=1e-14)


def _nbytes(obj) -> int:
    """Bytes of the arrays an object holds (its dataclass fields, followed into)."""
    import dataclasses

    if isinstance(obj, np.ndarray):
        return obj.nbytes
    if dataclasses.is_dataclass(obj):
        return sum(_nbytes(getattr(obj, f.name)) for f in dataclasses.fields(obj))
    return 0


def test_rare_patterns_take_about_the_rows_own_bytes_and_a_frequent_one_its_sums():
    # Scattered gaps: 20,000 rows of 60 items, each answer missing with chance 0.1, so
    # nearly every row has a pattern of its own (invented data: only the size is checked).
    # A full k x k cross-product matrix per pattern would be ~20,000 x 54^2 x 8 bytes
    # (~470 MB); kept as their answers they take at most the rows' own bytes. The 5,000
    # complete rows are one frequent pattern: its sums, (60^2 + 60) x 8 bytes.
    rng = np.random.default_rng(15)
    p = 60
    X = rng.normal(size=(20_000, p))
    X[rng.random(X.shape) < 0.1] = np.nan
    full = rng.normal(size=(5_000, p))
    parts = pattern_sums(_chunks(np.vstack([X, full]), 4096))
    assert len(parts) > 19_000
    complete = [ps for ps in parts if ps.observed.all()]
    assert len(complete) == 1 and complete[0].n == 5_000 + int((~np.isnan(X)).all(axis=1).sum())
    assert _nbytes(complete[0]) <= (p * p + p) * 8 + p
    assert sum(_nbytes(ps) for ps in parts) <= 1.1 * X.nbytes + _nbytes(complete[0])
    # the rows held are the pattern's answers: their sums are numpy's (checked above)
    one = next(ps for ps in parts if ps.rows is not None)
    Y = X[(~np.isnan(X) == one.observed).all(axis=1)][:, one.observed]
    np.testing.assert_array_equal(one.rows, Y)
