"""Tests of the ML / FIML fitting engine (samesource.engine.fitting).

Every check of a computed value names its outside source: a published value (quoted from
memory where marked), a data set shipped with semopy, or a general-purpose library (semopy
2.3.11 fitted to the same data, scipy, numpy). Invented data appear only in simulations
whose truth is known by construction.
"""

from __future__ import annotations

import math
import time

import numpy as np
import pandas as pd
import pytest
import semopy
from semopy.examples import holzinger39, political_democracy

from samesource.engine import fit_indices as fx
from samesource.engine import fitting
from samesource.engine.fitting import FitResult, Moments, RawData, delta_method, fit_model, refit
from samesource.engine.modelspec import ModelSpec, Param
from samesource.errors import DataError

HS_ITEMS = [f"x{i}" for i in range(1, 10)]
HS_FACTORS = {"visual": HS_ITEMS[:3], "textual": HS_ITEMS[3:6], "speed": HS_ITEMS[6:]}
HS_DESC = "visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6\nspeed =~ x7 + x8 + x9"
TIGHT = {"ftol": 1e-12}  # semopy's default SLSQP tolerance stops ~1e-3 short of the optimum


@pytest.fixture(scope="module", autouse=True)
def single_threaded_blas():
    """semopy's many small BLAS calls slow down ~10x when OpenBLAS threads compete for two
    busy cores (measured here: 27 s vs 3 s for its FIML fit)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover
        yield
        return
    with threadpool_limits(limits=1, user_api="blas"):
        yield


# ---------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------


def cfa_spec(factors: dict[str, list[str]], *, marker: bool = True, name: str = "cfa",
             labels: dict[str, str] | None = None) -> ModelSpec:
    """Correlated-factor CFA: first loading fixed at 1 (marker) or factor variances at 1."""
    labels = labels or {}
    ps: list[Param] = []
    for f, its in factors.items():
        for k, it in enumerate(its):
            if marker and k == 0:
                ps.append(Param("load", f, it, free=False, value=1.0))
            else:
                ps.append(Param("load", f, it, label=labels.get(it)))
    items = [it for its in factors.values() for it in its]
    ps += [Param("cov", it, it) for it in items]
    fl = list(factors)
    for i, a in enumerate(fl):
        ps.append(Param("cov", a, a) if marker else Param("cov", a, a, free=False, value=1.0))
        ps += [Param("cov", a, b) for b in fl[i + 1:]]
    return ModelSpec(name, tuple(items), tuple(fl), tuple(ps))


def semopy_table(model: semopy.Model, **kw) -> pd.DataFrame:
    t = model.inspect(**kw)
    return t.set_index(["lval", "op", "rval"])


def semopy_row(table: pd.DataFrame, op: str, lhs: str, rhs: str) -> pd.Series:
    """Our parameter in semopy's inspect() table (loadings are 'item ~ factor' there)."""
    if op == "load":
        return table.loc[(rhs, "~", lhs)]
    if op == "reg":
        return table.loc[(lhs, "~", rhs)]
    key = (lhs, "~~", rhs)
    return table.loc[key] if key in table.index else table.loc[(rhs, "~~", lhs)]


@pytest.fixture(scope="module")
def hs_data() -> pd.DataFrame:
    return holzinger39.get_data()


@pytest.fixture(scope="module")
def hs_fit(hs_data) -> FitResult:
    return fit_model(cfa_spec(HS_FACTORS, name="hs"), Moments.from_data(hs_data[HS_ITEMS]))


@pytest.fixture(scope="module")
def hs_semopy(hs_data) -> semopy.Model:
    m = semopy.Model(HS_DESC)
    m.fit(hs_data, options=TIGHT)
    return m


# ---------------------------------------------------------------------------------------
# Holzinger & Swineford (1939), three-factor CFA
# ---------------------------------------------------------------------------------------


def test_hs_fit_indices_match_semopy_and_published(hs_fit, hs_semopy):
    ref = semopy.calc_stats(hs_semopy).T["Value"]
    r = hs_fit
    assert r.status == "ok" and r.converged and r.proper and r.identified
    # semopy's calc_stats on the same data: chi2 85.3055, df 24, CFI .9306, TLI .8958,
    # RMSEA .09227, baseline chi2 918.85 on 36 df.
    assert r.df == 24 and r.baseline_df == 36
    assert r.chi2 == pytest.approx(ref["chi2"], abs=1e-3)
    assert r.chi2 == pytest.approx(85.31, abs=0.005)          # methods.md check value
    assert r.baseline_chi2 == pytest.approx(ref["chi2 Baseline"], rel=1e-6)
    assert r.cfi == pytest.approx(ref["CFI"], abs=1e-5)
    assert r.tli == pytest.approx(ref["TLI"], abs=1e-5)
    assert r.rmsea == pytest.approx(ref["RMSEA"], abs=1e-5)
    assert r.p == pytest.approx(ref["chi2 p-value"], rel=1e-3)
    # Published values (from memory): CFI .931, TLI .896, RMSEA .092 [.071, .114], SRMR .065.
    # The published interval divides by N rather than N - 1 (our 90% CI is [.0715, .1139]);
    # the difference is below 5e-4.
    assert round(r.cfi, 3) == 0.931 and round(r.tli, 3) == 0.896 and round(r.rmsea, 3) == 0.092
    assert r.rmsea_ci[0] == pytest.approx(0.071, abs=1e-3)
    assert r.rmsea_ci[1] == pytest.approx(0.114, abs=1e-3)
    assert r.srmr == pytest.approx(0.065, abs=5e-4)
    idx = r.fit_indices()
    assert set(idx) == {"chi2", "df", "p", "cfi", "tli", "rmsea", "rmsea_ci", "srmr", "n",
                        "loglik", "aic", "bic", "baseline_chi2", "baseline_df"}
    assert idx["n"] == 301


