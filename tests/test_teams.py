"""Team-nested surveys: ICCs, rwg(j), within/between, split-team estimate, small-group protection."""

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf

from samesource.output.report_json import dumps
from samesource.pipeline import analyze
from samesource.statistics.teams import (
    _ols,
    icc_oneway,
    rwg_j,
    same_source_team_estimate,
    split_team_estimate,
    within_between,
)


def unbalanced_groups(seed=0, n_groups=40, tau=0.3):
    rng = np.random.default_rng(seed)
    sizes = rng.integers(3, 15, n_groups)
    g = np.repeat(np.arange(n_groups), sizes)
    y = rng.normal(0, np.sqrt(tau), n_groups)[g] + rng.normal(0, 1, len(g))
    return y, g


def test_icc_matches_anova_formulas_from_statsmodels():
    # Bliese (2000): ICC(1) = (MSB - MSW) / (MSB + (n0 - 1) MSW), ICC(2) = (MSB - MSW) / MSB.
    # Mean squares from statsmodels' one-way ANOVA table (reference library).
    y, g = unbalanced_groups()
    df = pd.DataFrame({"y": y, "g": g.astype(str)})
    table = sm.stats.anova_lm(smf.ols("y ~ C(g)", df).fit())
    msb, msw = table.loc["C(g)", "mean_sq"], table.loc["Residual", "mean_sq"]
    n_j = np.bincount(g)
    N, J = len(y), len(n_j)
    n0 = (N - (n_j ** 2).sum() / N) / (J - 1)
    res = icc_oneway(y, g)
    assert res.msb == pytest.approx(msb) and res.msw == pytest.approx(msw)
    assert res.icc1 == pytest.approx((msb - msw) / (msb + (n0 - 1) * msw))
    assert res.icc2 == pytest.approx((msb - msw) / msb)


def test_icc1_close_to_a_mixed_model():
    # statsmodels MixedLM (REML) random-intercept variance share; with unequal groups the
    # ANOVA and REML estimators differ a little, so a tolerance of .03. (Powell's method: the
    # default gradient optimizer sometimes stops at the zero-variance boundary here.)
    y, g = unbalanced_groups(seed=0, n_groups=200, tau=0.5)
    fit = sm.MixedLM(y, np.ones((len(y), 1)), groups=g).fit(reml=True, method="powell")
    tau2, sigma2 = float(np.asarray(fit.cov_re)[0, 0]), float(fit.scale)
    assert fit.converged
    assert icc_oneway(y, g).icc1 == pytest.approx(tau2 / (tau2 + sigma2), abs=0.03)


def test_rwg_j_by_hand():
    # James, Demaree & Wolf (1984) rwg(J), worked by hand: 3 items, 5 options, uniform null
    # variance (25 - 1)/12 = 2. Item variances (ddof 1) of the rows below: 1.0, 0.3333, 0.3333,
    # mean 0.5556; q = 0.2778; rwg = 3(0.7222) / (3(0.7222) + 0.2778) = 2.1667 / 2.4444 = 0.88636.
    x = np.array([[4, 4, 3], [5, 4, 4], [3, 5, 4]], dtype=float)
    assert np.var(x, axis=0, ddof=1) == pytest.approx([1.0, 1 / 3, 1 / 3])
    assert rwg_j(x, 5) == pytest.approx(0.88636, abs=1e-5)
    # more disagreement than the null: truncated to 0 (LeBreton & Senter 2008)
    assert rwg_j(np.array([[1, 1, 1], [5, 5, 5]], dtype=float), 5) == 0.0
    assert rwg_j(np.array([[3, 3, 3]], dtype=float), 5) is None


def test_cluster_robust_ols_matches_statsmodels():
    rng = np.random.default_rng(4)
    y, g = unbalanced_groups(seed=4)
    X = np.column_stack([np.ones(len(y)), rng.normal(size=len(y))])
    b, v = _ols(y, X, clusters=g)
    ref = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": g})
    assert b == pytest.approx(ref.params)
    assert np.sqrt(np.diag(v)) == pytest.approx(ref.bse, rel=1e-6)


