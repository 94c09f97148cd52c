"""Closed-form method-variance checks against hand-worked numbers and reference libraries."""

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.multivariate.pca import PCA

from samesource.method_checks.collinearity import full_collinearity_vif
from samesource.method_checks.harman import harman_efa
from samesource.method_checks.marker import (
    adjust_correlation,
    choose_r_m,
    marker_adjustment,
    r_m_source,
)


def test_lindell_whitney_adjustment_by_hand():
    # Worked by hand from Lindell & Whitney (2001), eqs. 4-5: r_U = .40, r_M = .10, N = 200.
    # r_A = (.40 - .10) / (1 - .10) = .30 / .90 = 0.33333
    # t = r_A / sqrt((1 - r_A^2) / (N - 3)) = 0.33333 / sqrt(0.88889 / 197) = 4.9624
    res = adjust_correlation(0.40, 0.10, 200)
    assert res.r_adjusted == pytest.approx(1 / 3, abs=1e-12)
    assert res.t == pytest.approx(4.9624, abs=1e-4)
    assert res.p == pytest.approx(2 * stats.t.sf(4.9624, 197), rel=1e-3)  # scipy reference


def test_r_m_rules():
    rs = [0.21, 0.08, 0.12]
    assert choose_r_m(rs, 300, "smallest") == pytest.approx(0.08)
    assert choose_r_m(rs, 300, "second_smallest") == pytest.approx(0.12)
    # Malhotra, Kim & Patil (2006): upper 95% bound by Fisher's z, by hand:
    # z = atanh(.08) = 0.080171; + 1.959964 / sqrt(297) = 0.113729 -> tanh(0.193900) = 0.19150
    assert choose_r_m(rs, 300, "upper_95") == pytest.approx(0.19150, abs=1e-4)
    assert choose_r_m([-0.05, 0.2], 300, "smallest") == 0.0  # negative: no shared-method evidence


def test_r_m_from_a_fixed_source():
    # Bootstrap replicates take r_M from the scale the full sample chose, with the same rule's
    # floor and Fisher-z bound (hand values as in test_r_m_rules).
    rs = [0.21, 0.08, 0.12]
    assert r_m_source(rs, "smallest") == 1 and r_m_source(rs, "second_smallest") == 2
    assert r_m_source(rs, "upper_95") == 1
    later = [0.05, 0.09, 0.11]  # another sample, where a different scale is smallest
    assert choose_r_m(later, 300, "smallest", index=1) == pytest.approx(0.09)
    assert choose_r_m([0.05, -0.02, 0.11], 300, "smallest", index=1) == 0.0
    assert choose_r_m([0.3, 0.08, 0.4], 300, "upper_95", index=1) == pytest.approx(0.19150, abs=1e-4)
    with pytest.raises(ValueError, match="second-smallest"):
        r_m_source([0.1], "second_smallest")


def test_marker_adjustment_pairs_and_sensitivity():
    names = ["a", "b", "c", "m"]
    r = np.array([[1, .5, .3, .1], [.5, 1, .4, .15], [.3, .4, 1, .2], [.1, .15, .2, 1]])
    out = marker_adjustment(r, names, "m", n=250)
    assert out["r_m"] == pytest.approx(0.10)
    assert out["pairs"][("a", "b")].r_adjusted == pytest.approx((0.5 - 0.1) / 0.9)
    rules = [s["rule"] for s in out["sensitivity"]]
    assert rules == ["smallest", "second_smallest", "upper_95"]
    # larger r_M, smaller adjusted correlation
    adj = [s["pairs"][("a", "b")].r_adjusted for s in out["sensitivity"]]
    assert adj[0] > adj[1] > adj[2]


def test_kock_vif_matches_ols_r_squared():
    # Kock (2015) VIF = 1 / (1 - R^2) of each score on the others; statsmodels OLS is the reference.
    rng = np.random.default_rng(3)
    x = rng.normal(size=(400, 4)) @ np.array([[1, .5, .3, 0], [0, 1, .4, .2], [0, 0, 1, .6], [0, 0, 0, 1]])
    df = pd.DataFrame(x, columns=list("abcd"))
    vif = full_collinearity_vif(df)
    for c in df.columns:
        others = sm.add_constant(df.drop(columns=c))
        r2 = sm.OLS(df[c], others).fit().rsquared
        assert vif[c] == pytest.approx(1 / (1 - r2), rel=1e-9)


def test_harman_first_factor_share_matches_statsmodels_pca():
    rng = np.random.default_rng(5)
    f = rng.normal(size=(500, 2))
    x = np.hstack([f[:, [0]] * .7 + rng.normal(size=(500, 3)) * .7,
                   f[:, [1]] * .7 + rng.normal(size=(500, 3)) * .7])
    res = harman_efa(pd.DataFrame(x))
    # statsmodels PCA on standardized data: eigenvalues of the correlation matrix (times n - 1)
    pca = PCA(x, standardize=True, demean=True, normalize=False, method="eig")
    ev = np.sort(np.asarray(pca.eigenvals))[::-1]
    ev = ev / ev.sum() * x.shape[1]
    assert res.first_factor_share == pytest.approx(ev[0] / x.shape[1], rel=1e-9)
    assert res.factors_eigen_gt_1 == int(np.sum(ev > 1)) == 2
    assert not res.flag
    assert math.isclose(sum(res.eigenvalues), 6.0)
