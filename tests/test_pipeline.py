"""The whole analysis through its one entry point, checked against outside sources."""

import json
import math

import numpy as np
import pandas as pd
import pingouin as pg
import pytest
import semopy
from semopy.examples import holzinger39

from samesource.output.report_json import dumps
from samesource.pipeline import analyze

ROOT = __import__("pathlib").Path(__file__).resolve().parents[1]

HS_DESIGN = {
    "constructs": {
        "visual": {"items": ["x1", "x2", "x3"]},
        "textual": {"items": ["x4", "x5", "x6"]},
        "speed": {"items": ["x7", "x8", "x9"]},
    },
    "paths": [],
}


@pytest.fixture(scope="module")
def hs_data() -> pd.DataFrame:
    return holzinger39.get_data()


@pytest.fixture(scope="module")
def hs_report(hs_data) -> dict:
    return analyze(hs_data.to_csv(index=False).encode(), HS_DESIGN, name="hs.csv").report


def test_holzinger_swineford_measurement_model(hs_report):
    # Holzinger & Swineford (1939) data shipped inside semopy; three-factor CFA, N = 301.
    f = hs_report["measurement_model"]["fit"]
    assert f["n"] == 301 and f["df"] == 24
    assert f["chi2"] == pytest.approx(85.31, abs=0.01)   # reproduced with semopy (methods.md)
    assert f["cfi"] == pytest.approx(0.931, abs=0.0005)  # reproduced with semopy
    assert f["tli"] == pytest.approx(0.896, abs=0.0005)  # reproduced with semopy
    assert f["rmsea"] == pytest.approx(0.092, abs=0.0005)  # reproduced with semopy
    # widely published values, from memory
    assert f["rmsea_ci"][0] == pytest.approx(0.071, abs=0.001)
    assert f["rmsea_ci"][1] == pytest.approx(0.114, abs=0.001)
    assert f["srmr"] == pytest.approx(0.065, abs=0.0005)


def test_holzinger_swineford_factor_correlations_match_semopy(hs_data, hs_report):
    # Reference library: semopy's standardized estimates for the same model.
    m = semopy.Model(holzinger39.get_model())
    m.fit(hs_data, options={"ftol": 1e-12})
    est = m.inspect(std_est=True)
    cov = est[(est["op"] == "~~") & (est["lval"] != est["rval"])]
    ours = hs_report["measurement_model"]["factor_correlations"]
    for _, row in cov.iterrows():
        key = "|".join(sorted((row["lval"], row["rval"]), key=["visual", "textual", "speed"].index))
        assert ours[key] == pytest.approx(row["Est. Std"], abs=2e-3)
    loads = est[est["op"] == "~"]
    for _, row in loads.iterrows():  # semopy writes loadings as item ~ factor
        assert hs_report["constructs"][row["rval"]]["item_stats"][row["lval"]]["loading"] == \
            pytest.approx(row["Est. Std"], abs=2e-3)


def test_alpha_matches_pingouin(hs_data, hs_report):
    # Reference library: pingouin.cronbach_alpha with its Feldt interval.
    for name, c in HS_DESIGN["constructs"].items():
        a, ci = pg.cronbach_alpha(hs_data[c["items"]])
        assert hs_report["constructs"][name]["alpha"] == pytest.approx(a, abs=1e-9)
        assert hs_report["constructs"][name]["alpha_ci"] == pytest.approx(list(ci), abs=1e-3)  # pingouin rounds to 3


def test_omega_matches_an_independent_one_factor_fit(hs_data, hs_report):
    # Reference library: semopy fits each construct's one-factor model; omega total from its
    # loadings and error variances (McDonald 1999), latent variance scaled to 1.
    for name, c in HS_DESIGN["constructs"].items():
        m = semopy.Model(f"{name} =~ " + " + ".join(c["items"]))
        m.fit(hs_data, options={"ftol": 1e-12})
        est = m.inspect()
        lam = est[est["op"] == "~"].set_index("lval")["Estimate"]
        var_f = est[(est["op"] == "~~") & (est["lval"] == name) & (est["rval"] == name)]["Estimate"].iloc[0]
        theta = est[(est["op"] == "~~") & (est["lval"].isin(c["items"])) & (est["lval"] == est["rval"])] \
            .set_index("lval")["Estimate"]
        lam = lam[c["items"]] * math.sqrt(var_f)
        omega = lam.sum() ** 2 / (lam.sum() ** 2 + theta[c["items"]].sum())
        assert hs_report["constructs"][name]["omega"] == pytest.approx(omega, abs=2e-3)