def test_hs_rmsea_ci_inverts_noncentral_chi2(hs_fit):
    # scipy.stats.ncx2 is the reference: at each bound's noncentrality the cdf of the
    # observed chi2 is .95 (lower) and .05 (upper) (Browne & Cudeck 1993).
    from scipy import stats
    r = hs_fit
    lam = [b * b * r.df * (r.n - 1) for b in r.rmsea_ci]
    assert stats.ncx2.cdf(r.chi2, r.df, lam[0]) == pytest.approx(0.95, abs=1e-6)
    assert stats.ncx2.cdf(r.chi2, r.df, lam[1]) == pytest.approx(0.05, abs=1e-6)


def test_hs_srmr_definitions(hs_fit):
    # Both standard SRMR definitions give the published .065 (from memory) here: at the ML
    # solution of this scale-invariant model the implied variances equal the sample ones
    # (checked against numpy below), so residual correlations and sample-sd-standardized
    # residual covariances coincide.
    r = hs_fit
    np.testing.assert_allclose(np.diag(r.implied), np.diag(r.sample_cov), rtol=1e-7)
    assert fx.srmr(r.sample_cov, r.implied) == pytest.approx(
        fx.srmr_by_sample_sd(r.sample_cov, r.implied), abs=1e-8)
    # numpy reference computation of the residual-correlation form.
    s, m = r.sample_cov, r.implied
    rs = s / np.sqrt(np.outer(np.diag(s), np.diag(s)))
    rm = m / np.sqrt(np.outer(np.diag(m), np.diag(m)))
    il = np.tril_indices(9)
    assert r.srmr == pytest.approx(math.sqrt(np.mean((rs - rm)[il] ** 2)), rel=1e-12)


def test_hs_estimates_ses_and_std_match_semopy(hs_fit, hs_semopy):
    # semopy fitted to the same data with a tight tolerance; its SEs use the expected
    # information (N/2) tr(Sigma^-1 Sigma_k Sigma^-1 Sigma_l) (semopy calc_fim), as ours do.
    tab = semopy_table(hs_semopy, std_est=True)
    for _, row in hs_fit.params.iterrows():
        ref = semopy_row(tab, row.op, row.lhs, row.rhs)
        assert row.estimate == pytest.approx(float(ref["Estimate"]), abs=1e-4)
        assert row["std"] == pytest.approx(float(ref["Est. Std"]), abs=1e-4)
        if row.free:
            assert row.se == pytest.approx(float(ref["Std. Err"]), rel=2e-3)
            assert row.p == pytest.approx(float(ref["p-value"]), abs=1e-4)
    # Model-implied covariance vs semopy's.
    sigma = hs_semopy.calc_sigma()[0]
    np.testing.assert_allclose(hs_fit.implied, sigma, atol=1e-4)
    # Lookups are symmetric for covariances.
    assert hs_fit.est("cov", "speed", "visual") == hs_fit.est("cov", "visual", "speed")
    assert hs_fit.se("load", "visual", "x2") == pytest.approx(0.0997, abs=1e-4)


def test_hs_fixed_variance_parametrization_is_equivalent(hs_data, hs_fit):
    # Reference: the marker-loading parametrization fitted above (itself checked against
    # semopy). Fixing factor variances at 1 instead is an equivalent model (Bollen 1989):
    # same chi2 and the same completely standardized solution.
    r2 = fit_model(cfa_spec(HS_FACTORS, marker=False), Moments.from_data(hs_data[HS_ITEMS]))
    assert r2.status == "ok"
    assert r2.chi2 == pytest.approx(hs_fit.chi2, abs=1e-6)
    for f, its in HS_FACTORS.items():
        for it in its:
            assert r2.std("load", f, it) == pytest.approx(hs_fit.std("load", f, it), abs=1e-6)
            assert r2.std_se("load", f, it) == pytest.approx(hs_fit.std_se("load", f, it),
                                                             abs=1e-4)
            assert r2.est("cov", it, it) == pytest.approx(hs_fit.est("cov", it, it), abs=1e-6)
    assert r2.est("cov", "visual", "speed") == pytest.approx(
        hs_fit.std("cov", "visual", "speed"), abs=1e-6)
    # Loading on the unit-variance scale = marker loading x sd(factor).
    assert r2.est("load", "visual", "x2") == pytest.approx(
        hs_fit.est("load", "visual", "x2") * math.sqrt(hs_fit.est("cov", "visual", "visual")),
        abs=1e-6)


