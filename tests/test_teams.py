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
    _icc1_weighted,
    _ols,
    group_index,
    icc_oneway,
    rwg_j,
    same_source_team_estimate,
    split_team_estimate,
    team_moments,
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
    split = split_team_estimate(scores, team, n_boot=100, seed=1)
    same = same_source_team_estimate(scores, team)
    est = split["estimate"][0]
    assert est == pytest.approx(truth, abs=0.12)
    assert split["ci"][0][0] < truth < split["ci"][0][1]
    # the same people rating both sides: individual method covariance enters team means
    assert same[0] > truth + 0.05
    assert same[0] > est


def _every_split_scatter(x: np.ndarray, team: np.ndarray) -> np.ndarray:
    """The definition, by brute force: every way to order each team's members (itertools), part
    j = the members at ranks r with floor(r P / n) = j, column j averaged over part j; the
    scatter matrix of the part means across teams (numpy.cov), averaged over every combination
    of the teams' orders."""
    import itertools

    P = x.shape[1]
    per_team = []
    for t in np.unique(team):
        rows = x[team == t]
        n = len(rows)
        part = np.arange(n) * P // n
        per_team.append([np.array([rows[list(order)][part == j, j].mean() for j in range(P)])
                         for order in itertools.permutations(range(n))])
    total, count = np.zeros((P, P)), 0
    for combo in itertools.product(*per_team):
        total += np.cov(np.array(combo), rowvar=False) * (len(combo) - 1)
        count += 1
    return total / count


def test_team_moments_average_every_split_exactly():
    # Outside reference: the definition enumerated (itertools over every order of every team's
    # members, numpy.cov of the part means), on a small invented data set (5 teams of 2 to 4).
    rng = np.random.default_rng(5)
    team = np.repeat(np.arange(5), [3, 4, 3, 2, 3])
    x = rng.normal(size=(len(team), 2)) + np.array([3.0, 5.0])
    x[:, 1] += 0.8 * x[:, 0]
    want = _every_split_scatter(x, team)
    tm = team_moments(x, team, 5)
    w = np.ones(5)
    A = np.einsum("t,tjk->jk", w, tm.expected)
    T = w @ tm.mean
    B = np.einsum("t,tj,tk->jk", w, tm.mean, tm.mean)
    got = A - (np.outer(T, T) - B + A) / w.sum()
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(tm.parts, [[2, 1], [2, 2], [2, 1], [1, 1], [2, 1]])


def test_weighted_icc1_equals_icc_on_the_duplicated_rows():
    # Outside reference: icc_oneway (checked against statsmodels' ANOVA above) on the rows of a
    # bootstrap sample written out, a team drawn twice entering as two teams.
    rng = np.random.default_rng(2)
    y, g = unbalanced_groups(seed=4)
    J = int(g.max()) + 1
    x = np.column_stack([y, y + rng.normal(size=len(y))])
    tm = team_moments(x, g, J)
    picked = rng.integers(0, J, J)
    rows = np.concatenate([np.flatnonzero(g == t) for t in picked])
    copy = np.concatenate([np.full(int((g == t).sum()), k) for k, t in enumerate(picked)])
    w = np.bincount(picked, minlength=J).astype(float)
    got = _icc1_weighted(tm, w)
    for j in range(2):
        assert got[j] == pytest.approx(icc_oneway(x[rows, j], copy).icc1, rel=1e-10)


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


def test_group_index_is_what_numpy_unique_gives():
    # outside reference: numpy.unique(return_inverse=True), for integer codes with gaps and for text
    rng = np.random.default_rng(3)
    g = rng.choice([0, 2, 3, 7, 40], size=500)
    for groups in (g, g.astype(np.int32), np.array([f"T{v:02d}" for v in g], dtype=object)):
        codes, inv = np.unique(groups, return_inverse=True)
        got_n, got_inv = group_index(groups)
        assert got_n == len(codes)
        np.testing.assert_array_equal(got_inv, inv)
