"""The survey simulator reproduces its own truth, and the bundled sample survey is reproducible."""

from __future__ import annotations

import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import multivariate_normal, norm

from samesource.input.design import check_columns, load_design
from simulate import (
    METHOD_FACTOR,
    SCENARIOS,
    ConstructSpec,
    SurveySpec,
    implied_truth,
    likert_category_probabilities,
    likert_thresholds,
    make_scenario,
    population_item_correlation,
    simulate_survey,
    spec_to_dict,
)

ROOT = Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_surveys"


def scenario(**kw) -> SurveySpec:
    """Two correlated exogenous traits, a chain of two outcomes, a marker and a method scale."""
    constructs = [
        ConstructSpec("support", 4, [0.75, 0.70, 0.65, 0.70], 0.35, reverse=[4]),
        ConstructSpec("workload", 4, 0.70, [0.30, 0.35, 0.40, 0.35], reverse=[2], prefix="wl"),
        ConstructSpec("engagement", 5, 0.70, 0.35),
        ConstructSpec("intent", 3, [0.80, 0.70, 0.60], 0.30, prefix="stay"),
        ConstructSpec("stars", 3, 0.70, 0.35, role="marker", prefix="sg"),
        ConstructSpec("impression", 4, 0.65, role="method", prefix="imp"),
    ]
    base = dict(
        constructs=constructs,
        paths={"engagement": {"support": 0.30, "workload": -0.20},
               "intent": {"engagement": 0.45, "support": 0.10}},
        exogenous_corr={("support", "workload"): -0.25},
        n=50_000, scale_points=None, seed=11,
    )
    base.update(kw)
    return SurveySpec(**base)


def items_of(df: pd.DataFrame) -> list[str]:
    return [c for c in df.columns if c not in ("respondent", "team")]


def std_ols(y: np.ndarray, x: np.ndarray) -> np.ndarray:
    z = lambda a: (a - a.mean(0)) / a.std(0)  # noqa: E731
    return np.linalg.lstsq(z(x), z(y), rcond=None)[0]


def icc1(values: np.ndarray, groups: np.ndarray) -> float:
    """ICC(1) from a one-way ANOVA (Bliese 2000): (MSB - MSW) / (MSB + (k - 1) MSW).

    k for unequal group sizes is the usual ANOVA n0 = (N - sum n_j^2 / N) / (J - 1).
    """
    frame = pd.DataFrame({"v": values, "g": groups})
    g = frame.groupby("g")["v"]
    n_j, m_j = g.size().to_numpy(), g.mean().to_numpy()
    n, j = len(values), len(n_j)
    ssb = float((n_j * (m_j - values.mean()) ** 2).sum())
    ssw = float(((frame["v"] - g.transform("mean")) ** 2).sum())
    msb, msw = ssb / (j - 1), ssw / (n - j)
    k = (n - (n_j**2).sum() / n) / (j - 1)
    return (msb - msw) / (msb + (k - 1) * msw)


# ---- the simulator --------------------------------------------------------------------------

def test_item_correlations_match_population_continuous():
    spec = scenario()
    df, _ = simulate_survey(spec)
    items = items_of(df)
    sample = np.corrcoef(df[items].to_numpy().T)
    pop = population_item_correlation(spec).loc[items, items].to_numpy()
    # SE of r at n = 50,000 is at most 1/sqrt(n) = 0.0045; 0.02 is over 4 SE for ~400 pairs.
    assert np.abs(sample - pop).max() < 0.02
    # Reverse-keyed items correlate negatively with their scale as stored.
    assert pop[items.index("sup4"), items.index("sup1")] < 0


def test_item_correlations_match_population_likert():
    spec = scenario(scale_points=7)
    df, truth = simulate_survey(spec)
    items = items_of(df)
    x = df[items].to_numpy()
    assert x.min() == 1 and x.max() == 7
    pop = population_item_correlation(spec, discrete=True).loc[items, items].to_numpy()
    assert np.abs(np.corrcoef(x.T) - pop).max() < 0.02
    # Coding loses a little correlation, never flips it.
    cont = population_item_correlation(spec).loc[items, items].to_numpy()
    off = ~np.eye(len(items), dtype=bool)
    assert np.all(np.abs(pop[off]) <= np.abs(cont[off]) + 1e-12)
    shares = np.bincount(x.ravel(), minlength=8)[1:] / x.size
    assert np.allclose(shares, truth["likert"]["category_probabilities"], atol=0.005)


