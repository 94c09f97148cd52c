"""FIML from per-pattern sufficient statistics (samesource.engine.fiml) against the casewise
likelihood of the rows.

Outside references: scipy's multivariate normal density (``scipy.stats.multivariate_normal``)
summed over the rows on the items each answered, and the central differences of that sum
for the gradient. The data: the fertility rates per country and year shipped with
statsmodels (``statsmodels.datasets.fertility``; 219 countries, about one cell in ten missing),
and the Holzinger & Swineford (1939) items shipped with semopy with holes punched at random.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from semopy.examples import holzinger39

from samesource.engine.chunked_moments import PatternSums, pattern_sums
from samesource.engine.fiml import FIMLRows
from samesource.engine.fitting import (
    RawData,
    _Deadline,
    _FIMLObjective,
    _rule_start,
    _Structure,
    fit_model,
)
from samesource.engine.modelspec import ModelSpec, Param

YEARS = [str(y) for y in range(1960, 2014, 6)]


def _fertility() -> np.ndarray:
    return sm.datasets.fertility.load_pandas().data[YEARS].to_numpy(dtype=float)


def _one_factor(items: list[str]) -> ModelSpec:
    ps = [Param("load", "F", items[0], free=False, value=1.0)]
    ps += [Param("load", "F", it) for it in items[1:]] + [Param("cov", it, it) for it in items]
    return ModelSpec("one", tuple(items), ("F",), tuple(ps + [Param("cov", "F", "F")]))


def _casewise(X: np.ndarray, Sig: np.ndarray, mu: np.ndarray) -> float:
    """-2 LL / N of the rows with an answer, by scipy's density on each row's answers."""
    total, n = 0.0, 0
    for row in X:
        o = ~np.isnan(row)
        if o.any():
            total += stats.multivariate_normal(mu[o], Sig[np.ix_(o, o)]).logpdf(row[o])
            n += 1
    return -2.0 * total / n


def _point(obj: _FIMLObjective, st: _Structure) -> np.ndarray:
    """A point away from the optimum: the start rule's parameters, the EM means moved."""
    sat = obj.saturated(_Deadline(60))
    return np.concatenate([_rule_start(st, sat[1]), sat[0] + 0.1])


def test_objective_and_gradient_equal_the_casewise_likelihood():
    X = _fertility()
    assert 0.05 < np.isnan(X).mean() < 0.2
    st = _Structure(_one_factor(YEARS))
    obj = _FIMLObjective(st, X)
    assert obj.n_patterns > 3 and obj.Y0.shape[0] < X.shape[0]   # fewer pseudo-rows than rows
    x = _point(obj, st)

    def ref(z: np.ndarray) -> float:
        Sig = st.moments(z[: st.q])[1][: st.p, : st.p]
        return _casewise(X, Sig, z[st.q:])

    assert obj.value(x) == pytest.approx(ref(x), rel=1e-12)          # scipy's density
    g = obj.gradient(x)
    h = 1e-5
    num = np.array([(ref(x + h * e) - ref(x - h * e)) / (2 * h) for e in np.eye(x.size)])
    np.testing.assert_allclose(g, num, rtol=1e-5, atol=1e-7 * np.abs(num).max())


def test_statistics_from_chunks_equal_those_from_the_rows():
    X = holzinger39.get_data()[[f"x{i}" for i in range(1, 10)]].to_numpy(dtype=float)
    X[np.random.default_rng(3).random(X.shape) < 0.15] = np.nan
    X[4] = np.nan                                          # a row with no answer
    st = _Structure(_one_factor([f"x{i}" for i in range(1, 10)]))
    whole = _FIMLObjective(st, X)
    pats = pattern_sums(X[s:s + 40] for s in range(0, len(X), 40))
    rows = FIMLRows.from_patterns(pats, X.shape[1], dropped=1)
    chunked = _FIMLObjective(st, rows)
    assert (chunked.n, chunked.dropped, chunked.n_patterns) == (whole.n, 1, whole.n_patterns)
    np.testing.assert_allclose(chunked.ac_var, np.nanvar(np.delete(X, 4, axis=0), axis=0), rtol=1e-12)
    x = _point(whole, st)
    assert chunked.value(x) == pytest.approx(whole.value(x), rel=1e-12)
    np.testing.assert_allclose(chunked.gradient(x), whole.gradient(x), rtol=1e-9, atol=1e-12)
    assert whole.value(x) == pytest.approx(_casewise(X, st.moments(x[: st.q])[1][: st.p, : st.p],
                                                     x[st.q:]), rel=1e-12)   # scipy's density


def test_complete_rows_give_one_pattern_of_at_most_p_plus_one_pseudo_rows():
    X = holzinger39.get_data()[[f"x{i}" for i in range(1, 10)]].to_numpy(dtype=float)
    rows = FIMLRows.from_rows(X)
    assert rows.Y0.shape == (10, 9) and rows.complete and rows.n == 301
    # The pseudo-rows' cross-products about the mean are the rows' (numpy's covariance).
    mean = rows.scale @ rows.Y0 / rows.n
    dev = rows.Y0 - rows.scale[:, None] * mean
    np.testing.assert_allclose(dev.T @ dev / rows.n, np.cov(X, rowvar=False, bias=True), rtol=1e-11)
    items = [f"x{i}" for i in range(1, 10)]
    assert fit_model(_one_factor(items), RawData.from_data(X, items), compute_se=False).converged


def test_patterns_held_as_rows_give_the_likelihood_their_sums_give():
    # Patterns of no more rows than items are held as their rows; the same patterns given
    # as sums (eigen pseudo-rows) give the same objective and gradient, both scipy's.
    X = _fertility()
    st = _Structure(_one_factor(YEARS))
    pats = pattern_sums([X])
    assert sum(p.rows is not None for p in pats) > 3 and any(p.rows is None for p in pats)
    held = _FIMLObjective(st, FIMLRows.from_patterns(pats, X.shape[1]))
    summed = _FIMLObjective(st, FIMLRows.from_patterns(
        [PatternSums(p.observed, summed=p.sums) for p in pats], X.shape[1]))
    x = _point(held, st)
    assert held.value(x) == pytest.approx(summed.value(x), rel=1e-12)
    np.testing.assert_allclose(held.gradient(x), summed.gradient(x), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(held.ac_var, summed.ac_var, rtol=1e-12)
    assert held.value(x) == pytest.approx(_casewise(X, st.moments(x[: st.q])[1][: st.p, : st.p],
                                                    x[st.q:]), rel=1e-12)   # scipy's density
