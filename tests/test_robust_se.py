"""Robust (sandwich) standard errors (samesource.engine.robust_se).

Outside sources: statsmodels' heteroskedasticity-consistent HC0 covariance of an OLS slope
(White 1980), which the ML sandwich of a just-identified regression reproduces exactly; a
by-hand computation of Browne's (1984) sandwich from fourth-order sample moments (numpy
only) on the Holzinger & Swineford (1939) data shipped with semopy; and, for FIML, the
zero-sum property of scores at the optimum and the bootstrap spread of a simulation with
known truth.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from semopy.examples import holzinger39

from samesource.engine.fitting import Moments, RawData, fit_model
from samesource.engine.modelspec import ModelSpec, Param
from samesource.engine.robust_se import casewise_scores, pair_moments, robust_se

HS_ITEMS = [f"x{i}" for i in range(1, 10)]
HS_FACTORS = {"visual": HS_ITEMS[:3], "textual": HS_ITEMS[3:6], "speed": HS_ITEMS[6:]}


def hs_spec() -> ModelSpec:
    ps: list[Param] = []
    for f, its in HS_FACTORS.items():
        ps += [Param("load", f, it) for it in its]
        ps.append(Param("cov", f, f, free=False, value=1.0))
    ps += [Param("cov", it, it) for it in HS_ITEMS]
    fl = list(HS_FACTORS)
    ps += [Param("cov", a, b) for i, a in enumerate(fl) for b in fl[i + 1:]]
    return ModelSpec("hs", tuple(HS_ITEMS), tuple(fl), tuple(ps))


def skewed_regression(n: int = 400, seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.exponential(1.0, n)
    y = 0.5 * x + rng.normal(0, 1, n) * (0.5 + x)   # heteroskedastic errors
    return np.column_stack([x, y])


def test_regression_sandwich_equals_statsmodels_hc0():
    X = skewed_regression()
    spec = ModelSpec("reg", ("x", "y"), (), (Param("reg", "y", "x"), Param("cov", "x", "x"),
                                             Param("cov", "y", "y")))
    fit = fit_model(spec, Moments.from_data(X, names=["x", "y"]))
    rob = robust_se(fit, X)
    ols = sm.OLS(X[:, 1], sm.add_constant(X[:, 0])).fit(cov_type="HC0")   # statsmodels reference
    assert fit.est("reg", "y", "x") == pytest.approx(ols.params[1], rel=1e-6)
    assert rob.se_of("reg", "y", "x") == pytest.approx(ols.bse[1], rel=1e-4)
    # the normal-theory SE is the plain OLS one with divisor n (statsmodels' nonrobust x sqrt((n-2)/n))
    plain = sm.OLS(X[:, 1], sm.add_constant(X[:, 0])).fit()
    n = len(X)
    assert fit.se("reg", "y", "x") == pytest.approx(plain.bse[1] * np.sqrt((n - 2) / n), rel=1e-4)
    assert rob.se_of("reg", "y", "x") > 1.3 * fit.se("reg", "y", "x")   # heteroskedasticity shows


def _vech_index(p: int) -> tuple[np.ndarray, np.ndarray]:
    return np.tril_indices(p)


def test_cfa_sandwich_equals_browne_by_hand():
    """Browne (1984): V = (D'WD)^-1 D'W G W D (D'WD)^-1 / N, with D = d vech(Sigma)/d theta,
    W = 1/2 Dp'(Sigma^-1 x Sigma^-1)Dp the normal-theory weight and G the sample covariance of
    vech((x - xbar)(x - xbar)'): every piece computed here with numpy from its definition."""
    X = holzinger39.get_data()[HS_ITEMS].to_numpy(dtype=float)
    fit = fit_model(hs_spec(), Moments.from_data(X, names=HS_ITEMS))
    rob = robust_se(fit, X)
    st = fit._structure
    p = len(HS_ITEMS)
    r, c = _vech_index(p)

    def vech_sigma(x):
        return st.moments(x)[1][:p, :p][r, c]

    h = 1e-6
    D = np.column_stack([(vech_sigma(fit.x + h * e) - vech_sigma(fit.x - h * e)) / (2 * h)
                         for e in np.eye(fit.x.size)])
    Sig = fit.implied
    Si = np.linalg.inv(Sig)
    # duplication: vec(S) = Dp vech(S)
    Dp = np.zeros((p * p, len(r)))
    for k, (i, j) in enumerate(zip(r, c, strict=True)):
        Dp[i * p + j, k] = Dp[j * p + i, k] = 1.0
    W = 0.5 * Dp.T @ np.kron(Si, Si) @ Dp
    dev = X - X.mean(axis=0)
    prods = dev[:, r] * dev[:, c]
    G = np.cov(prods, rowvar=False, bias=True)
    n = X.shape[0]
    bread = np.linalg.inv(D.T @ W @ D)
    V = bread @ D.T @ W @ G @ W @ D @ bread / n
    np.testing.assert_allclose(rob.cov, V, rtol=2e-3, atol=1e-8)


def test_fiml_scores_sum_to_zero_and_sandwich_is_close_to_bootstrap():
    """FIML on incomplete, skewed data: the scores vanish at the optimum, and the sandwich
    SE of a loading is near the spread of 300 case-resampling bootstrap refits (simulation
    with known truth; numpy only)."""
    rng = np.random.default_rng(7)
    n = 500
    f = rng.normal(size=n)
    E = rng.exponential(1.0, size=(n, 4)) - 1.0          # skewed errors
    X = 0.7 * f[:, None] + 0.6 * E
    X[rng.random(X.shape) < 0.1] = np.nan
    items = ("a", "b", "c", "d")
    spec = ModelSpec("one", items, ("F",), tuple([Param("load", "F", i) for i in items]
                                                  + [Param("cov", "F", "F", free=False, value=1.0)]
                                                  + [Param("cov", i, i) for i in items]))
    fit = fit_model(spec, RawData(names=items, X=X))
    S = casewise_scores(fit, X)
    assert np.abs(S.sum(axis=0)).max() < 1e-3 * np.abs(S).sum(axis=0).max()
    rob = robust_se(fit, X)
    boot = []
    for _ in range(300):
        idx = rng.integers(0, n, n)
        g = fit_model(spec, RawData(names=items, X=X[idx]), n_starts=1, start=fit, compute_se=False)
        boot.append(g.est("cov", "a", "a"))
    sd = float(np.std(boot, ddof=1))
    # error variances of skewed items: the sandwich follows the bootstrap, the normal-theory SE does not
    assert rob.se_of("cov", "a", "a") == pytest.approx(sd, rel=0.2)
    assert fit.se("cov", "a", "a") < 0.8 * sd


def test_sandwich_from_pair_moments_equals_the_row_blocks():
    """The closed-form meat (fourth-order moments of the rows, formed once) against the
    casewise scores summed row by row: the same algebra, so equal to rounding (1e-10), on the
    Holzinger & Swineford data shipped with semopy, the moments taken over more columns than
    the model uses and in another order; and the OLS slope's sandwich still equals
    statsmodels' HC0 (White 1980)."""
    X = holzinger39.get_data()[HS_ITEMS].to_numpy(dtype=float)
    fit = fit_model(hs_spec(), Moments.from_data(X, names=HS_ITEMS))
    rows = robust_se(fit, X)
    extra = np.random.default_rng(3).normal(size=(len(X), 2))
    wider = np.column_stack([extra[:, 0], X[:, ::-1], extra[:, 1]])
    pm = pair_moments(wider, ["e1", *HS_ITEMS[::-1], "e2"])
    moments = robust_se(fit, pm)
    scale = np.abs(rows.cov).max()
    assert np.abs(moments.cov - rows.cov).max() <= 1e-10 * scale
    np.testing.assert_allclose(moments.std_se, rows.std_se, rtol=1e-10, atol=0)

    R = skewed_regression()
    spec = ModelSpec("reg", ("x", "y"), (), (Param("reg", "y", "x"), Param("cov", "x", "x"),
                                             Param("cov", "y", "y")))
    reg = fit_model(spec, Moments.from_data(R, names=["x", "y"]))
    ols = sm.OLS(R[:, 1], sm.add_constant(R[:, 0])).fit(cov_type="HC0")   # statsmodels reference
    assert robust_se(reg, pair_moments(R, ["x", "y"])).se_of("reg", "y", "x") == pytest.approx(ols.bse[1], rel=1e-4)


def test_pair_moments_refuse_incomplete_rows_and_fiml_fits():
    X = np.array([[1.0, 2.0], [np.nan, 1.0], [0.5, 0.0]])
    with pytest.raises(ValueError, match="complete rows"):
        pair_moments(X, ["a", "b"])
    rng = np.random.default_rng(2)
    Y = rng.normal(size=(200, 3))
    Y[rng.random(Y.shape) < 0.1] = np.nan
    items = ("a", "b", "c")
    spec = ModelSpec("one", items, ("F",), tuple([Param("load", "F", i) for i in items]
                                                  + [Param("cov", "F", "F", free=False, value=1.0)]
                                                  + [Param("cov", i, i) for i in items]))
    fit = fit_model(spec, RawData(names=items, X=Y))
    with pytest.raises(ValueError, match="FIML"):
        robust_se(fit, pair_moments(np.nan_to_num(Y), list(items)))


# -- from ItemRows (measurement/input/rows.py): a block of rows at a time ---------------------


def _answers(n: int, p: int, seed: int) -> np.ndarray:
    # simulated 5-point answers with correlated columns (invented data for the comparison)
    rng = np.random.default_rng(seed)
    return np.clip(np.round(3 + rng.standard_normal((n, p)) @ np.triu(np.ones((p, p))) / 2), 1, 5)


def test_pair_moments_from_item_rows_equal_numpy_whatever_the_rows_and_threads():
    """The two-pass pair moments over blocks against their definition computed with numpy
    (sum of v v' over every row at once, v the pair products of the centred row), on an
    array, on FrameRows and on CodedRows of the same answers (with a selection: blocks of
    uneven size), with one thread and with two (fixed partial sums: the same bits)."""
    import pandas as pd

    from samesource.engine.robust_se import PAIR_BLOCK_ROWS
    from samesource.input.rows import CodedRows, FrameRows

    X = _answers(2 * PAIR_BLOCK_ROWS + 1234, 5, 41)
    names = [f"q{j}" for j in range(5)]
    keep = np.random.default_rng(5).random(len(X)) < 0.8
    Xk = X[keep]

    def by_definition(Y):   # numpy, every row at once
        D = Y - Y.mean(axis=0)
        iu, ju = np.triu_indices(Y.shape[1])
        V = D[:, iu] * D[:, ju]
        return np.einsum("ia,ib->ab", V, V), V.sum(axis=0)

    one = pair_moments(Xk, names, threads=1)
    two = pair_moments(Xk, names, threads=2)
    np.testing.assert_array_equal(one.cross, two.cross)
    np.testing.assert_array_equal(one.sums, two.sums)
    frame = pair_moments(FrameRows(pd.DataFrame(X, columns=names)).select(keep))
    coded = pair_moments(CodedRows.encode(X, names, np.arange(len(X)), 1.0).select(keep), names[::-1])
    assert coded.names == tuple(names[::-1])
    for pm, Y in ((one, Xk), (frame, Xk), (coded, Xk[:, ::-1])):
        cross, sums = by_definition(Y)
        np.testing.assert_allclose(pm.cross, cross, rtol=1e-12, atol=1e-12 * np.abs(cross).max())
        np.testing.assert_allclose(pm.sums, sums, rtol=1e-12, atol=1e-12 * np.abs(sums).max())
        assert pm.n == keep.sum()


def test_fiml_sandwich_from_item_rows_equals_the_array():
    """FIML's casewise meat summed a block at a time from FrameRows and CodedRows (more
    columns than the model, in another order) equals the array's; the scores still sum to
    zero at the optimum (the score equations)."""
    import pandas as pd

    from samesource.input.rows import CodedRows, FrameRows

    X = _answers(3000, 5, 8)
    X[np.random.default_rng(9).random(X.shape) < 0.1] = np.nan
    items = ("a", "b", "c", "d")
    spec = ModelSpec("one", items, ("F",), tuple([Param("load", "F", i) for i in items]
                                                  + [Param("cov", "F", "F", free=False, value=1.0)]
                                                  + [Param("cov", i, i) for i in items]))
    fit = fit_model(spec, RawData(names=items, X=X[:, :4]))
    want = robust_se(fit, X[:, :4])
    names = ["e", "d", "c", "b", "a"]
    wide = X[:, [4, 3, 2, 1, 0]]
    for rows in (FrameRows(pd.DataFrame(wide, columns=names)),
                 CodedRows.encode(wide, names, np.arange(len(X)), 1.0)):
        got = robust_se(fit, rows)
        np.testing.assert_allclose(got.cov, want.cov, rtol=1e-10, atol=1e-14)
        S = casewise_scores(fit, rows)
        assert S.shape[0] == int((~np.isnan(X[:, :4])).any(axis=1).sum())
        assert np.abs(S.sum(axis=0)).max() < 1e-3 * np.abs(S).sum(axis=0).max()


def _exact_pair_cross(X: np.ndarray) -> np.ndarray:
    """sum_i v_i v_i' of whole-number rows in exact rational arithmetic (Python's integers and
    fractions): n * (x - mean) is an integer, so each sum is an integer over n**4."""
    from fractions import Fraction

    n = len(X)
    Z = (n * X - X.sum(axis=0)).astype(object)
    iu, ju = np.triu_indices(X.shape[1])
    V = Z[:, iu] * Z[:, ju]
    return np.array([[float(Fraction(int(v), n ** 4)) for v in row] for row in V.T.dot(V)])


@pytest.mark.parametrize("low, high", [(1, 5), (0, 10)])
def test_whole_number_pair_moments_are_the_exact_sums(low, high, monkeypatch):
    """Whole-number answers take the single-precision integer sums: checked against the sums in
    exact rational arithmetic (Python's fractions), to within double precision's last bits (the
    direct double-precision sums are 100 times further off on the 5-point case); with a 0-10
    scale the blocks shrink so every single-precision partial sum stays exact, and several
    blocks (made small here) add up the same."""
    from samesource.engine import robust_se as R

    rng = np.random.default_rng(3)
    X = rng.integers(low, high + 1, size=(3000, 4))
    X[:, 1] = np.clip(X[:, 0] + rng.integers(-1, 2, size=len(X)), low, high)
    exact = _exact_pair_cross(X)
    monkeypatch.setattr(R, "PAIR_BLOCK_ROWS", 700)
    got = pair_moments(X.astype(float), list("abcd"))
    assert R._exact_block_rows(X.min(axis=0) - np.rint(X.mean(axis=0)), X.max(axis=0) - np.rint(X.mean(axis=0))) > 0
    np.testing.assert_allclose(got.cross, exact, rtol=1e-14, atol=1e-14 * np.abs(exact).max())
    D = X - X.mean(axis=0)
    iu, ju = np.triu_indices(4)
    np.testing.assert_allclose(got.sums, (D[:, iu] * D[:, ju]).sum(axis=0), rtol=1e-13)


def test_exact_pair_moments_fall_back_where_single_precision_cannot_hold_the_sums():
    """Deviations beyond about 11 (a 0-100 slider) or answers that are not whole numbers take
    the double-precision sums; both agree with the exact sums to double precision's rounding."""
    from samesource.engine.robust_se import _exact_block_rows

    assert _exact_block_rows(np.array([-50.0]), np.array([50.0])) == 0
    assert _exact_block_rows(np.array([-2.0]), np.array([2.0])) > 0
    rng = np.random.default_rng(4)
    X = rng.integers(0, 101, size=(2000, 3))
    got = pair_moments(X.astype(float), list("abc"))
    exact = _exact_pair_cross(X)
    np.testing.assert_allclose(got.cross, exact, rtol=1e-12, atol=1e-12 * np.abs(exact).max())
    halves = X / 2.0
    got = pair_moments(halves, list("abc"))
    np.testing.assert_allclose(got.cross, exact / 16, rtol=1e-12, atol=1e-12 * np.abs(exact).max() / 16)
