"""Survey files as they arrive (issue 12): platform item names, codes for no answer, reverse
items the design does not mark, text answers, workbooks with a cover sheet, SPSS labels, row
names. The data are invented (a fictional ward pulse survey); numbers checked against
outside references are named beside each check."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pyreadstat
import pytest

from samesource.errors import DesignError, InputError
from samesource.input.design import answer_key, check_columns, draft_design, parse_design
from samesource.input.drafting import draft_from_table, recognise_scale
from samesource.input.loading import load_table, text_answers
from samesource.input.prepare import prepare, standing_apart
from samesource.input.review import review_section
from samesource.options import AnalysisOptions
from samesource.output.summary import text_summary

ROOT = Path(__file__).resolve().parents[1]
AGREE = ["Strongly disagree", "Disagree", "Neither agree nor disagree", "Agree", "Strongly agree"]


def pulse(n: int = 300, seed: int = 7, *, code: int | None = 99) -> pd.DataFrame:
    """Two question blocks (Q3: workload, 4 items, Q4_2 and Q4_4 worded the other way in Q4),
    a ward per respondent, platform-style names, ``code`` for no answer in a few cells."""
    rng = np.random.default_rng(seed)
    f3, f4 = rng.normal(size=n), rng.normal(size=n)

    def item(f, flip=False):
        x = np.clip(np.round(3 + 0.9 * f + rng.normal(scale=0.7, size=n)), 1, 5)
        return 6 - x if flip else x

    d: dict = {"ResponseId": [f"R_{i:05d}" for i in range(n)],
               "Ward": rng.choice(["North", "South", "East", "West", "Day unit"], size=n)}
    for k in range(1, 5):
        d[f"Q3_{k}"] = item(f3)
    d["Q3_4_TEXT"] = [""] * n
    for k in range(1, 5):
        d[f"Q4_{k}"] = item(f4, flip=k in (2, 4))
    df = pd.DataFrame(d)
    if code is not None:
        for col in ("Q3_2", "Q4_1", "Q4_3"):
            df.loc[rng.choice(n, 15, replace=False), col] = code
    return df


def write_r_style_csv(df: pd.DataFrame, path: Path) -> Path:
    """As the most common statistics environment's default export writes a table: a header
    whose first cell is empty, row names "1", "2", ... beneath, text quoted."""
    lines = ['"",' + ",".join(f'"{c}"' for c in df.columns)]
    for i, row in enumerate(df.itertuples(index=False), start=1):
        cells = [f'"{v}"' if isinstance(v, str) else f"{v:g}" for v in row]
        lines.append(f'"{i}",' + ",".join(cells))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


# --------------------------------------------------------------------------- reading


def test_row_names_under_an_empty_first_header_cell_are_read_as_labels(tmp_path):
    df = pulse(n=40)
    t = load_table(write_r_style_csv(df, tmp_path / "pulse.csv"))
    assert list(t.frame.columns) == list(df.columns)
    assert t.row_names == [str(i) for i in range(1, 41)]
    w = next(w for w in t.warnings if w["code"] == "row_names")
    assert "1 to 40" in w["message"]
    # an unnamed column that is data (repeated values) is still refused
    (tmp_path / "bad.csv").write_text(",a,b\n1,2,3\n1,4,5\n", encoding="utf-8")
    with pytest.raises(InputError, match="no name"):
        load_table(tmp_path / "bad.csv")


def workbook_with_cover(df: pd.DataFrame) -> bytes:
    wb = openpyxl.Workbook()
    cover = wb.active
    cover.title = "Cover"
    cover.append(["Ward pulse survey, autumn (invented data)"])
    cover.append(["Exported by the survey platform"])
    wb.create_sheet("Questions").append(["Q3_1", "I have enough time for my patients"])
    ws = wb.create_sheet("Responses")
    ws.append(list(df.columns))
    for row in df.itertuples(index=False):
        ws.append([None if isinstance(v, str) and not v else v for v in row])
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def test_a_workbook_with_a_cover_sheet_is_read_from_the_sheet_of_respondents(tmp_path):
    df = pulse(n=60)
    path = tmp_path / "pulse.xlsx"
    path.write_bytes(workbook_with_cover(df))
    t = load_table(path)
    assert t.sheet == "Responses" and len(t.frame) == 60
    assert [s["name"] for s in t.sheets] == ["Cover", "Questions", "Responses"]
    assert next(s for s in t.sheets if s["name"] == "Responses")["rows"] == 60
    msg = next(w for w in t.warnings if w["code"] == "sheet_chosen")["message"]
    assert "'Responses' (60 rows" in msg and "--sheet" in msg
    # asked for the cover sheet, a missing item names the sheet read and the one that has it
    cover = load_table(path, sheet="Cover")
    design = parse_design({"constructs": {"q3": {"items": ["Q3_1", "Q3_2"]}},
                           "response_scale": {"min": 1, "max": 5}, "missing_codes": [99]})
    with pytest.raises(DesignError) as e:
        prepare(cover, design)
    assert "sheet 'Cover'" in str(e.value) and "sheet 'Responses'" in str(e.value)


def test_sav_variable_and_value_labels_fill_the_draft(tmp_path):
    df = pulse(n=120).drop(columns=["Q3_4_TEXT", "Ward"])
    labels = {i + 1: t for i, t in enumerate(AGREE)} | {99: "No answer"}
    items = [c for c in df.columns if c.startswith("Q")]
    pyreadstat.write_sav(df, str(tmp_path / "pulse.sav"),
                         column_labels={c: f"{'Workload' if c.startswith('Q3') else 'Support'} - item"
                                        for c in df.columns},
                         variable_value_labels={c: labels for c in items})
    t = load_table(tmp_path / "pulse.sav")
    assert t.variable_labels["Q3_1"] == "Workload - item"
    d = draft_from_table(t).design
    assert d["response_scale"] == {"min": 1, "max": 5}
    assert d["missing_codes"] == [99]
    assert d["answer_labels"]["Strongly agree"] == 5 and "No answer" not in d["answer_labels"]


# --------------------------------------------------------------------------- drafting


def test_draft_groups_the_names_platforms_export():
    cols = ["id", "Q3_1", "Q3_2", "Q3_3", "Q3_1_TEXT", "Q12r1", "Q12r2", "Q4.1", "Q4.2", "q5-1",
            "q5-2", "clim_1", "clim_2", "Q7", "Q8", "comment"]
    left: list[dict] = []
    d = draft_design(cols, left_out=left)
    assert d["constructs"] == {"q3": {"items": ["Q3_1", "Q3_2", "Q3_3"]},
                               "q12": {"items": ["Q12r1", "Q12r2"]},
                               "q4": {"items": ["Q4.1", "Q4.2"]},
                               "q5": {"items": ["q5-1", "q5-2"]},
                               "clim": {"items": ["clim_1", "clim_2"]}}
    reasons = {x["column"]: x["reason"] for x in left}
    assert "open-text" in reasons["Q3_1_TEXT"]
    assert "single question" in reasons["Q7"] and "single question" in reasons["Q8"]
    assert "stem and a number" in reasons["comment"]
    parse_design(d)


def test_draft_from_the_answers_proposes_scale_codes_id_team_and_reverse_items(tmp_path):
    t = load_table(write_r_style_csv(pulse(), tmp_path / "pulse.csv"))
    draft = draft_from_table(t)
    d = draft.design
    assert d["response_scale"] == {"min": 1, "max": 5}
    assert d["missing_codes"] == [99]
    assert d["id_column"] == "ResponseId" and d["group_column"] == "Ward"
    # Q4_2 and Q4_4 were generated worded the other way (known truth)
    assert d["constructs"]["q4"]["reverse"] == ["Q4_2", "Q4_4"]
    assert "reverse" not in d["constructs"]["q3"]
    assert {x["column"] for x in draft.left_out} == {"Q3_4_TEXT"}
    # the draft, as it stands, is accepted by prepare
    prepared = prepare(t, parse_design(d))
    assert prepared.scale_source == "design"


def test_text_answers_are_recognised_and_mapped():
    assert recognise_scale(["agree", "Strongly Agree ", "disagree", "Don’t know"]) == {
        "agree": 3.0, "Strongly Agree ": 4.0, "disagree": 2.0, "Don’t know": None}
    assert recognise_scale(AGREE)["Neither agree nor disagree"] == 3.0
    assert recognise_scale(["Never", "Sometimes", "Always"]) == {"Never": 1.0, "Sometimes": 3.0,
                                                                "Always": 5.0}
    assert recognise_scale(["Yes", "No"]) is None
    assert answer_key("  Strongly   AGREE ") == "strongly agree"


def text_export(tmp_path: Path) -> Path:
    df = pulse(n=150, code=None).drop(columns=["Q3_4_TEXT"])
    for c in df.columns:
        if c.startswith("Q"):
            df[c] = [AGREE[int(v) - 1] for v in df[c]]
    df.loc[4, "Q3_1"] = "Don't know"
    p = tmp_path / "pulse_text.csv"
    df.to_csv(p, index=False)
    return p


def test_text_answers_flow_from_the_draft_into_the_numbers(tmp_path):
    t = load_table(text_export(tmp_path))
    found = text_answers(t)
    assert set(found) == {f"Q{q}_{k}" for q in (3, 4) for k in range(1, 5)}
    assert found["Q3_1"]["row"] == 2
    d = draft_from_table(t).design
    assert d["answer_labels"]["Strongly agree"] == 5 and d["answer_labels"]["Don't know"] is None
    assert d["response_scale"] == {"min": 1, "max": 5}
    p = prepare(t, parse_design(d))
    raw = pd.read_csv(tmp_path / "pulse_text.csv")
    # row 2 of the file (index 0): the text mapped by its place on the scale
    assert p.items["Q3_2"].iloc[0] == AGREE.index(raw["Q3_2"].iloc[0]) + 1
    assert np.isnan(p.items["Q3_1"].iloc[4])  # "Don't know" is a missing answer


def test_unmapped_text_answers_are_refused_saying_how_to_map_them(tmp_path):
    t = load_table(text_export(tmp_path))
    design = {"constructs": {"q3": {"items": ["Q3_1", "Q3_2", "Q3_3"]}},
              "response_scale": {"min": 1, "max": 5}}
    with pytest.raises(InputError) as e:
        prepare(t, parse_design(design))
    assert e.value.column == "Q3_1" and e.value.row == 2 and "answer_labels" in str(e.value)
    # a construct's own labels win over the design's; a text they miss is named
    design["answer_labels"] = {t: i for i, t in enumerate(AGREE, 1)} | {"Don't know": None}
    design["constructs"]["q3"]["answer_labels"] = {"agree": 1}
    with pytest.raises(InputError) as e:
        prepare(t, parse_design(design))
    assert "do not map" in str(e.value)
    del design["constructs"]["q3"]["answer_labels"]
    assert prepare(t, parse_design(design)).items.notna().sum().sum() > 0


# --------------------------------------------------------------------------- refusals


def test_standing_apart_rules():
    assert standing_apart(np.array([1, 2, 3, 4, 5, 99, 99, np.nan])) == ([99.0], (1.0, 5.0))
    assert standing_apart(np.array([1, 2, 3, 4, 5, 9, 99, 999])) == ([9.0, 99.0, 999.0], (1.0, 5.0))
    assert standing_apart(np.array([-9, -1, 1, 2, 3, 4, 5])) == ([-9.0, -1.0], (1.0, 5.0))
    assert standing_apart(np.array([1, 2, 3, 4, 5, 6, 7, 9])) == ([9.0], (1.0, 7.0))
    assert standing_apart(np.arange(1, 10)) == ([], (1.0, 9.0))  # a 1 to 9 scale
    assert standing_apart(np.array([0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10])) == ([], (0.0, 10.0))
    assert standing_apart(np.array([1.5, 2.5, 99.0])) == ([], (1.5, 99.0))  # decimals: no rule
    assert standing_apart(np.arange(-3, 4)) == ([], (-3.0, 3.0))  # a scale with a middle of 0
    assert standing_apart(np.array([-1, 1, 2, 3, 4, 5])) == ([-1.0], (1.0, 5.0))
    assert standing_apart(np.array([-9, 0, 1, 2, 3])) == ([-9.0], (0.0, 3.0))
    slider = np.array([0, 3, 4, 5, 6, 7, 8, 10, 11, 12, 13, 14, 15, 37, 55, 80, 100])
    assert standing_apart(slider) == ([], (0.0, 100.0))  # a slider 0 to 100: gaps are no codes


def test_no_response_scale_and_a_code_standing_apart_stops_the_run(tmp_path):
    t = load_table(write_r_style_csv(pulse(), tmp_path / "pulse.csv"))
    design = {"constructs": {"q3": {"items": ["Q3_1", "Q3_2", "Q3_3", "Q3_4"]}}}
    with pytest.raises(DesignError) as e:
        prepare(t, parse_design(design))
    msg = str(e.value)
    assert e.value.field == "response_scale" and e.value.code == "values_apart"
    assert "99 (15x, in Q3_2)" in msg and '"missing_codes": [99]' in msg
    assert '"response_scale": {"min": 1, "max": 5}' in msg
    design["missing_codes"] = [99]  # with the code listed, the scale from the data is fine
    assert prepare(t, parse_design(design)).scale_max == 5


def test_cli_exits_2_naming_the_codes(tmp_path):
    data = write_r_style_csv(pulse(), tmp_path / "pulse.csv")
    dp = tmp_path / "design.json"
    dp.write_text(json.dumps({"constructs": {"q3": {"items": ["Q3_1", "Q3_2", "Q3_3"]},
                                             "q4": {"items": ["Q4_1", "Q4_2", "Q4_3"]}},
                              "paths": [{"outcome": "q4", "predictors": ["q3"]}]}))
    r = subprocess.run([sys.executable, "-m", "samesource.service.cli", "analyze", str(data), "--design",
                        str(dp), "--out", str(tmp_path / "out")], capture_output=True, text=True,
                       cwd=ROOT, timeout=600)
    assert r.returncode == 2
    assert "missing_codes" in r.stderr and "response_scale" in r.stderr and "99" in r.stderr


# --------------------------------------------------------------------------- forgiving


def test_option_values_ignore_case_and_unknown_names_get_a_suggestion():
    assert AnalysisOptions.from_dict({"missing": "FIML"}).missing == "fiml"
    with pytest.raises(InputError, match="did you mean 'confidence'"):
        AnalysisOptions.from_dict({"confidance": 0.9})
    with pytest.raises(InputError, match="did you mean 'fiml'"):
        AnalysisOptions.from_dict({"missing": "fimll"})


def test_unknown_names_in_a_design_get_the_nearest_name():
    base = {"constructs": {"Support": {"items": ["s1", "s2"]}, "Engagement": {"items": ["e1", "e2"]}},
            "paths": [{"outcome": "engagement", "predictors": ["Support"]}]}
    with pytest.raises(DesignError, match="did you mean 'Engagement'"):
        parse_design(base)
    base["paths"] = []
    base["reponse_scale"] = {"min": 1, "max": 5}
    with pytest.raises(DesignError, match="did you mean 'response_scale'"):
        parse_design(base)
    del base["reponse_scale"]
    base["constructs"]["Support"]["reverse"] = ["S2"]
    with pytest.raises(DesignError, match="did you mean 's2'"):
        parse_design(base)
    base["constructs"]["Support"]["reverse"] = []
    with pytest.raises(DesignError, match="did you mean 'E1'"):
        check_columns(parse_design(base), ["s1", "s2", "E1", "e2"])
    assert parse_design(dict(base, constructs={**base["constructs"],
                                               "Mark": {"items": ["m1", "m2"], "role": "Marker"}}
                             )).marker.name == "Mark"
    with pytest.raises(DesignError, match="same answer"):
        parse_design(dict(base, answer_labels={"Agree": 4, " agree": 3}))


# --------------------------------------------------------------------------- review


def test_unmarked_reverse_items_put_review_first(tmp_path):
    """Q4_2 and Q4_4 run the other way and the design does not say so: review_needed, naming
    them and the fix, at the top of the summary and on its last line."""
    from samesource.pipeline import analyze

    t = load_table(write_r_style_csv(pulse(n=400), tmp_path / "pulse.csv"))
    design = {"constructs": {"q3": {"items": ["Q3_1", "Q3_2", "Q3_3", "Q3_4"]},
                             "q4": {"items": ["Q4_1", "Q4_2", "Q4_3", "Q4_4"]}},
              "paths": [{"outcome": "q4", "predictors": ["q3"]}],
              "response_scale": {"min": 1, "max": 5}, "missing_codes": [99]}
    rep = analyze(t, design).report
    assert rep["review_needed"] is True
    reasons = {r["construct"]: r for r in rep["review_reasons"]}
    assert set(reasons) == {"q4"}
    r = reasons["q4"]
    assert r["code"] in ("negative_alpha", "negative_loading")
    assert set(r["items"]) in ({"Q4_2", "Q4_4"}, {"Q4_1", "Q4_3"})
    assert '"reverse"' in r["fix"]
    # the alpha behind it, against pingouin's
    import pingouin

    # listwise: the rows complete on every item of the design
    complete = prepare(t, parse_design(design)).items.dropna()[["Q4_1", "Q4_2", "Q4_3", "Q4_4"]]
    assert rep["constructs"]["q4"]["alpha"] == pytest.approx(pingouin.cronbach_alpha(complete)[0], abs=1e-9)
    lines = text_summary(rep).splitlines()
    assert lines[0].startswith("REVIEW BEFORE USE")
    assert lines[-1].startswith("Review needed before use")
    # marked as the draft proposes, nothing to review
    design["constructs"]["q4"]["reverse"] = ["Q4_2", "Q4_4"]
    fixed = analyze(t, design).report
    assert fixed["review_needed"] is False and fixed["review_reasons"] == []


def test_review_from_report_sections():
    d = parse_design({"constructs": {"a": {"items": ["a1", "a2", "a3"], "reverse": ["a3"]}}})
    cons = {"a": {"alpha": -0.4, "items": ["a1", "a2", "a3"],
                  "item_stats": {"a1": {"loading": 0.7}, "a2": {"loading": 0.6},
                                 "a3": {"loading": -0.5}}}}
    out = review_section(cons, d, scale_source="data")
    assert out["review_needed"] is True
    codes = [r["code"] for r in out["review_reasons"]]
    assert codes == ["negative_alpha", "scale_from_data"]
    assert "take a3 out of \"reverse\"" in out["review_reasons"][0]["fix"]
    json.dumps(out)  # plain JSON


# --------------------------------------------------------------------------- command line


def cli(*args) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "samesource.service.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=ROOT, timeout=600)


def test_draft_design_prints_the_draft_and_says_what_it_left_out(tmp_path):
    path = tmp_path / "pulse.xlsx"
    path.write_bytes(workbook_with_cover(pulse(n=80)))
    r = cli("draft-design", path)
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert set(d["constructs"]) == {"q3", "q4"} and d["missing_codes"] == [99]
    assert "sheet 'Responses' was read" in r.stderr
    assert "Q3_4_TEXT: an open-text box" in r.stderr
    assert "drafted reverse (q4): Q4_2, Q4_4" in r.stderr


def test_progress_lines_off_a_terminal_and_the_review_on_the_last_line(tmp_path):
    data = write_r_style_csv(pulse(n=300), tmp_path / "pulse.csv")
    dp = tmp_path / "design.json"
    dp.write_text(json.dumps({"constructs": {"q3": {"items": ["Q3_1", "Q3_2", "Q3_3", "Q3_4"]},
                                             "q4": {"items": ["Q4_1", "Q4_2", "Q4_3", "Q4_4"]}},
                              "paths": [{"outcome": "q4", "predictors": ["q3"]}],
                              "response_scale": {"min": 1, "max": 5}, "missing_codes": [99]}))
    r = cli("analyze", data, "--design", dp, "--out", tmp_path / "out", "--bootstrap", "20",
            "--missing", "FIML")
    assert r.returncode == 0, r.stderr
    lines = r.stderr.splitlines()
    assert "samesource: load (stage 1 of 8)" not in lines  # bad input still gets one line alone
    assert lines[0] == "samesource: screen (stage 2 of 8)"
    assert "samesource: reliability (stage 3 of 8)" in lines
    boot = [x for x in lines if "bootstrap" in x]
    assert boot[-1].endswith("(100%)") and 2 <= len(boot) <= 11
    out = r.stdout.strip().splitlines()
    assert out[0].startswith("REVIEW BEFORE USE")
    assert out[-1].startswith("Review needed before use")
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert report["review_needed"] is True and report["options"]["missing"] == "fiml"
    q = cli("analyze", data, "--design", dp, "--out", tmp_path / "out2", "--quiet")
    assert q.returncode == 0 and q.stderr == ""
    assert q.stdout.strip().splitlines()[-1].startswith("Review needed before use")
