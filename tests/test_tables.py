"""Tidy tables from a report (CSV and Excel): shapes, values and round trips.

Reports come from samesource.pipeline.analyze on a simulated survey with known structure
(sample_surveys/simulate.py) and on the bundled sample survey; Excel files are read back with
openpyxl, CSV text with pandas.
"""

from __future__ import annotations

import copy
import io
import json
import math
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest

from samesource.output.tables import absent_reason, report_tables, tables_csv, tables_xlsx
from samesource.pipeline import analyze
from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def sample() -> dict:
    design = json.loads((ROOT / "sample_surveys" / "staff_survey_design.json").read_text())
    return analyze(ROOT / "sample_surveys" / "staff_survey.csv", design).report


@pytest.fixture(scope="module")
def plain() -> dict:
    # no marker, no method construct, two paths: the marker and measured-method estimates are absent
    spec = SurveySpec(constructs=[ConstructSpec("sup", 4, 0.7, 0.3), ConstructSpec("eng", 4, 0.7, 0.3, reverse=[3]),
                                  ConstructSpec("stay", 3, 0.7, 0.3, prefix="sty")],
                      paths={"eng": {"sup": 0.3}, "stay": {"eng": 0.45}}, n=300, scale_points=5, seed=4)
    df, _ = simulate_survey(spec)
    return analyze(df.to_csv(index=False).encode(), design_for(spec), name="plain.csv").report


def _text(v) -> str:
    """A cell as text: missing is empty, numbers and flags as printed."""
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    return str(bool(v)) if isinstance(v, bool | np.bool_) else str(v)


def test_shapes_follow_the_report(sample):
    t = report_tables(sample)
    cons = sample["constructs"]
    assert list(t)[0] == "cautions"
    assert t["cautions"]["caution"].tolist() == sample["cautions"]
    assert t["constructs"]["construct"].tolist() == list(cons)
    assert len(t["items"]) == sum(len(c["items"]) for c in cons.values())
    mm = sample["measurement_model"]
    assert len(t["factor_correlations"]) == len(mm["factor_correlations"])
    assert len(t["htmt"]) == len(mm["htmt"]) == len(cons) * (len(cons) - 1) // 2
    assert len(t["fornell_larcker"]) == len(mm["fornell_larcker"])
    assert len(t["paths"]) == sum(len(p["estimates"]) for p in sample["paths"])
    assert len(t["sensitivity"]) == sum(len(p["sensitivity"]["curve"]) for p in sample["paths"])
    assert len(t["sensitivity_summary"]) == len(sample["paths"])
    assert len(t["screening"]) == sample["screening"]["n_flagged"]
    assert len(t["screening_rules"]) == len(sample["screening"]["checks"])
    assert len(t["warnings"]) == len(sample["warnings"])
    assert len(t["method_checks"]) == len(sample["method_variance"]["verdict"]["reasons"]) + 1  # + the verdict
    assert set(t["method_checks"]["level"]) <= {"none", "minor", "substantial"}
    assert list(t["paths"].columns[:12]) == ["outcome", "predictor", "method", "label", "estimate", "se", "ci_lo",
                                             "ci_hi", "p", "ci_method", "status", "preferred"]


def test_values_equal_the_report(sample):
    t = report_tables(sample)
    for _, row in t["paths"].iterrows():
        p = next(p for p in sample["paths"] if (p["outcome"], p["predictor"]) == (row["outcome"], row["predictor"]))
        e = p["estimates"][row["method"]]
        assert row["preferred"] == (row["method"] == p["preferred"])
        assert row["estimate"] == e["estimate"] and row["se"] == e["se"]
        assert [row["ci_lo"], row["ci_hi"]] == e["ci"] and row["p"] == e["p"]
    # one preferred estimate per path
    assert t["paths"].groupby(["outcome", "predictor"])["preferred"].sum().tolist() == [1] * len(sample["paths"])
    for _, row in t["constructs"].iterrows():
        c = sample["constructs"][row["construct"]]
        assert row["alpha"] == c["alpha"] and [row["alpha_ci_lo"], row["alpha_ci_hi"]] == c["alpha_ci"]
        assert row["ave_meets"] == (c["ave"] >= sample["thresholds"]["ave"]["value"])
    fit = t["fit"].set_index("measure")["value"]
    assert fit["cfi"] == sample["measurement_model"]["fit"]["cfi"]
    assert fit["rmsea_ci_hi"] == sample["measurement_model"]["fit"]["rmsea_ci"][1]
    s = t["sensitivity"]
    first = sample["paths"][0]
    curve = s[(s["outcome"] == first["outcome"]) & (s["predictor"] == first["predictor"])]
    assert curve["estimate"].tolist() == [pt["estimate"] for pt in first["sensitivity"]["curve"]]
    assert t["screening"]["row"].tolist() == [f["row"] for f in sample["screening"]["flagged_rows"]]