def test_std_se_of_a_correlation_matches_normal_theory(hs_data):
    # Saturated two-variable model: the standardized covariance is the correlation r and
    # its delta-method SE under normal theory is (1 - r^2)/sqrt(N) (Fisher 1915; asymptotic
    # variance of a correlation, from memory). numpy computes r.
    spec = ModelSpec("pair", ("x1", "x2"), (), (
        Param("cov", "x1", "x1"), Param("cov", "x2", "x2"), Param("cov", "x1", "x2")))
    r = fit_model(spec, Moments.from_data(hs_data[["x1", "x2"]]))
    rho = float(np.corrcoef(hs_data["x1"], hs_data["x2"])[0, 1])
    assert r.std("cov", "x1", "x2") == pytest.approx(rho, abs=1e-8)
    assert r.std_se("cov", "x1", "x2") == pytest.approx((1 - rho**2) / math.sqrt(301), rel=1e-4)
    # the delta method of a function of the standardized values: r itself, and r^2, whose SE
    # is 2 |r| SE(r) (the chain rule)
    value, se = delta_method(r, lambda std: std[2])
    assert value == pytest.approx(rho, abs=1e-8)
    assert se == pytest.approx((1 - rho**2) / math.sqrt(301), rel=1e-4)
    value, se2 = delta_method(r, lambda std: std[2] ** 2)
    assert se2 == pytest.approx(2 * abs(rho) * se, rel=1e-6)
    # df = 0: fit indices that make sense, no NaN.
    assert r.df == 0 and r.chi2 == pytest.approx(0.0, abs=1e-8)
    assert r.p is None and r.tli is None and r.rmsea == 0.0 and r.rmsea_ci == [0.0, 0.0]
    assert r.cfi == 1.0
    for v in r.fit_indices().values():
        assert not (isinstance(v, float) and math.isnan(v))


# ---------------------------------------------------------------------------------------
# Bollen (1989) political democracy: regressions and residual covariances
# ---------------------------------------------------------------------------------------


def test_political_democracy_matches_semopy():
    data = political_democracy.get_data()
    meas = {"ind60": ["x1", "x2", "x3"], "dem60": ["y1", "y2", "y3", "y4"],
            "dem65": ["y5", "y6", "y7", "y8"]}
    ps: list[Param] = []
    for f, its in meas.items():
        ps.append(Param("load", f, its[0], free=False, value=1.0))
        ps += [Param("load", f, it) for it in its[1:]]
    ps += [Param("reg", "dem60", "ind60"), Param("reg", "dem65", "ind60"),
           Param("reg", "dem65", "dem60")]
    ps += [Param("cov", a, b) for a, b in
           [("y1", "y5"), ("y2", "y4"), ("y2", "y6"), ("y3", "y7"), ("y4", "y8"), ("y6", "y8")]]
    obs = [v for its in meas.values() for v in its]
    ps += [Param("cov", v, v) for v in obs] + [Param("cov", f, f) for f in meas]
    spec = ModelSpec("democracy", tuple(obs), tuple(meas), tuple(ps))
    r = fit_model(spec, Moments.from_data(data))      # data has the columns in another order
    m = semopy.Model(political_democracy.get_model())
    m.fit(data, options=TIGHT)
    tab = semopy_table(m, std_est=True)
    ref = semopy.calc_stats(m).T["Value"]
    assert r.status == "ok"
    # semopy: chi2 38.125 on 35 df (also Bollen 1989's published value, from memory).
    assert r.df == 35 and r.chi2 == pytest.approx(ref["chi2"], abs=1e-3)
    for _, row in r.params.iterrows():
        s = semopy_row(tab, row.op, row.lhs, row.rhs)
        assert row.estimate == pytest.approx(float(s["Estimate"]), abs=1e-3, rel=1e-4)
        assert row["std"] == pytest.approx(float(s["Est. Std"]), abs=1e-4)
        if row.free:
            assert row.se == pytest.approx(float(s["Std. Err"]), rel=5e-3)
    # Bollen's structural coefficients (from memory): 1.483, 0.572, 0.837.
    assert r.est("reg", "dem60", "ind60") == pytest.approx(1.483, abs=1e-3)
    assert r.est("reg", "dem65", "ind60") == pytest.approx(0.572, abs=1e-3)
    assert r.est("reg", "dem65", "dem60") == pytest.approx(0.837, abs=1e-3)


# ---------------------------------------------------------------------------------------
# Equality labels
# ---------------------------------------------------------------------------------------


def political_democracy_spec(label: bool = True) -> ModelSpec:
    """Bollen's (1989) model: three factors, regressions among them, a fixed first loading
    each and residual covariances, two of them equal through a label."""
    obs = ("y1", "y2", "y3", "y4", "y5", "y6", "y7", "y8", "x1", "x2", "x3")
    lats = ("ind60", "dem60", "dem65")
    ps: list[Param] = []
    for lat, its in zip(lats, (["x1", "x2", "x3"], ["y1", "y2", "y3", "y4"], ["y5", "y6", "y7", "y8"]),
                        strict=True):
        ps.append(Param("load", lat, its[0], free=False, value=1.0))
        ps += [Param("load", lat, it) for it in its[1:]]
    ps += [Param("reg", "dem60", "ind60"), Param("reg", "dem65", "ind60"), Param("reg", "dem65", "dem60")]
    ps += [Param("cov", v, v) for v in obs + lats]
    ps += [Param("cov", "y1", "y5"), Param("cov", "y2", "y4", label="c" if label else None),
           Param("cov", "y6", "y8", label="c" if label else None)]
    return ModelSpec("pd", obs, lats, tuple(ps))


