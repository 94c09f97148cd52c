"""Reliability: alpha and its CI, item statistics, omega, composite reliability, AVE."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pingouin as pg
import pytest
import semopy
from scipy import stats
from semopy.examples import holzinger39

from samesource.statistics.reliability import (
    AVE_THRESHOLD,
    LOADING_THRESHOLD,
    RELIABILITY_THRESHOLD,
    average_variance_extracted,
    composite_reliability,
    cronbach_alpha,
    item_statistics,
    omega_total,
)

# pingouin rounds its CI bounds to 3 decimals.
CI_TOL = 5e-4 + 1e-12


@pytest.fixture(scope="module")
def pingouin_items() -> pd.DataFrame:
    # Open data set shipped with pingouin (long format: Subj, Items, Scores).
    long = pg.read_dataset("cronbach_alpha")
    return long.pivot(index="Subj", columns="Items", values="Scores")


@pytest.fixture(scope="module")
def hs() -> pd.DataFrame:
    # Holzinger & Swineford (1939), shipped with semopy.
    return holzinger39.get_data()


def test_alpha_matches_pingouin_on_its_shipped_data(pingouin_items):
    res = cronbach_alpha(pingouin_items)
    ref_alpha, ref_ci = pg.cronbach_alpha(pingouin_items)  # reference library
    assert res.alpha == pytest.approx(ref_alpha, abs=1e-12)
    assert res.ci[0] == pytest.approx(ref_ci[0], abs=CI_TOL)
    assert res.ci[1] == pytest.approx(ref_ci[1], abs=CI_TOL)
    # The value printed in pingouin's own docstring example for this data set.
    assert res.alpha == pytest.approx(0.5917188485995826, abs=1e-12)
    assert (res.n, res.k) == pingouin_items.shape


def test_alpha_matches_pingouin_on_holzinger_visual_items(hs):
    items = hs[["x1", "x2", "x3"]]
    for conf in (0.95, 0.90):
        res = cronbach_alpha(items, confidence=conf)
        ref_alpha, ref_ci = pg.cronbach_alpha(items, ci=conf)  # reference library
        assert res.alpha == pytest.approx(ref_alpha, abs=1e-12)
        assert res.ci == pytest.approx(tuple(ref_ci), abs=CI_TOL)
        assert res.confidence == conf
    assert (res.n, res.k) == (301, 3)


def test_alpha_ci_is_feldt_formula(hs):
    # Feldt (1965); Feldt, Woodruff & Salih (1987): bounds 1 - (1 - a) F quantiles with
    # df1 = n - 1, df2 = (n - 1)(k - 1); worked here with scipy at full precision.
    items = hs[["x4", "x5", "x6"]]
    res = cronbach_alpha(items)
    n, k = items.shape
    cov = items.cov().to_numpy()
    a = k / (k - 1) * (1 - np.trace(cov) / cov.sum())  # Cronbach (1951)
    lo = 1 - (1 - a) * stats.f.ppf(0.975, n - 1, (n - 1) * (k - 1))
    hi = 1 - (1 - a) * stats.f.ppf(0.025, n - 1, (n - 1) * (k - 1))
    assert res.alpha == pytest.approx(a, abs=1e-12)
    assert res.ci == pytest.approx((lo, hi), abs=1e-12)
    assert res.ci[0] < res.alpha < res.ci[1]


def test_alpha_listwise_deletion_matches_pingouin():
    data = pg.read_dataset("cronbach_wide_missing")  # shipped with pingouin, has NaN
    res = cronbach_alpha(data)
    ref_alpha, _ = pg.cronbach_alpha(data, nan_policy="listwise")  # reference library
    assert res.alpha == pytest.approx(ref_alpha, abs=1e-12)
    # pingouin's docstring value for this listwise case (R psych, use="complete.obs").
    assert res.alpha == pytest.approx(0.8016949152542373, abs=1e-12)
    complete = data.dropna()
    assert res.n == len(complete) < len(data)
    # pingouin's listwise CI uses the row count before deletion; the Feldt CI needs the
    # rows actually used, so compare with pingouin run on the complete rows.
    _, ref_ci = pg.cronbach_alpha(complete)
    assert res.ci == pytest.approx(tuple(ref_ci), abs=CI_TOL)


def test_alpha_undefined_cases_return_none_with_reason():
    const = pd.DataFrame({"a": [3, 3, 3], "b": [3, 3, 3], "c": [3, 3, 3]})
    res = cronbach_alpha(const)
    assert res.alpha is None and res.ci is None and "variance" in res.reason
    one = cronbach_alpha(pd.DataFrame({"a": [1, 2, 3]}))
    assert one.alpha is None and "2 items" in one.reason
    few = cronbach_alpha(pd.DataFrame({"a": [1, np.nan], "b": [2, 3]}))
    assert few.alpha is None and few.n == 1
    with pytest.raises(ValueError):
        cronbach_alpha(const, confidence=1.0)
    with pytest.raises(ValueError):
        cronbach_alpha(pd.DataFrame({"a": ["x", "y"], "b": [1, 2]}))


def test_alpha_can_be_negative():
    # Worked by hand (Cronbach 1951 formula): x = [1, 2, 3], y = [6, 4, 2] give
    # var x = 1, var y = 4, x + y = [7, 6, 5] with variance 1, so
    # alpha = 2 * (1 - (1 + 4) / 1) = -8.
    res = cronbach_alpha(pd.DataFrame({"x": [1, 2, 3], "y": [6, 4, 2]}))
    assert res.alpha == pytest.approx(-8.0)


def test_item_statistics_against_numpy_and_pingouin(pingouin_items):
    data = pingouin_items.copy()
    data.iloc[0, 2] = np.nan  # one missing answer: the row is dropped listwise
    table = item_statistics(data)
    complete = data.dropna()
    assert list(table.index) == list(data.columns) and table.index.name == "item"
    assert list(table.columns) == ["mean", "sd", "item_rest_r", "alpha_if_deleted"]
    x = complete.to_numpy(dtype=float)
    for j, item in enumerate(data.columns):
        rest = np.delete(x, j, axis=1).sum(axis=1)
        # Reference: numpy correlation of the item with the sum of the other items.
        assert table.loc[item, "item_rest_r"] == pytest.approx(
            np.corrcoef(x[:, j], rest)[0, 1], abs=1e-12
        )
        # Reference: pingouin alpha on the reduced item set.
        ref, _ = pg.cronbach_alpha(complete.drop(columns=item))
        assert table.loc[item, "alpha_if_deleted"] == pytest.approx(ref, abs=1e-12)
        assert table.loc[item, "mean"] == pytest.approx(complete[item].mean())
        assert table.loc[item, "sd"] == pytest.approx(complete[item].std(ddof=1))


def test_item_statistics_undefined_cells_are_nan():
    data = pd.DataFrame({"a": [1, 2, 3, 4], "b": [2, 2, 2, 2]})
    table = item_statistics(data)
    # "b" is constant: its correlation with the rest is undefined; with two items,
    # deleting one leaves a single item, for which alpha is undefined.
    assert np.isnan(table.loc["b", "item_rest_r"])
    assert table["alpha_if_deleted"].isna().all()
    assert table.loc["a", "sd"] == pytest.approx(np.std([1, 2, 3, 4], ddof=1))


def test_omega_cr_ave_hand_worked():
    # Worked by hand from McDonald (1999) / Jöreskog (1971) / Fornell & Larcker (1981):
    # loadings .7, .8, .6 -> sum 2.1, squared 4.41; errors 1 - l^2 = .51, .36, .64 -> 1.51.
    lam = [0.7, 0.8, 0.6]
    assert omega_total(lam, [0.51, 0.36, 0.64]) == pytest.approx(4.41 / 5.92, abs=1e-12)
    assert composite_reliability(lam) == pytest.approx(4.41 / 5.92, abs=1e-12)
    # AVE: (.49 + .64 + .36) / 3 = 1.49 / 3.
    assert average_variance_extracted(lam) == pytest.approx(1.49 / 3, abs=1e-12)
    # Unstandardized metric: loadings 2, 1, 1 with errors 1, 2, 3 -> 16 / (16 + 6).
    assert omega_total(np.array([2.0, 1.0, 1.0]), pd.Series([1.0, 2.0, 3.0])) == pytest.approx(
        16 / 22, abs=1e-12
    )


def test_omega_cr_ave_undefined_and_bad_input():
    assert composite_reliability([0.7, 1.05, 0.6]) is None  # Heywood case
    assert average_variance_extracted([0.7, np.nan]) is None
    assert omega_total([0.5, np.nan, 0.5], [0.5, 0.5, 0.5]) is None
    assert omega_total([0.0, 0.0, 0.0], [0.0, 0.0, 0.0]) is None  # 0 / 0
    with pytest.raises(ValueError):
        omega_total([0.5, 0.5], [0.5])
    with pytest.raises(ValueError):
        average_variance_extracted([])


def test_omega_from_semopy_one_factor_fit(hs):
    # Reference library: semopy one-factor ML fit of the HS visual items. The model is
    # just identified (3 items), so the implied covariance equals the sample covariance
    # (ML divisor n) and omega must equal (sum lambda)^2 / variance of the sum score.
    data = hs[["x1", "x2", "x3"]]
    model = semopy.Model("f =~ x1 + x2 + x3")
    model.fit(data)
    est = model.inspect(std_est=True)
    loads = est[(est["op"] == "~") & (est["rval"] == "f")].set_index("lval")
    var_f = est[(est["op"] == "~~") & (est["lval"] == "f") & (est["rval"] == "f")]
    errs = est[(est["op"] == "~~") & (est["lval"] == est["rval"]) & (est["lval"] != "f")]
    errs = errs.set_index("lval")
    items = ["x1", "x2", "x3"]
    # Rescale to factor variance 1 (semopy fixes the first loading instead).
    lam = loads.loc[items, "Estimate"].to_numpy(float) * np.sqrt(float(var_f["Estimate"].iloc[0]))
    theta = errs.loc[items, "Estimate"].to_numpy(float)
    omega = omega_total(lam, theta)
    var_sum = data.sum(axis=1).var(ddof=0)
    assert omega == pytest.approx(lam.sum() ** 2 / var_sum, rel=2e-3)
    # Standardized solution: CR from the standardized loadings equals omega computed from
    # semopy's standardized error variances.
    std_lam = loads.loc[items, "Est. Std"].to_numpy(float)
    std_theta = errs.loc[items, "Est. Std"].to_numpy(float)
    assert composite_reliability(std_lam) == pytest.approx(
        omega_total(std_lam, std_theta), abs=1e-6
    )


def test_thresholds():
    assert RELIABILITY_THRESHOLD == 0.70  # common practice (often cited to Nunnally 1978)
    assert LOADING_THRESHOLD == 0.50  # common practice
    assert AVE_THRESHOLD == 0.50  # Fornell & Larcker (1981)