def test_likert_covariance_is_exact_for_bivariate_normal():
    # Two items with continuous correlation 0.5; compare with direct bivariate normal sums:
    # f(x) = 1 + sum_a 1{x > tau_a}, so cov = sum_ab P(X > a, Y > b) - P(X > a) P(Y > b).
    rho, k = 0.5, 7
    spec = SurveySpec([ConstructSpec("a", 2, rho**0.5)], paths={}, scale_points=k)
    got = population_item_correlation(spec, discrete=True).iloc[0, 1]
    tau = likert_thresholds(k)
    mvn = multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]])
    cov = sum(mvn.cdf([-a, -b]) - norm.sf(a) * norm.sf(b) for a in tau for b in tau)
    p = likert_category_probabilities(k)
    v = np.arange(1, k + 1)
    var = p @ (v - p @ v) ** 2
    assert got == pytest.approx(cov / var, abs=1e-5)


def test_thresholds_symmetric_bell():
    tau = likert_thresholds(7)
    assert np.allclose(tau, [-1.5, -0.9, -0.3, 0.3, 0.9, 1.5])
    p = likert_category_probabilities(7)
    assert np.allclose(p, p[::-1]) and p.argmax() == 3 and p.sum() == pytest.approx(1)


def test_paths_recovered_on_latent_scores():
    spec = scenario()
    df, truth, latent = simulate_survey(spec, return_latent=True)
    assert len(latent) == len(df)
    assert latent.var().between(0.97, 1.03).all()
    for outcome, preds in spec.paths.items():
        beta = std_ols(latent[outcome].to_numpy(), latent[list(preds)].to_numpy())
        assert np.allclose(beta, list(preds.values()), atol=0.02), (outcome, beta)
    names = [c.name for c in spec.constructs]
    ts = pd.DataFrame(truth["true_score_correlation"]).loc[names, names].to_numpy()
    assert np.abs(latent[names].corr().to_numpy() - ts).max() < 0.02
    # The method scale's true score is M; M is orthogonal to every trait.
    assert (latent["impression"] == latent[METHOD_FACTOR]).all()
    assert truth["true_score_correlation"]["support"]["impression"] == 0.0


def test_reliability_truth_matches_sums():
    spec = scenario(scale_points=7)
    df, truth, latent = simulate_survey(spec, return_latent=True)
    cont_df, _ = simulate_survey(scenario())
    for c in spec.constructs:
        t = truth["constructs"][c.name]
        # omega = (sum lambda)^2 / var(sum) by hand, from the spec alone.
        lam, m = c.loadings(), c.method_loadings()
        if c.role == "method":
            lam, m = lam, lam
        pop = population_item_correlation(spec, as_stored=False).loc[t["items"], t["items"]]
        assert t["omega"] == pytest.approx(sum(lam) ** 2 / pop.to_numpy().sum())
        assert t["item_method_share"] == pytest.approx([v * v for v in m])
        # ... and it is the squared correlation of the (recoded) sum with the trait.
        for frame, key, omega, method in (
            (cont_df, "continuous", t["omega"], t["method_share_of_sum"]),
            (df, "likert", t["likert"]["trait_share_of_sum"], t["likert"]["method_share_of_sum"]),
        ):
            x = np.array(frame[t["items"]], dtype=float)
            for name in t["reverse"]:
                i = t["items"].index(name)
                x[:, i] = (8 - x[:, i]) if key == "likert" else -x[:, i]
            s = x.sum(1)
            assert np.corrcoef(s, latent[c.name])[0, 1] ** 2 == pytest.approx(omega, abs=0.01)
            assert np.corrcoef(s, latent[METHOD_FACTOR])[0, 1] ** 2 == pytest.approx(method,
                                                                                    abs=0.01)
        assert t["likert"]["trait_share_of_sum"] < t["omega"]