def test_standardized_jacobian_matches_scipy_differentiation():
    # The analytic Jacobian of the standardized values (the std SEs' and the delta method's)
    # against scipy.differentiate.jacobian (an outside numerical differentiator, order 8) on
    # Bollen's political democracy data as semopy ships them: loadings fixed and free,
    # regressions among factors, residual covariances, a label shared by two of them.
    from scipy.differentiate import jacobian

    data = political_democracy.get_data()
    spec = political_democracy_spec()
    fit = fit_model(spec, Moments.from_data(data[list(spec.observed)]))
    assert fit.status == "ok"
    st = fit._structure

    def std_at(xs: np.ndarray) -> np.ndarray:
        flat = xs.reshape(xs.shape[0], -1)
        out = np.stack([st.standardized(flat[:, i]) for i in range(flat.shape[1])], axis=-1)
        return out.reshape((out.shape[0],) + xs.shape[1:])

    # entries with a zero derivative never meet a relative tolerance: an absolute one too
    ref = jacobian(std_at, fit.x, initial_step=1e-2, tolerances={"atol": 1e-10, "rtol": 1e-9})
    assert np.all(ref.success)
    np.testing.assert_allclose(st.standardized_jacobian(fit.x), ref.df, atol=1e-8)


def test_cheaper_evaluations_give_the_same_bits(hs_data):
    # The shortcuts of the evaluations reproduce what they replace bit for bit (numpy's
    # inverse and the dense product are the reference): E = I + A for a measurement model,
    # the information's Z h Z' as a reordering when no parameter is labelled.
    from samesource.engine.fitting import _info_from_whitened, _Structure

    rng = np.random.default_rng(4)
    for spec, two_layer in ((cfa_spec(HS_FACTORS, name="hs"), True), (political_democracy_spec(False), False)):
        st = _Structure(spec)
        assert st.two_layer is two_layer and st.e_single
        x = rng.uniform(0.2, 0.9, st.q)
        A, _ = st.matrices(x)
        E, Om = st.moments(x)
        if two_layer:
            assert np.array_equal(E, np.linalg.inv(np.eye(st.m) - A))
        At, Bt = (rng.standard_normal((st.p, st.Z.shape[1])) for _ in range(2))
        h = 2.0 * ((At.T @ At) * (Bt.T @ Bt) + (At.T @ Bt) * (At.T @ Bt).T)
        assert np.array_equal(_info_from_whitened(At, Bt, st), st.Z @ h @ st.Z.T)


def test_equal_loadings_label_matches_semopy(hs_data):
    # semopy treats a shared multiplier name as one parameter.
    spec = cfa_spec(HS_FACTORS, labels={"x2": "a", "x3": "a"})
    r = fit_model(spec, Moments.from_data(hs_data[HS_ITEMS]))
    m = semopy.Model("visual =~ x1 + a*x2 + a*x3\ntextual =~ x4 + x5 + x6\n"
                     "speed =~ x7 + x8 + x9")
    m.fit(hs_data, options=TIGHT)
    tab = semopy_table(m)
    ref = semopy.calc_stats(m).T["Value"]
    assert len(r.x) == 20 and r.df == 25 == int(ref["DoF"])
    assert r.chi2 == pytest.approx(ref["chi2"], abs=1e-3)
    assert r.est("load", "visual", "x2") == r.est("load", "visual", "x3")
    for _, row in r.params.iterrows():
        s = semopy_row(tab, row.op, row.lhs, row.rhs)
        assert row.estimate == pytest.approx(float(s["Estimate"]), abs=1e-4)
        if row.free:
            assert row.se == pytest.approx(float(s["Std. Err"]), rel=2e-3)


# ---------------------------------------------------------------------------------------
# Full-information ML
# ---------------------------------------------------------------------------------------


def test_fiml_without_missing_values_equals_ml(hs_data, hs_fit):
    # Reference: the ML fit (checked against semopy above); with complete rows FIML's
    # estimates and chi2 are the ML ones. Its SEs use the observed information: compared
    # with semopy's inspect(information="observed") on the same data.
    r = fit_model(cfa_spec(HS_FACTORS, name="hs"), RawData.from_data(hs_data[HS_ITEMS]))
    assert r.estimator == "fiml" and r.status == "ok"
    np.testing.assert_allclose(r.params["estimate"], hs_fit.params["estimate"], atol=1e-6)
    assert r.chi2 == pytest.approx(hs_fit.chi2, abs=1e-4)
    assert r.baseline_chi2 == pytest.approx(hs_fit.baseline_chi2, abs=1e-4)
    assert r.loglik == pytest.approx(hs_fit.loglik, abs=1e-5)
    assert r.srmr == pytest.approx(hs_fit.srmr, abs=1e-8)
    np.testing.assert_allclose(r.means.to_numpy(), hs_data[HS_ITEMS].mean().to_numpy(),
                               atol=1e-6)
    m = semopy.Model(HS_DESC)
    m.fit(hs_data, options=TIGHT)
    tab = semopy_table(m, information="observed")
    for _, row in r.params[r.params["free"]].iterrows():
        s = semopy_row(tab, row.op, row.lhs, row.rhs)
        assert row.se == pytest.approx(float(s["Std. Err"]), rel=5e-3)