def test_htmt_and_fornell_larcker_from_their_formulas(hs_data, hs_report):
    # Henseler, Ringle & Sarstedt (2015) HTMT from the item correlations, computed here.
    r = hs_data[[f"x{i}" for i in range(1, 10)]].corr().to_numpy()
    a, b = [0, 1, 2], [3, 4, 5]
    hetero = np.abs(r[np.ix_(a, b)]).mean()
    mono_a = np.mean([r[i, j] for i in a for j in a if i < j])
    mono_b = np.mean([r[i, j] for i in b for j in b if i < j])
    assert hs_report["measurement_model"]["htmt"]["visual|textual"] == pytest.approx(
        hetero / math.sqrt(mono_a * mono_b), abs=1e-9)
    fl = hs_report["measurement_model"]["fornell_larcker"]["visual|textual"]
    rr = hs_report["measurement_model"]["factor_correlations"]["visual|textual"] ** 2
    assert fl["r_squared"] == pytest.approx(rr)
    assert fl["holds"] == (fl["ave_a"] > rr and fl["ave_b"] > rr)


def test_report_is_strict_json_with_cautions(hs_report):
    text = dumps(hs_report)
    assert "NaN" not in text and "Infinity" not in text
    back = json.loads(text)
    assert back["schema"] == "samesource.report/1"
    assert any("not for decisions about individuals" in c for c in back["cautions"])
    assert any("not a causal effect" in c for c in back["cautions"])
    assert any("personal data" in c for c in back["cautions"])
    assert any("bound the bias" in c for c in back["cautions"])


@pytest.fixture(scope="module")
def sample() -> tuple[dict, dict]:
    truth = json.loads((ROOT / "sample_surveys" / "staff_survey_truth.json").read_text())
    design = json.loads((ROOT / "sample_surveys" / "staff_survey_design.json").read_text())
    report = analyze(ROOT / "sample_surveys" / "staff_survey.csv", design, {"missing": "fiml"}).report
    return report, truth


def test_sample_reliabilities_near_their_true_values(sample):
    # Known truth from the generator: alpha of the 7-point sum implied by the true loadings.
    report, truth = sample
    for name, c in truth["population"]["constructs"].items():
        assert report["constructs"][name]["alpha"] == pytest.approx(c["likert"]["alpha"], abs=0.03), name


def test_sample_flags_method_variance_and_planted_straight_liners(sample):
    report, truth = sample
    assert report["method_variance"]["verdict"]["level"] == "substantial"
    share = report["method_variance"]["method_factor"]["method_share"]
    assert share == pytest.approx(0.1225, abs=0.04)  # truth: 0.35^2 of continuous item variance
    assert report["data"]["missing_handling"]["method"] == "fiml"
    assert report["data"]["rows_analyzed"] == 2500
    planted = {c["respondent"] for c in truth["sample"]["careless_responders"]}
    flagged = {f["row"] for f in report["screening"]["flagged_rows"]}
    csv = pd.read_csv(ROOT / "sample_surveys" / "staff_survey.csv")
    rows = {int(i) + 2 for i in csv.index[csv["respondent"].isin(planted)]}  # header is row 1
    assert len(rows) == 3 and rows <= flagged


def test_listwise_recommends_fiml_when_many_rows_drop():
    design = json.loads((ROOT / "sample_surveys" / "staff_survey_design.json").read_text())
    report = analyze(ROOT / "sample_surveys" / "staff_survey.csv", design).report
    mh = report["data"]["missing_handling"]
    assert mh["method"] == "listwise" and mh["listwise_drop_share"] > 0.05
    assert "full-information ML" in mh["recommendation"]
    assert report["data"]["excluded_rows"] == report["data"]["rows"] - report["data"]["rows_analyzed"]