def test_reverse_keying_round_trips():
    for k in (5, None):
        plain = scenario(n=500, scale_points=k, constructs=[
            ConstructSpec("support", 4, 0.7, 0.3), ConstructSpec("engagement", 3, 0.7, 0.3)])
        keyed = scenario(n=500, scale_points=k, constructs=[
            ConstructSpec("support", 4, 0.7, 0.3, reverse=[2, 4]),
            ConstructSpec("engagement", 3, 0.7, 0.3, reverse=[1])])
        plain.paths = keyed.paths = {"engagement": {"support": 0.4}}
        plain.exogenous_corr = keyed.exogenous_corr = {}
        a, _ = simulate_survey(plain)
        b, truth = simulate_survey(keyed)
        flip = ["sup2", "sup4", "eng1"]
        assert truth["constructs"]["support"]["reverse"] == ["sup2", "sup4"]
        recoded = (k + 1 - b[flip]) if k else -b[flip]
        pd.testing.assert_frame_equal(recoded, a[flip], check_exact=True)
        rest = [c for c in a.columns if c not in flip]
        pd.testing.assert_frame_equal(a[rest], b[rest], check_exact=True)


def test_missing_rate_and_codes():
    spec = scenario(n=5000, scale_points=5, missing_rate=0.08)
    blank, truth = simulate_survey(spec)
    items = items_of(blank)
    share = blank[items].isna().to_numpy().mean()
    assert share == pytest.approx(0.08, abs=0.004)
    assert truth["sample"]["missing_share"] == pytest.approx(share)
    coded, _ = simulate_survey(scenario(n=5000, scale_points=5, missing_rate=0.08, missing_code=-99))
    assert ((coded[items] == -99).to_numpy() == blank[items].isna().to_numpy()).all()
    assert coded[items].dtypes.eq(np.int64).all()
    # Missing cells are drawn last: the answers that remain are those of the complete data.
    full, _ = simulate_survey(scenario(n=5000, scale_points=5))
    keep = ~blank[items].isna().to_numpy()
    assert (full[items].to_numpy()[keep] == blank[items].to_numpy(dtype=float)[keep]).all()


def test_seed_reproduces_bit_for_bit():
    spec = scenario(n=2000, scale_points=7, n_teams=50, team_icc={"support": 0.2},
                    missing_rate=0.02)
    a, ta = simulate_survey(spec)
    b, tb = simulate_survey(spec)
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    assert a.to_csv(index=False) == b.to_csv(index=False)
    assert json.dumps(ta, allow_nan=False) == json.dumps(tb, allow_nan=False)
    c, _ = simulate_survey(scenario(n=2000, scale_points=7, n_teams=50, seed=12))
    assert not a[items_of(a)].equals(c[items_of(c)])


@pytest.mark.parametrize("bad, message", [
    (dict(constructs=[ConstructSpec("support", 3, 0.9, 0.5)]), "negative error variance"),
    (dict(constructs=[ConstructSpec("support", 3, [0.7, 0.7])]), "2 values for 3 items"),
    (dict(constructs=[ConstructSpec("support", 3, 0.7, reverse=[4])]), "reverse positions"),
    (dict(constructs=[ConstructSpec("imp", 3, 0.7, 0.2, role="method"),
                      ConstructSpec("support", 3, 0.7)]), "measures M itself"),
    (dict(paths={"engagement": {"support": 0.9, "workload": -0.9}}), "explain"),
    (dict(paths={"engagement": {"intent": 0.3}, "intent": {"engagement": 0.3}}), "cycle"),
    (dict(exogenous_corr={("support", "engagement"): 0.3}), "exogenous"),
    (dict(n_teams=10, team_icc={"engagement": 0.1}), "exogenous"),
    (dict(team_icc={"support": 0.1}), "n_teams"),
])
def test_impossible_specs_raise(bad, message):
    with pytest.raises(ValueError, match=message):
        implied_truth(scenario(**bad))
    with pytest.raises(ValueError, match=message):
        simulate_survey(scenario(**bad))