def test_fiml_monotone_bivariate_closed_form(hs_data):
    # Monotone pattern: x1 always observed, x2 missing in the last 101 rows (of the shipped
    # data). MLE in closed form (Anderson 1957; Little & Rubin 2002, ch. 7): mean and
    # variance of x1 from all rows, the regression of x2 on x1 from the complete rows.
    y = hs_data[["x1", "x2"]].to_numpy(dtype=float).copy()
    y[200:, 1] = np.nan
    cc = y[:200]
    mu1, s11 = y[:, 0].mean(), y[:, 0].var()
    c = np.cov(cc.T, bias=True)
    beta = c[0, 1] / c[0, 0]
    mu2 = cc[:, 1].mean() + beta * (mu1 - cc[:, 0].mean())
    s22 = c[1, 1] - beta**2 * c[0, 0] + beta**2 * s11
    s12 = beta * s11
    spec = ModelSpec("pair", ("x1", "x2"), (), (
        Param("cov", "x1", "x1"), Param("cov", "x2", "x2"), Param("cov", "x1", "x2")))
    r = fit_model(spec, RawData(("x1", "x2"), y))
    assert r.status == "ok" and r.df == 0
    assert r.means["x1"] == pytest.approx(mu1, abs=1e-7)
    assert r.means["x2"] == pytest.approx(mu2, abs=1e-7)
    assert r.est("cov", "x1", "x1") == pytest.approx(s11, abs=1e-7)
    assert r.est("cov", "x2", "x2") == pytest.approx(s22, abs=1e-7)
    assert r.est("cov", "x2", "x1") == pytest.approx(s12, abs=1e-7)
    # The EM saturated model gives the same moments, so chi2 = 0.
    np.testing.assert_allclose(r.sample_cov, [[s11, s12], [s12, s22]], atol=1e-6)
    assert r.chi2 == pytest.approx(0.0, abs=1e-6)


def test_fiml_mcar_cfa_matches_semopy(hs_data):
    # semopy's ModelMeans fitted with obj="ML" maximizes the same casewise likelihood
    # with free intercepts (its Model with obj="FIML" ignores the means, so it is not used);
    # its inspect(information="observed") gives observed-information SEs, as ours are.
    # Two factors, six items, to keep semopy's numerical Hessian quick.
    factors = {"visual": HS_ITEMS[:3], "textual": HS_ITEMS[3:6]}
    d = hs_data[HS_ITEMS[:6]].copy()
    rng = np.random.default_rng(1)
    dm = d.mask(rng.random(d.shape) < 0.1)
    r = fit_model(cfa_spec(factors), RawData.from_data(dm))
    assert r.status == "ok" and r.estimator == "fiml"
    m = semopy.ModelMeans("visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6")
    m.fit(dm, obj="ML", options=TIGHT)
    tab = semopy_table(m, information="observed")
    for _, row in r.params.iterrows():
        s = semopy_row(tab, row.op, row.lhs, row.rhs)
        assert row.estimate == pytest.approx(float(s["Estimate"]), abs=1e-4)
        if row.free:
            assert row.se == pytest.approx(float(s["Std. Err"]), rel=5e-3)
    for it in HS_ITEMS[:6]:
        assert r.means[it] == pytest.approx(float(tab.loc[(it, "~", "1"), "Estimate"]), abs=1e-4)
    # A model nested in the saturated one: chi2 > 0 on the same 8 df as with ML.
    assert r.df == 8 and r.chi2 > 0 and r.baseline_chi2 > r.chi2


def test_fiml_drops_rows_without_answers(hs_data):
    y = hs_data[["x1", "x2", "x3"]].to_numpy(dtype=float).copy()
    y[:5] = np.nan
    spec = cfa_spec({"visual": ["x1", "x2", "x3"]})
    r = fit_model(spec, RawData(("x1", "x2", "x3"), y))
    ref = fit_model(spec, RawData(("x1", "x2", "x3"), y[5:]))   # the same rows, by hand
    assert r.n == 296 and any("no answer" in w for w in r.warnings)
    np.testing.assert_allclose(r.x, ref.x, atol=1e-8)


# ---------------------------------------------------------------------------------------
# Time cap
# ---------------------------------------------------------------------------------------


def simulated_cfa(n_factors: int, per: int, n: int, seed: int) -> tuple[ModelSpec, Moments]:
    """Simulation with known truth: loadings U(.5, .8), factor correlations .3."""
    rng = np.random.default_rng(seed)
    factors = {f"F{i + 1}": [f"F{i + 1}_{j + 1}" for j in range(per)] for i in range(n_factors)}
    spec = cfa_spec(factors, marker=False, name=f"sim{n_factors}x{per}")
    p = n_factors * per
    lam = np.zeros((p, n_factors))
    for i in range(n_factors):
        lam[i * per:(i + 1) * per, i] = rng.uniform(0.5, 0.8, per)
    phi = 0.3 + 0.7 * np.eye(n_factors)
    sigma = lam @ phi @ lam.T
    sigma += np.diag(1.0 - np.diag(sigma))
    X = rng.multivariate_normal(np.zeros(p), sigma, size=n)
    return spec, Moments.from_data(X, names=spec.observed)