def test_absent_estimates_are_rows_with_their_reason(plain):
    t = report_tables(plain)
    absent = t["paths"][t["paths"]["method"].isin(["marker_adjusted", "measured_method_adjusted"])]
    assert len(absent) == 2 * len(plain["paths"])
    assert absent["estimate"].isna().all() and (absent["status"] == "absent").all()
    assert set(absent["note"]) == {"the design has no marker construct", "the design has no method construct"}
    assert absent_reason(plain, "marker_adjusted", None) == "the design has no marker construct"


def test_csv_round_trips_through_pandas(sample):
    tables = report_tables(sample)
    files = tables_csv(tables)
    assert set(files) == {f"{name}.csv" for name in tables}
    for name, df in tables.items():
        back = pd.read_csv(io.StringIO(files[f"{name}.csv"]))
        assert list(back.columns) == list(df.columns) and back.shape == df.shape, name
        for col in df.columns:
            if pd.api.types.is_numeric_dtype(df[col]) and not pd.api.types.is_bool_dtype(df[col]):
                assert np.allclose(back[col].to_numpy(float), df[col].to_numpy(float), equal_nan=True, rtol=0,
                                   atol=0), (name, col)
            else:
                assert [_text(a) for a in df[col]] == [_text(b) for b in back[col]], (name, col)
    # the text is UTF-8 (names and rules carry non-ASCII characters such as the em dash)
    for text in files.values():
        text.encode("utf-8")


def test_xlsx_opens_with_the_expected_sheets(sample):
    tables = report_tables(sample)
    wb = openpyxl.load_workbook(io.BytesIO(tables_xlsx(tables)))
    assert wb.sheetnames[0] == "cautions"
    assert set(wb.sheetnames) == set(tables)
    assert all(len(n) <= 31 for n in wb.sheetnames)
    ws = wb["cautions"]
    assert [c.value for c in ws[1]] == ["number", "caution"]
    assert [ws.cell(row=i + 2, column=2).value for i in range(len(sample["cautions"]))] == sample["cautions"]
    ws = wb["paths"]
    header = [c.value for c in ws[1]]
    est = header.index("estimate") + 1
    assert ws.cell(row=2, column=est).value == pytest.approx(tables["paths"]["estimate"].iloc[0])
    assert ws.max_row == len(tables["paths"]) + 1


def test_xlsx_keeps_user_text_as_text(plain):
    # A construct named like a spreadsheet formula must arrive as text, not as a live formula.
    r = copy.deepcopy(plain)
    r["constructs"] = {("=HYPERLINK(\"x\",\"y\")" if k == "sup" else k): v for k, v in r["constructs"].items()}
    wb = openpyxl.load_workbook(io.BytesIO(tables_xlsx(report_tables(r))))
    cell = wb["constructs"]["A2"]
    assert cell.value == "=HYPERLINK(\"x\",\"y\")" and cell.data_type == "s"


def test_csv_keeps_user_text_from_becoming_a_formula(plain):
    # OWASP "CSV Injection": text cells starting with = + - @ are escaped with a leading
    # apostrophe; numbers, including negative ones, stay numbers.
    r = copy.deepcopy(plain)
    r["constructs"] = {("=HYPERLINK(\"x\",\"y\")" if k == "sup" else k): v for k, v in r["constructs"].items()}
    csv = tables_csv(report_tables(r))
    constructs = pd.read_csv(io.StringIO(csv["constructs.csv"]))
    assert "'=HYPERLINK(\"x\",\"y\")" in constructs["construct"].tolist()
    paths = pd.read_csv(io.StringIO(csv["paths.csv"]))
    assert pd.api.types.is_numeric_dtype(paths["estimate"])
    assert not any(str(v).startswith("'") for v in paths["estimate"])