def test_team_icc_recovered():
    spec = scenario(n=20_000, n_teams=400, team_icc={"support": 0.20, "workload": 0.10},
                    team_size_dispersion=0.5)
    df, truth, latent = simulate_survey(spec, return_latent=True)
    sizes = df["team"].value_counts()
    assert len(sizes) == 400 and sizes.min() >= 2 and sizes.sum() == 20_000
    assert df["team"].str.fullmatch(r"T\d{3}").all()
    assert truth["sample"]["team_sizes"] == {t: int(sizes[t]) for t in sorted(sizes.index)}
    teams = df["team"].to_numpy()
    implied = truth["teams"]["implied_icc"]
    # SE of ICC(1) with 400 teams of ~50 is about 0.012-0.015.
    for trait in ("support", "workload", "engagement", "stars"):
        assert icc1(latent[trait].to_numpy(), teams) == pytest.approx(implied[trait], abs=0.04)
    assert implied["support"] == 0.20 and implied["stars"] == 0.0
    # Endogenous: beta' Phi_between beta = .3^2*.2 + .2^2*.1 + 2*.3*(-.2)*(-.25)*sqrt(.02).
    assert implied["engagement"] == pytest.approx(0.018 + 0.004 + 0.03 * 0.02**0.5)
    # Total correlations stay as specified with unequal ICCs.
    assert truth["true_score_correlation"]["support"]["workload"] == pytest.approx(-0.25)
    assert latent["support"].corr(latent["workload"]) == pytest.approx(-0.25, abs=0.03)


# ---- the bundled sample survey --------------------------------------------------------------