def test_time_cap_stops_a_large_model():
    # The cap counts the fitting thread's CPU seconds (so does this check: the wall time of a
    # loaded machine says nothing about the cap); 1.5 s leaves room for the first start's
    # evaluation, which always completes, and the result's assembly.
    spec, mom = simulated_cfa(10, 12, 1000, seed=5)   # 120 items, 10 factors
    t0 = time.thread_time()
    r = fit_model(spec, mom, time_limit=0.05)
    assert time.thread_time() - t0 < 1.5
    assert r.capped and r.status == "capped"
    assert r.elapsed >= 0.05   # stopped at its cap, counted in the same clock
    assert "time limit" in r.warnings[0]
    assert np.all(np.isfinite(r.x)) and r.chi2 > 0


def test_the_cap_counts_computation_not_waiting():
    # A fit waits on nothing but the CPU, so its cap counts CPU seconds of the fitting
    # thread: time spent asleep (or waiting for a core on a loaded machine) does not move it.
    deadline = fitting._Deadline(0.1)
    time.sleep(0.2)
    assert not deadline.over()
    assert deadline.elapsed() < 0.1
    end = time.thread_time() + 0.15
    while time.thread_time() < end:   # computing does move it
        sum(range(1000))
    assert deadline.over() and deadline.elapsed() >= 0.1


def test_a_capped_refit_stops_with_the_capped_status(hs_data, hs_fit):
    # refit's cap is the same clock (the bootstrap's replicates): a cap of 0 stops after the
    # first evaluation, which always completes so that there is a point to report.
    r = refit(hs_fit, Moments.from_data(hs_data[HS_ITEMS]), time_limit=0.0)
    assert r.capped and r.status == "capped" and "time limit" in r.warnings[0]


def method_factor_data(n: int = 3000, k: int = 4, seed: int = 11):
    """methods.md simulation (known truth): traits S, E (E on S = .30), marker G, method M;
    every item 0.70 trait + 0.35 M + error."""
    rng = np.random.default_rng(seed)
    s = rng.standard_normal(n)
    e = 0.3 * s + math.sqrt(1 - 0.09) * rng.standard_normal(n)
    g = rng.standard_normal(n)
    mth = rng.standard_normal(n)
    cols = {}
    for pre, t in (("s", s), ("e", e), ("g", g)):
        for j in range(k):
            cols[f"{pre}{j + 1}"] = (0.7 * t + 0.35 * mth
                                     + math.sqrt(1 - 0.49 - 0.1225) * rng.standard_normal(n))
    return pd.DataFrame(cols)


def free_method_factor_spec(items: list[str]) -> ModelSpec:
    """Three traits (items s*, e*, g*, first loading fixed) and a method factor M loading freely
    on every item, its variance fixed at 1, the trait correlations free."""
    ps: list[Param] = []
    for lat, pre in (("S", "s"), ("E", "e"), ("G", "g")):
        its = [c for c in items if c.startswith(pre)]
        ps.append(Param("load", lat, its[0], free=False, value=1.0))
        ps += [Param("load", lat, it) for it in its[1:]] + [Param("cov", lat, lat)]
    ps += [Param("cov", "S", "E"), Param("cov", "S", "G"), Param("cov", "E", "G")]
    ps += [Param("load", "M", it) for it in items] + [Param("cov", "M", "M", free=False, value=1.0)]
    ps += [Param("cov", it, it) for it in items]
    return ModelSpec("method_free", tuple(items), ("S", "E", "G", "M"), tuple(ps))


def test_free_method_factor_returns_within_its_cap():
    # methods.md: this model (method loadings all free, method variance fixed at 1, trait
    # correlations free) ran past 60 s in semopy. Ours must return within its cap.
    data = method_factor_data()
    spec = free_method_factor_spec(list(data.columns))
    t0 = time.thread_time()   # the cap's own clock: CPU seconds of this thread
    r = fit_model(spec, Moments.from_data(data), time_limit=20.0)
    assert time.thread_time() - t0 < 22.0
    assert r.status in {"ok", "improper", "unidentified", "not_converged", "capped"}
    assert r.status == "ok" or r.warnings  # anything but ok is explained


# ---------------------------------------------------------------------------------------
# Heywood cases and identification
# ---------------------------------------------------------------------------------------


def test_heywood_case_is_reported():
    # One factor, three indicators: just identified, with lambda_a^2 = r_ab r_ac / r_bc
    # (the closed-form three-indicator solution, Bollen 1989 ch. 7, from memory), so these
    # correlations force the error variance of a to 1 - .64/.5 = -0.28.
    C = np.array([[1.0, 0.8, 0.8], [0.8, 1.0, 0.5], [0.8, 0.5, 1.0]])
    spec = cfa_spec({"F": ["a", "b", "c"]}, marker=False)
    r = fit_model(spec, Moments(("a", "b", "c"), C, 200))
    assert not r.proper and r.status == "improper"
    assert r.est("cov", "a", "a") == pytest.approx(-0.28, abs=1e-6)
    assert r.est("load", "F", "a") == pytest.approx(math.sqrt(1.28), abs=1e-6)
    assert any("error variance of a" in h for h in r.heywood)
    assert any("Heywood" in w for w in r.warnings)