def team_survey(seed: int, n_teams: int = 150, method: float = 0.45):
    """Known team structure (invented data): X has team variance .3; Y = .5 X + a team
    residual (variance .2) + person residual; every item 0.7 trait + `method` x an
    individual-level method factor (no team part) + error; 4 items each."""
    rng = np.random.default_rng(seed)
    sizes = rng.poisson(12, n_teams).clip(6, None)
    team = np.repeat(np.arange(n_teams), sizes)
    n = len(team)
    xb, xw = rng.normal(0, np.sqrt(0.3), n_teams), rng.normal(0, np.sqrt(0.7), n)
    x = xb[team] + xw
    yb_res = rng.normal(0, np.sqrt(0.2), n_teams)
    y = 0.5 * x + yb_res[team] + rng.normal(0, np.sqrt(1 - 0.25 - 0.2), n)
    y = y / np.sqrt(0.25 + 0.2 + 0.55)
    m = rng.normal(size=n)

    def items(trait):
        e = np.sqrt(1 - 0.49 - method ** 2)
        return np.column_stack([0.7 * trait + method * m + e * rng.normal(size=n) for _ in range(4)])

    # between-team truth: cov(Yb, Xb) = .5 * .3 / s, var(Yb) = (.25 * .3 + .2) / s^2 with s the
    # scale of y; standardized slope = .5 * sqrt(.3) / sqrt(.25 * .3 + .2)
    truth = 0.5 * np.sqrt(0.3) / np.sqrt(0.25 * 0.3 + 0.2)
    return items(x), items(y), team, truth


def test_split_team_estimate_recovers_team_path_without_method_inflation():
    xi, yi, team, truth = team_survey(seed=3)
    scores = np.column_stack([yi.mean(axis=1), xi.mean(axis=1)])
    split = split_team_estimate(scores, team, splits=100, n_boot=100, seed=1)
    same = same_source_team_estimate(scores, team)
    est = split["estimate"][0]
    assert est == pytest.approx(truth, abs=0.12)
    assert split["ci"][0][0] < truth < split["ci"][0][1]
    # the same people rating both sides: individual method covariance enters team means
    assert same[0] > truth + 0.05
    assert same[0] > est


def test_within_between_difference_detected():
    # between-team slope of 1.0 vs within-team slope of 0.2: the Mundlak test must see it
    rng = np.random.default_rng(8)
    sizes = rng.integers(5, 12, 100)
    g = np.repeat(np.arange(100), sizes)
    xb, xw = rng.normal(size=100), rng.normal(size=len(g))
    x = xb[g] + xw
    y = 1.0 * xb[g] + 0.2 * xw + rng.normal(size=len(g))
    wb = within_between(y, x[:, None], g)
    assert wb["within"]["b"][0] == pytest.approx(0.2, abs=0.06)
    assert wb["between"]["b"][0] == pytest.approx(1.0, abs=0.2)
    assert wb["difference"]["p"] < 0.001
    y2 = 0.5 * x + rng.normal(size=len(g))
    assert within_between(y2, x[:, None], g)["difference"]["p"] > 0.001


def test_sample_survey_team_section_and_small_group_protection(tmp_path):
    root = __import__("pathlib").Path(__file__).resolve().parents[1]
    design = json.loads((root / "sample_surveys" / "staff_survey_design.json").read_text())
    csv = root / "sample_surveys" / "staff_survey.csv"
    report = analyze(csv, design, {"min_group_size": 8, "missing": "fiml"}).report  # every row analysed
    teams = report["teams"]
    data = pd.read_csv(csv)
    sizes = data["team"].value_counts()
    small = set(sizes[sizes < 8].index)
    assert teams["groups"] == len(sizes)
    assert teams["groups_withheld"] == len(small) > 0
    assert teams["groups_reported"] == len(sizes) - len(small)
    assert {g["group"] for g in teams["group_scores"]}.isdisjoint(small)
    assert all(g["n"] >= 8 for g in teams["group_scores"])
    text = dumps(report)
    for name in small:  # no small group's label anywhere in the JSON
        assert f'"{name}"' not in text
    for v in teams["constructs"].values():
        assert v["icc1"] is None or -0.1 < v["icc1"] < 0.5
    assert {(p["outcome"], p["predictor"]) for p in teams["paths"]} == {
        (p["outcome"], x) for p in design["paths"] for x in p["predictors"]}