def _load_generator():
    spec = importlib.util.spec_from_file_location("sample_generate", SAMPLES / "generate.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_generator_reproduces_committed_files(tmp_path):
    run = subprocess.run([sys.executable, str(SAMPLES / "generate.py"), "--out", str(tmp_path)],
                         capture_output=True, text=True, timeout=60)
    assert run.returncode == 0, run.stderr
    for name in ("staff_survey.csv", "staff_survey_design.json", "staff_survey_truth.json", "manager_ratings.csv",
                 "staff_survey_two_sources_design.json", "manager_ratings_truth.json"):
        assert (tmp_path / name).read_bytes() == (SAMPLES / name).read_bytes(), name


def test_sample_survey_matches_design_and_truth():
    design = load_design(SAMPLES / "staff_survey_design.json")
    df = pd.read_csv(SAMPLES / "staff_survey.csv")
    check_columns(design, df.columns)
    truth = json.loads((SAMPLES / "staff_survey_truth.json").read_text())
    pop, sample = truth["population"], truth["sample"]
    assert truth["scenario"]["fictional"] is True
    assert len(df) == 2500 and df["respondent"].is_unique
    assert design.scale_min == 1 and design.scale_max == 7 and design.missing_codes == (-99,)
    assert {c.name: c.role for c in design.constructs.values()} == {
        "support": "substantive", "workload": "substantive", "engagement": "substantive",
        "intent": "substantive", "weather": "marker", "impression": "method"}
    for c in design.constructs.values():
        assert list(c.items) == pop["constructs"][c.name]["items"]
        assert list(c.reverse) == pop["constructs"][c.name]["reverse"]
        if c.role != "method":
            assert pop["constructs"][c.name]["item_method_share"] == [0.1225] * len(c.items)
            assert np.mean(pop["constructs"][c.name]["loadings"]) == pytest.approx(0.70, abs=0.01)
    assert pop["paths"] == {"engagement": {"support": 0.3, "workload": -0.2},
                            "intent": {"engagement": 0.45}}
    assert [(p.outcome, p.predictors) for p in design.paths] == [
        ("engagement", ("support", "workload")), ("intent", ("engagement",))]

    items = design.items
    values = df[items]
    coded = (values == -99).to_numpy().mean()
    assert coded == pytest.approx(0.015, abs=0.003)
    assert values.isna().to_numpy().sum() == len(sample["blank_cells"]) > 0
    answered = values.to_numpy()[(values != -99).to_numpy() & values.notna().to_numpy()]
    assert set(np.unique(answered)) == set(range(1, 8))

    for person in sample["careless_responders"]:
        row = values[df["respondent"] == person["respondent"]].iloc[0]
        assert (row == person["value"]).all()
        assert person["row"] == int(np.flatnonzero(df["respondent"] == person["respondent"])[0]) + 2

    sizes = df["team"].value_counts()
    assert len(sizes) == 120 and (sizes < 5).sum() >= 3
    assert sorted(sizes[sizes < 5].index) == sample["teams_under_5"]
    assert pop["teams"]["team_icc"] == {"support": 0.1, "workload": 0.1}


def test_codebook_lists_every_item_with_its_wording():
    gen = _load_generator()
    codebook = (SAMPLES / "codebook.md").read_text(encoding="utf-8")
    truth = json.loads((SAMPLES / "staff_survey_truth.json").read_text())
    assert gen.item_wording() == truth["scenario"]["items"]
    for item, wording in gen.item_wording().items():
        assert f"`{item}`" in codebook and wording in codebook, item
    assert gen.COMPANY in codebook and "-99" in codebook
    for sc in gen.MANAGER_SCALES:  # the managers' file too
        for i, wording in enumerate(sc["wording"], 1):
            assert f"`{sc['prefix']}{i}`" in codebook and wording in codebook


# ---- named scenarios: their truth against a direct computation -------------------------------

def _direct_implied(sc) -> tuple[np.ndarray, list[str], np.ndarray]:
    """Implied item covariance (as stored), written out by hand from the scenario's generating
    parameters with numpy: the base survey's traits sup -> eng -> sty (beta .30, .45, and 0 for
    sty on sup), an unrelated marker trait, M correlated c with sup, and A independent of all.
    Returns (covariance, item names, latent covariance of [sup, eng, sty, wth, M, A])."""
    spec = sc.spec
    c = spec.method_trait_corr.get("sup", 0.0)
    b1, b2 = spec.paths["eng"]["sup"], spec.paths["sty"]["eng"]
    assert spec.paths["sty"]["sup"] == 0.0
    order = ["sup", "eng", "sty", "wth", METHOD_FACTOR, "acquiescence"]
    phi = np.eye(6)
    phi[0, 1] = b1
    phi[0, 2] = b2 * b1
    phi[1, 2] = b2
    phi[0, 4], phi[1, 4], phi[2, 4] = c, b1 * c, b2 * b1 * c
    phi = np.triu(phi) + np.triu(phi, 1).T
    rows, names, signs = [], [], []
    for con in spec.constructs:
        for pos, (name, lv, mv) in enumerate(zip(con.item_names(), con.loadings(),
                                                 con.method_loadings(), strict=True), 1):
            row = np.zeros(6)
            sign = -1.0 if pos in con.reverse else 1.0
            if con.role == "method":
                row[4] = lv
            else:
                row[order.index(con.name)] = lv
                row[4] = mv
            row[5] = sign * spec.acquiescence
            rows.append(row)
            names.append(name)
            signs.append(sign)
    lam = np.array(rows)
    common = lam @ phi @ lam.T
    cov = common + np.diag(1.0 - np.diag(common))  # every item has variance 1
    s = np.array(signs)
    return cov * np.outer(s, s), names, phi


@pytest.mark.parametrize("name", SCENARIOS)
def test_scenario_truth_matches_a_direct_computation(name):
    sc = make_scenario(name, seed=5, n=50_000)
    cov, names, phi = _direct_implied(sc)
    df, _, latent = simulate_survey(sc.spec, return_latent=True)
    assert items_of(df) == names
    # The project's implied correlation equals the hand-written one (continuous items).
    pop = population_item_correlation(sc.spec).loc[names, names].to_numpy()
    assert np.allclose(pop, cov, atol=1e-12)
    x = df[names].to_numpy(dtype=float)
    if sc.spec.scale_points is None:
        # numpy's sample covariance at n = 50,000: SE of each entry at most ~0.0065
        assert np.abs(np.cov(x.T) - cov).max() < 0.03
    else:
        disc = population_item_correlation(sc.spec, discrete=True).loc[names, names].to_numpy()
        assert np.abs(np.corrcoef(x.T) - disc).max() < 0.03
        shares = np.bincount(x.astype(int).ravel(), minlength=6)[1:] / x.size
        assert np.allclose(shares, sc.spec.category_probabilities, atol=0.005)
    # True standardized paths: solved from the hand-written trait covariance (exact) and
    # recovered by numpy least squares on the latent scores.
    for (y, pred), value in sc.true_paths.items():
        preds = list(sc.spec.paths[y])
        ix = [["sup", "eng", "sty"].index(q) for q in preds]
        beta = np.linalg.solve(phi[np.ix_(ix, ix)], phi[ix, ["sup", "eng", "sty"].index(y)])
        assert value == pytest.approx(beta[preds.index(pred)], abs=1e-12)
        ols = std_ols(latent[y].to_numpy(), latent[preds].to_numpy())
        assert ols[preds.index(pred)] == pytest.approx(value, abs=0.02)
    # True method share: mean squared method loading (M and A) over the substantive items.
    subst = [c for c in sc.spec.constructs if c.role == "substantive"]
    direct = np.mean([m * m + sc.spec.acquiescence ** 2 for c in subst for m in c.method_loadings()])
    assert sc.method_share == pytest.approx(direct, abs=1e-12)
    if sc.spec.method_trait_corr:
        assert latent[METHOD_FACTOR].corr(latent["sup"]) == pytest.approx(0.30, abs=0.02)
    if sc.spec.acquiescence:
        # after recoding, a reverse-keyed item correlates negatively with the style
        recoded = df["sup2"].to_numpy(dtype=float) * -1
        assert np.corrcoef(recoded, latent["acquiescence"])[0, 1] == pytest.approx(-0.35, abs=0.02)
        assert np.corrcoef(df["sup1"], latent["acquiescence"])[0, 1] == pytest.approx(0.35, abs=0.02)


def test_skewed_thresholds_match_bivariate_normal():
    # Skewed 5-point items with continuous correlation .49: the exact covariance by direct
    # bivariate normal sums (scipy), as in the symmetric case above.
    probs = (0.01, 0.03, 0.06, 0.25, 0.65)
    spec = SurveySpec([ConstructSpec("a", 2, 0.7)], paths={}, scale_points=5,
                      category_probabilities=probs)
    got = population_item_correlation(spec, discrete=True).iloc[0, 1]
    tau = norm.ppf(np.cumsum(probs)[:-1])
    rho = 0.49
    mvn = multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]])
    cov = sum(mvn.cdf([-a, -b]) - norm.sf(a) * norm.sf(b) for a in tau for b in tau)
    p = np.array(probs)
    v = np.arange(1, 6)
    assert got == pytest.approx(cov / (p @ (v - p @ v) ** 2), abs=1e-5)


@pytest.mark.parametrize("bad, message", [
    (dict(method_trait_corr={"engagement": 0.3}), "exogenous"),
    (dict(method_trait_corr={"support": 1.2}), "not in"),
    (dict(acquiescence=0.9), "negative error variance"),
    (dict(scale_points=5, category_probabilities=[0.5, 0.5]), "5 positive shares"),
    (dict(category_probabilities=[0.2] * 5), "needs scale_points"),
])
def test_impossible_departures_raise(bad, message):
    with pytest.raises(ValueError, match=message):
        implied_truth(scenario(**bad))


def test_departures_off_leave_the_spec_record_unchanged():
    record = spec_to_dict(scenario())
    assert not {"method_trait_corr", "acquiescence", "category_probabilities"} & set(record)
    assert spec_to_dict(scenario(acquiescence=0.2))["acquiescence"] == 0.2