def test_unidentified_factor_is_reported(hs_data):
    # A two-indicator factor uncorrelated with everything else, both loadings and its
    # variance free: three moments for five parameters (Bollen 1989, ch. 7, from memory).
    ps = [Param("load", "visual", "x1", free=False, value=1.0), Param("load", "visual", "x2"),
          Param("load", "visual", "x3"), Param("cov", "visual", "visual"),
          Param("load", "F2", "x4"), Param("load", "F2", "x5"), Param("cov", "F2", "F2")]
    obs = ("x1", "x2", "x3", "x4", "x5")
    ps += [Param("cov", v, v) for v in obs]
    r = fit_model(ModelSpec("unid", obs, ("visual", "F2"), tuple(ps)),
                  Moments.from_data(hs_data[list(obs)]))
    assert not r.identified and r.status == "unidentified"
    assert any("information matrix" in w for w in r.warnings)
    # The identified product lambda4 lambda5 phi still reproduces the sample covariance
    # (numpy reference).
    cov45 = float(np.cov(hs_data["x4"], hs_data["x5"], bias=True)[0, 1])
    assert r.implied[3, 4] == pytest.approx(cov45, rel=1e-6)


# ---------------------------------------------------------------------------------------
# Warm starts, seeds, data handling, performance
# ---------------------------------------------------------------------------------------


def test_refit_on_same_data_returns_same_estimates(hs_data, hs_fit):
    mom = Moments.from_data(hs_data[HS_ITEMS])
    r = refit(hs_fit, mom)
    assert r.starts_tried == 1 and r.iterations <= 2 and r.status == "ok"
    np.testing.assert_allclose(r.x, hs_fit.x, atol=1e-7)
    assert np.isnan(r.params["se"]).all()        # compute_se=False by default in refit
    # A dict start (parameter key -> value) is tried first and reaches the same solution.
    start = {(o, a, b): v for o, a, b, v in hs_fit.params[["op", "lhs", "rhs", "estimate"]]
             .itertuples(index=False)}
    r2 = fit_model(hs_fit.spec, mom, start=start, n_starts=1)
    np.testing.assert_allclose(r2.x, hs_fit.x, atol=1e-7)


def test_refit_fiml_warm_start(hs_data):
    d = hs_data[HS_ITEMS].copy()
    dm = d.mask(np.random.default_rng(2).random(d.shape) < 0.05)
    r = fit_model(cfa_spec(HS_FACTORS), RawData.from_data(dm), compute_se=False)
    r2 = refit(r, RawData.from_data(dm))
    assert r2.iterations <= 2
    np.testing.assert_allclose(r2.x, r.x, atol=1e-7)
    np.testing.assert_allclose(r2.means, r.means, atol=1e-7)


def test_starts_reproducible_under_seed(hs_data):
    mom = Moments.from_data(hs_data[HS_ITEMS])
    spec = cfa_spec(HS_FACTORS)
    a = fit_model(spec, mom, seed=7, n_starts=3)
    b = fit_model(spec, mom, seed=7, n_starts=3)
    assert a.starts_tried == b.starts_tried == 3
    np.testing.assert_array_equal(a.x, b.x)
    assert a.iterations == b.iterations


def test_data_selection_and_errors(hs_data, hs_fit):
    # Extra variables, another column order: selected and reordered to spec.observed.
    cols = ["x9", "ageyr", "x3", "x1", "x2", "x5", "x4", "x8", "x7", "x6"]
    r = fit_model(hs_fit.spec, Moments.from_data(hs_data[cols]))
    np.testing.assert_allclose(r.x, hs_fit.x, atol=1e-7)
    with pytest.raises(DataError):
        fit_model(hs_fit.spec, Moments.from_data(hs_data[HS_ITEMS[:8]]))
    with pytest.raises(ValueError):
        Moments.from_data(hs_data[HS_ITEMS].mask(hs_data[HS_ITEMS] > 8))
    # numpy reference for the ML moments (divisor N).
    m = Moments.from_data(hs_data[HS_ITEMS])
    np.testing.assert_allclose(m.cov, np.cov(hs_data[HS_ITEMS].to_numpy().T, bias=True))


def test_result_tables_and_summary(hs_fit):
    r = hs_fit
    assert list(r.params.columns) == ["op", "lhs", "rhs", "label", "free", "estimate", "se",
                                      "z", "p", "std", "std_se"]
    assert len(r.params) == len(r.spec.params)
    # all_cov holds observed and latent variables; its observed block is the implied Sigma
    # and its latent block the estimated factor covariances.
    assert list(r.all_cov.index) == HS_ITEMS + list(HS_FACTORS)
    np.testing.assert_allclose(r.all_cov.loc[HS_ITEMS, HS_ITEMS].to_numpy(), r.implied)
    assert r.all_cov.loc["visual", "speed"] == pytest.approx(r.est("cov", "visual", "speed"))
    text = r.summary()
    assert "Chi-square" in text and "visual =~ x2" in text and "RMSEA" in text
    # Log-likelihood vs scipy's multivariate normal at the ML estimates, means at the
    # sample means; AIC counts the 21 model parameters and 9 means.
    from scipy import stats
    X = holzinger39.get_data()[HS_ITEMS].to_numpy()
    ll = stats.multivariate_normal(X.mean(axis=0), r.implied).logpdf(X).sum()
    assert r.loglik == pytest.approx(ll, rel=1e-10)
    assert r.aic == pytest.approx(-2 * ll + 2 * 30, rel=1e-10)