def test_long_and_clashing_sheet_names_are_cut_and_kept_apart():
    tables = {"cautions": pd.DataFrame({"caution": ["c"]}),
              "a" * 40: pd.DataFrame({"x": [1]}), "a" * 35: pd.DataFrame({"x": [2]})}
    wb = openpyxl.load_workbook(io.BytesIO(tables_xlsx(tables)))
    assert wb.sheetnames[0] == "cautions" and len(set(wb.sheetnames)) == 3
    assert all(len(n) <= 31 for n in wb.sheetnames)


def test_small_groups_never_reach_the_tables(sample):
    teams = sample["teams"]
    assert isinstance(teams, dict)
    k = teams["min_group_size"]
    r = copy.deepcopy(sample)
    r["teams"]["group_scores"] = list(teams["group_scores"]) + [{"group": "TINY", "n": k - 1, "support": 1.0},
                                                                {"group": "UNSIZED", "support": 1.0}]
    t = report_tables(r)
    assert "TINY" not in set(t["teams"]["group"]) and "UNSIZED" not in set(t["teams"]["group"])
    assert len(t["teams"]) == len(teams["group_scores"]) and (t["teams"]["n"] >= k).all()
    assert t["team_constructs"]["construct"].tolist() == list(teams["constructs"])
    assert len(t["team_paths"]) == len(teams["paths"])
    assert "split_source_estimate" in t["team_paths"].columns


def test_missing_sections_give_empty_tables_of_the_same_shape(sample):
    full = report_tables(sample)
    r = {k: v for k, v in sample.items() if k in ("cautions", "schema")}
    empty = report_tables(r)
    assert "teams" not in empty
    for name, df in empty.items():
        assert list(df.columns)[: len(full[name].columns)] == list(full[name].columns), name
        if name != "cautions":
            assert len(df) == 0, name
    csv = tables_csv(empty)
    assert pd.read_csv(io.StringIO(csv["paths.csv"])).shape == (0, len(full["paths"].columns))


def test_second_sources_and_the_correction_check_get_tables_of_their_own():
    """Hand-made report fragments: one row per source, per compared estimate, per check cell."""
    report = {"cautions": [], "data": {"sources": {"boss": {"name": "boss", "file": "b.csv", "rows": 3, "matched": 2,
                                                            "response_scale": {"min": 1, "max": 5},
                                                            "examples": {"main_without_match": ["E1"]}}}},
              "paths": [{"outcome": "y", "predictor": "x", "estimates": {}, "sensitivity": {"curve": []},
                         "cross_source_check": {"counterpart": {"outcome": "y2", "predictor": "x"},
                                                "benchmark": {"method": "latent", "estimate": 0.2},
                                                "by_estimate": {"observed": {"estimate": 0.3, "difference": 0.1},
                                                                "latent": {"estimate": 0.25, "difference": 0.05}},
                                                "closest": "latent"}}],
              "correction_check": {"paths": [{"outcome": "y", "predictor": "x", "truth": 0.2, "lean_on": "latent",
                                              "scenarios": {"fitted": {"latent": {"n": 5, "bias": 0.01}}}}]}}
    t = report_tables(report)
    assert t["sources"].loc[0, "response_scale_max"] == 5 and "examples_main_without_match" not in t["sources"]
    assert t["cross_source"]["closest"].tolist() == [False, True]
    assert t["correction_check"].loc[0, ["scenario", "method", "bias", "lean_on"]].tolist() == [
        "fitted", "latent", 0.01, True]


def test_an_absent_interval_keeps_its_two_columns():
    # A split-team estimate without an interval used to give a third, empty "ci" column in
    # team_paths.csv beside the "ci_lo"/"ci_hi" of rows that have one.
    from samesource.output.report import SplitTeamEstimate
    from samesource.output.tables import flatten

    with_ci = flatten(SplitTeamEstimate(0.2, (0.1, 0.3), 40, 12, 6, None))
    without = flatten(SplitTeamEstimate(0.2, None, 40, 12, 6, "too few teams"))
    assert list(without) == list(with_ci)
    assert without["ci_lo"] is None and without["ci_hi"] is None