def test_sixty_item_model_fits_and_refits():
    # Simulation with known truth (7 factors, 60 items; timing targets are measured loosely
    # by the developers, not asserted here).
    rng = np.random.default_rng(3)
    per = [9, 9, 9, 9, 8, 8, 8]
    factors = {f"F{i + 1}": [f"F{i + 1}_{j + 1}" for j in range(k)] for i, k in enumerate(per)}
    spec = cfa_spec(factors, marker=False, name="sixty")
    p = sum(per)
    lam = np.zeros((p, 7))
    j = 0
    for i, k in enumerate(per):
        lam[j:j + k, i] = 0.7
        j += k
    sigma = lam @ (0.3 + 0.7 * np.eye(7)) @ lam.T
    sigma += np.diag(1 - np.diag(sigma))
    X = rng.multivariate_normal(np.zeros(p), sigma, size=2000)
    mom = Moments.from_data(X, names=spec.observed)
    r = fit_model(spec, mom)
    assert r.status == "ok" and r.df == p * (p + 1) // 2 - len(r.x)
    # Known truth: loadings .7, factor correlations .3 (sampling error at N = 2000).
    loads = r.params.loc[r.params["op"] == "load", "estimate"]
    assert abs(loads.mean() - 0.7) < 0.02
    assert r.est("cov", "F1", "F2") == pytest.approx(0.3, abs=0.06)
    # Bootstrap refit from a resampled covariance matrix.
    Xb = X[rng.integers(0, len(X), len(X))]
    rb = refit(r, Moments.from_data(Xb, names=spec.observed))
    assert rb.status == "ok" and rb.starts_tried == 1


def test_observed_regression_equals_ols():
    # A saturated path model among observed variables is OLS regression: coefficients vs
    # numpy least squares, ML SEs vs statsmodels OLS rescaled from divisor N - k to N
    # (the ML residual variance), on Bollen's political democracy data shipped by semopy.
    import statsmodels.api as sm
    d = political_democracy.get_data()
    spec = ModelSpec("ols", ("y5", "y1", "x1"), (), (
        Param("reg", "y5", "y1"), Param("reg", "y5", "x1"), Param("cov", "y5", "y5"),
        Param("cov", "y1", "y1"), Param("cov", "x1", "x1"), Param("cov", "y1", "x1")))
    r = fit_model(spec, Moments.from_data(d))
    X = sm.add_constant(d[["y1", "x1"]].to_numpy())
    ols = sm.OLS(d["y5"].to_numpy(), X).fit()
    n = len(d)
    assert r.status == "ok" and r.df == 0
    assert r.est("reg", "y5", "y1") == pytest.approx(ols.params[1], abs=1e-8)
    assert r.est("reg", "y5", "x1") == pytest.approx(ols.params[2], abs=1e-8)
    assert r.est("cov", "y5", "y5") == pytest.approx(ols.ssr / n, rel=1e-7)
    scale = math.sqrt((n - 3) / n)
    assert r.se("reg", "y5", "y1") == pytest.approx(ols.bse[1] * scale, rel=1e-6)
    assert r.se("reg", "y5", "x1") == pytest.approx(ols.bse[2] * scale, rel=1e-6)
    # Standardized coefficient = b sd(x)/sd(y) (numpy sds).
    assert r.std("reg", "y5", "y1") == pytest.approx(
        ols.params[1] * d["y1"].std() / d["y5"].std(), abs=1e-8)


def test_estimates_status_and_iterations_do_not_depend_on_n(hs_data, monkeypatch):
    # F_ML = log|Sigma| + tr(S Sigma^-1) - log|S| - p does not involve N, so the ML estimates
    # are a function of the sample covariance matrix alone and do not change with N for a
    # fixed S (Bollen 1989, ch. 4; only the chi-square, N F_min, and the SEs scale with N).
    # The fitting engine's stops must respect that: the same covariance matrix at N = 500 and
    # N = 1,000,000 gives the same estimates, status and iterations in every start (the stall
    # stop counted in chi-square units once ran a start 1000 iterations at the larger N).
    from samesource.engine import fitting

    iterations: list[int] = []
    optimize = fitting._optimize

    def counted(*args, **kwargs):
        run = optimize(*args, **kwargs)
        iterations.append(-1 if run is None else run.iterations)
        return run

    monkeypatch.setattr(fitting, "_optimize", counted)
    data = method_factor_data()
    cases = [(free_method_factor_spec(list(data.columns)), Moments.from_data(data)),
             (cfa_spec(HS_FACTORS), Moments.from_data(hs_data[HS_ITEMS]))]
    for spec, m in cases:
        got = {}
        for n in (500, 1_000_000):
            iterations.clear()
            r = fit_model(spec, Moments(m.names, m.cov, n), time_limit=120.0)
            got[n] = (r, list(iterations))
        (small, it_small), (large, it_large) = got[500], got[1_000_000]
        assert small.status == large.status and not small.capped
        np.testing.assert_allclose(large.x, small.x, rtol=0, atol=1e-10)
        assert it_small == it_large, (it_small, it_large)
        assert large.chi2 / 1_000_000 == pytest.approx(small.chi2 / 500, rel=1e-12)
