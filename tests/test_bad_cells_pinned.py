"""Every kind of odd or bad cell, pinned: what the readers and `prepare` make of it, and the
exact error (message, file, row, column, code) for each cell they refuse.

Why pinned: issue 15 rewrites reading and preparing column-wise; this module fixes the
behaviour as it stood before that work, so a faster reader must give the same numbers, the
same warnings and the same messages word for word. The fixtures are invented (a fictional
staff survey; this is a regression pin of our own behaviour, not a check of a statistic), and
the outside reference is the pinned file itself (tests/data/bad_cells/pinned.json), written
by ``python tests/test_bad_cells_pinned.py`` from the code before the rewrite.

- ``oddities_survey.csv``: a survey of 240 respondents that loads, with every kind of cell
  the readers accept: blanks of every kind (empty, spaces, tab), missing words (NA, n/a,
  #N/A, nan, ., null in any case), missing codes (-99 written several ways), answer texts
  mapped by answer_labels (one meaning no answer), padded and signed numbers (" 3", "+2",
  "4.0", "3.", "4e0"), quoted numbers, short rows, trailing delimiters, blank rows inside,
  a row with no answers, Windows line ends, a byte-order mark, ids repeated and missing,
  group labels missing and written as numbers. Its whole report.json is pinned too
  (tests/data/bad_cells/pinned_report_oddities.json).
- ``oddities_decimal_comma.csv``: semicolon-separated with decimal commas.
- The error cases (``ERROR_CASES``): one small file each, named for its bad cell.
"""

from __future__ import annotations

import datetime as dt
import io
import json
import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))
DATA = ROOT / "tests" / "data" / "bad_cells"
PINNED = DATA / "pinned.json"
PINNED_REPORT = DATA / "pinned_report_oddities.json"

ITEMS = {"support": ["sup1", "sup2", "sup3", "sup4"], "workload": ["wl1", "wl2", "wl3", "wl4"],
         "engagement": ["eng1", "eng2", "eng3", "eng4"], "weather": ["wx1", "wx2", "wx3"]}
ODD_DESIGN = {
    "constructs": {
        "support": {"items": ITEMS["support"], "reverse": ["sup4"]},
        "workload": {"items": ITEMS["workload"]},
        "engagement": {"items": ITEMS["engagement"],
                       "answer_labels": {"Strongly disagree": 1, "Disagree": 2, "Neither": 3, "Agree": 4,
                                         "Strongly agree": 5, "Prefer not to say": None}},
        "weather": {"items": ITEMS["weather"], "role": "marker"},
    },
    "paths": [{"outcome": "engagement", "predictors": ["support", "workload"]}],
    "response_scale": {"min": 1, "max": 5},
    "missing_codes": [-99, 9],
    "id_column": "respondent",
    "group_column": "team",
}
ALL_ITEMS = [i for v in ITEMS.values() for i in v]


# ------------------------------------------------------------------ the fixtures


def _answers(n: int, seed: int) -> np.ndarray:
    """Correlated 5-point answers for the items of ITEMS (invented, for a survey that fits)."""
    rng = np.random.default_rng(seed)
    support, weather = rng.normal(size=n), rng.normal(size=n)
    workload = -0.3 * support + rng.normal(size=n) * 0.95
    engage = 0.4 * support - 0.3 * workload + rng.normal(size=n) * 0.8
    traits = {"support": support, "workload": workload, "engagement": engage, "weather": weather}
    cols = []
    for c, names in ITEMS.items():
        for _ in names:
            x = 0.75 * traits[c] + 0.6 * rng.normal(size=n)
            cols.append(np.clip(np.round(x * 1.1 + 3), 1, 5))
    return np.column_stack(cols).astype(int)


_WORDS = ["Strongly disagree", "Disagree", "Neither", "agree", "STRONGLY AGREE"]
_MISSING_WORDS = ["NA", "n/a", "#N/A", "nan", ".", "null", "NULL", "N/A", "Nan"]
_BLANKS = ["", " ", "  ", "\t"]
_MISSING_CODES = ["-99", "-99.0", " -99 ", "9"]
_NUMBER_FORMS = {3: [" 3", "3 ", "+3", "3.0", "3.", "3e0", "0.3E1", '"3"'],
                 2: ["+2", " 2 ", "2.00", '" 2"'], 4: ["4.0", "4e0", '"4"', "04"]}


def oddities_csv() -> bytes:
    n = 240
    x = _answers(n, seed=15)
    rng = np.random.default_rng(151)
    header = ["respondent", "team"] + ALL_ITEMS + ["comment"]
    lines = [",".join(header)]
    eng = [ALL_ITEMS.index(i) for i in ITEMS["engagement"]]
    for r in range(n):
        cells = [str(v) for v in x[r]]
        for j in range(len(cells)):
            u = rng.random()
            v = int(x[r, j])
            if j in eng and u < 0.25:
                cells[j] = _WORDS[v - 1]
            elif u < 0.03:
                cells[j] = _BLANKS[rng.integers(len(_BLANKS))]
            elif u < 0.05:
                cells[j] = _MISSING_WORDS[rng.integers(len(_MISSING_WORDS))]
            elif u < 0.06:
                cells[j] = _MISSING_CODES[rng.integers(len(_MISSING_CODES))]
            elif u < 0.12 and v in _NUMBER_FORMS:
                forms = _NUMBER_FORMS[v]
                cells[j] = forms[rng.integers(len(forms))]
        if r % 37 == 5:
            cells[eng[0]] = "Prefer not to say"
        rid = f"S{r + 1:04d}" if r % 53 != 7 else ("S0002" if r % 2 else "")
        team = ["Harbour", "Kiln", "1", "2.0", "", "Orchard"][r % 6] if r % 29 != 3 else " "
        comment = ['"fine, thanks"', "TRUE", "2026-03-01", "", "n/a", '"said ""ok"""'][r % 6]
        row = [rid, team] + cells + [comment]
        if r == 17:  # a row with no answers at all
            row = [rid, team] + [""] * len(cells) + ["left blank"]
        if r == 30:  # a short row: the last items and the comment left off
            row = row[:-4]
        if r == 31:  # trailing delimiters (empty extra fields)
            row = row + ["", ""]
        lines.append(",".join(row))
        if r in (50, 51, 120):
            lines.append("")  # blank rows between respondents
        if r == 90:
            lines.append(",,,")  # a row of empty fields
    text = "\r\n".join(lines) + "\r\n\r\n"
    return b"\xef\xbb\xbf" + text.encode("utf-8")


def decimal_comma_csv() -> bytes:
    x = _answers(60, seed=16)[:, :8].astype(float)
    x[::7, 1] = np.where(x[::7, 1] < 5, x[::7, 1] + 0.5, 4.5)
    x[::5, 2] = np.where(x[::5, 2] > 1, x[::5, 2] - 0.25, 1.75)
    lines = [";".join(ALL_ITEMS[:8])]
    for r in range(len(x)):
        cells = [f"{v:g}".replace(".", ",") for v in x[r]]
        if r == 3:
            cells[0] = " 2,5 "
        if r == 4:
            cells[5] = ""
        lines.append(";".join(cells))
    return ("\n".join(lines) + "\n").encode("utf-8")


DECIMAL_DESIGN = {"constructs": {"support": {"items": ALL_ITEMS[:4]}, "workload": {"items": ALL_ITEMS[4:8]}},
                  "paths": [{"outcome": "workload", "predictors": ["support"]}],
                  "response_scale": {"min": 1, "max": 5}}

# A small clean survey the error cases change one cell (or line) of.
_BASE_ITEMS = ["sup1", "sup2", "sup3", "eng1", "eng2"]
BASE_DESIGN = {"constructs": {"support": {"items": ["sup1", "sup2", "sup3"], "reverse": ["sup3"]},
                              "engagement": {"items": ["eng1", "eng2"]}},
               "paths": [{"outcome": "engagement", "predictors": ["support"]}],
               "response_scale": {"min": 1, "max": 5}, "missing_codes": [-99], "id_column": "id"}
_BASE_ROWS = [["r1", "4", "1", "2", "5", "3"], ["r2", "2", "2", "3", "4", "4"], ["r3", "5", "3", "4", "2", "5"],
              ["r4", "1", "5", "5", "1", "2"], ["r5", "3", "4", "1", "3", "1"], ["r6", "2", "1", "3", "2", "5"]]
_BASE_HEADER = ["id"] + _BASE_ITEMS


def base_text(changes: dict[tuple[int, int], str] = (), delim: str = ",", header=None, extra_lines=()) -> bytes:
    rows = [list(r) for r in _BASE_ROWS]
    for (i, j), v in dict(changes).items():
        rows[i][j] = v
    lines = [delim.join(header or _BASE_HEADER)] + [delim.join(r) for r in rows] + list(extra_lines)
    return ("\n".join(lines) + "\n").encode("utf-8")


def _xlsx(rows: list[list]) -> bytes:
    import openpyxl

    wb = openpyxl.Workbook()
    ws = wb.active
    for r in rows:
        ws.append(r)
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def _xlsx_rows(changes: dict[tuple[int, int], object]) -> bytes:
    rows = [[r[0]] + [int(v) for v in r[1:]] for r in _BASE_ROWS]
    for (i, j), v in changes.items():
        rows[i][j] = v
    return _xlsx([_BASE_HEADER] + rows)


def _frame(changes: dict[tuple[int, int], object]) -> pd.DataFrame:
    df = pd.DataFrame([[r[0]] + [int(v) for v in r[1:]] for r in _BASE_ROWS], columns=_BASE_HEADER)
    df = df.astype(object)
    for (i, j), v in changes.items():
        df.iat[i, j] = v
    return df


def _labels(extra: dict | None = None) -> dict:
    d = json.loads(json.dumps(BASE_DESIGN))
    d.update(extra or {})
    return d


# name -> (file name, bytes or DataFrame, design)
ERROR_CASES = {
    "text_in_numeric_item": ("survey.csv", lambda: base_text({(1, 2): "abc"}), BASE_DESIGN),
    "text_answers_in_two_items": ("survey.csv", lambda: base_text(
        {(1, 2): "Agree", (2, 2): "Disagree", (3, 2): "Agree", (0, 4): "often"}), BASE_DESIGN),
    "texts_unmapped_by_answer_labels": ("survey.csv", lambda: base_text({(1, 1): "Agre", (2, 1): "agree"}),
                                        _labels({"answer_labels": {"Agree": 4, "Disagree": 2}})),
    "many_bad_cells_one_column": ("survey.csv", lambda: base_text(
        {(i, 3): f"x{i}" for i in range(6)}), BASE_DESIGN),
    "decimal_comma_in_a_comma_file": ("survey.csv", lambda: base_text({(2, 1): '"3,5"'}), BASE_DESIGN),
    "formula_text": ("survey.csv", lambda: base_text({(0, 5): "=B2+1"}), BASE_DESIGN),
    "infinite_number_text": ("survey.csv", lambda: base_text({(4, 1): "1e999"}), BASE_DESIGN),
    "inf_word": ("survey.csv", lambda: base_text({(4, 1): "inf"}), BASE_DESIGN),
    "true_text": ("survey.csv", lambda: base_text({(4, 1): "TRUE"}), BASE_DESIGN),
    "date_text": ("survey.csv", lambda: base_text({(3, 4): "2026-03-01"}), BASE_DESIGN),
    "number_with_unit": ("survey.csv", lambda: base_text({(3, 4): "4 pts"}), BASE_DESIGN),
    "semicolon_more_points_than_commas": ("survey.csv", lambda: base_text(
        {(0, 1): "3.5", (1, 2): "2.25", (2, 3): "4,5"}, delim=";"), BASE_DESIGN),
    "out_of_range_one": ("survey.csv", lambda: base_text({(2, 3): "7"}), BASE_DESIGN),
    "out_of_range_several": ("survey.csv", lambda: base_text(
        {(2, 3): "7", (3, 3): "7", (4, 3): "0", (1, 5): "6"}), BASE_DESIGN),
    "out_of_range_decimal": ("survey.csv", lambda: base_text({(2, 2): "5.5"}), BASE_DESIGN),
    "out_of_range_negative_code_not_listed": ("survey.csv", lambda: base_text({(2, 2): "-9"}), BASE_DESIGN),
    "values_apart_without_scale": ("survey.csv", lambda: base_text({(2, 2): "99", (3, 4): "99"}),
                                   {k: v for k, v in BASE_DESIGN.items() if k != "response_scale"}),
    "constant_item": ("survey.csv", lambda: base_text({(i, 4): "3" for i in range(6)}), BASE_DESIGN),
    "constant_item_apart_from_blanks": ("survey.csv", lambda: base_text(
        {(i, 4): ("3" if i % 2 else "") for i in range(6)}), BASE_DESIGN),
    "item_with_no_answers": ("survey.csv", lambda: base_text(
        {(i, 2): ["", "NA", "-99", " ", ".", "n/a"][i] for i in range(6)}), BASE_DESIGN),
    "extra_value_in_a_row": ("survey.csv", lambda: base_text({(2, 5): "5,4"}), BASE_DESIGN),
    "extra_value_semicolon": ("survey.csv", lambda: base_text({(2, 5): "5;4"}, delim=";"), BASE_DESIGN),
    "unnamed_column_with_values": ("survey.csv", lambda: base_text(
        header=_BASE_HEADER[:3] + [""] + _BASE_HEADER[4:]), BASE_DESIGN),
    "duplicate_column_name": ("survey.csv", lambda: base_text(
        header=_BASE_HEADER[:3] + ["sup1"] + _BASE_HEADER[4:]), BASE_DESIGN),
    "unclosed_quote": ("survey.csv", lambda: base_text({(3, 2): '"5'}), BASE_DESIGN),
    "header_only": ("survey.csv", lambda: (",".join(_BASE_HEADER) + "\n").encode(), BASE_DESIGN),
    "item_column_missing": ("survey.csv", lambda: base_text(header=_BASE_HEADER[:5] + ["eng_2"]), BASE_DESIGN),
    "nul_in_a_cell": ("survey.csv", lambda: base_text({(3, 2): "4\x00"}), BASE_DESIGN),
    "latin1_text_in_item": ("survey.csv", lambda: base_text({(3, 2): "tr\xe8s"}).replace(
        "tr\xe8s".encode(), "tr\xe8s".encode("latin-1")), BASE_DESIGN),
    "xlsx_boolean": ("survey.xlsx", lambda: _xlsx_rows({(1, 2): True}), BASE_DESIGN),
    "xlsx_date": ("survey.xlsx", lambda: _xlsx_rows({(1, 2): dt.datetime(2026, 3, 1)}), BASE_DESIGN),
    "xlsx_text_and_number_text": ("survey.xlsx", lambda: _xlsx_rows({(1, 2): "4", (2, 2): "four"}), BASE_DESIGN),
    "xlsx_out_of_range": ("survey.xlsx", lambda: _xlsx_rows({(1, 2): 3.5, (2, 3): 8}), BASE_DESIGN),
    "frame_text_cell": ("DataFrame", lambda: _frame({(1, 2): "abc"}), BASE_DESIGN),
    "frame_boolean_cell": ("DataFrame", lambda: _frame({(1, 2): True}), BASE_DESIGN),
    "frame_infinite_cell": ("DataFrame", lambda: _frame({(1, 2): float("inf")}).astype(
        {c: float for c in _BASE_ITEMS}), BASE_DESIGN),
    "frame_none_and_nan_then_text": ("DataFrame", lambda: _frame(
        {(1, 2): None, (2, 2): float("nan"), (3, 2): " 4 ", (4, 2): "x"}), BASE_DESIGN),
    "frame_boolean_column": ("DataFrame", lambda: _frame({(i, 2): bool(i % 2) for i in range(6)}).astype(
        {"sup2": bool}), BASE_DESIGN),
}

# Cases that load and prepare: name -> (file name, bytes or DataFrame, design)
GOOD_CASES = {
    "oddities_survey": ("oddities_survey.csv", lambda: (DATA / "oddities_survey.csv").read_bytes(), ODD_DESIGN),
    "oddities_decimal_comma": ("oddities_decimal_comma.csv",
                               lambda: (DATA / "oddities_decimal_comma.csv").read_bytes(), DECIMAL_DESIGN),
    "missing_words_and_codes_tsv": ("survey.tsv", lambda: base_text(
        {(0, 1): "NA", (1, 2): " -99 ", (2, 3): "-99.0", (3, 4): "null", (4, 5): "", (5, 1): "#N/A"},
        delim="\t"), BASE_DESIGN),
    "pipe_txt_with_padded_numbers": ("survey.txt", lambda: base_text(
        {(0, 1): " 4", (1, 2): "+2", (2, 3): "4.0 ", (3, 4): "1e0"}, delim="|"), BASE_DESIGN),
    "semicolon_decimal_comma_base": ("survey.csv", lambda: base_text(
        {(0, 1): "3,5", (1, 2): "2,25"}, delim=";"), BASE_DESIGN),
    "thousands_separator": ("survey.tsv", lambda: base_text({(3, 4): "1,000"}, delim="\t"), BASE_DESIGN),
    "xlsx_numbers_text_and_blanks": ("survey.xlsx", lambda: _xlsx_rows(
        {(0, 1): "4", (1, 2): None, (2, 3): " ", (3, 4): -99, (4, 5): "NA"}), BASE_DESIGN),
    "frame_mixed_object_column": ("DataFrame", lambda: _frame(
        {(0, 1): "4", (1, 1): None, (2, 1): float("nan"), (3, 1): 2.0, (4, 1): " 3 "}), BASE_DESIGN),
    "frame_float_with_nan": ("DataFrame", lambda: _frame({(1, 2): float("nan")}).astype(
        {c: float for c in _BASE_ITEMS}), BASE_DESIGN),
    "crlf_and_blank_rows": ("survey.csv", lambda: base_text(extra_lines=["", "r7,1,2,3,4,5", ",,,", ""]).replace(
        b"\n", b"\r\n"), BASE_DESIGN),
    "row_names_column": ("survey.csv", lambda: base_text(
        header=[""] + _BASE_ITEMS, changes={(i, 0): str(i + 1) for i in range(6)}),
        {k: v for k, v in BASE_DESIGN.items() if k != "id_column"}),
}


# ------------------------------------------------------------------ what is pinned


def _read(name: str, data):
    from samesource.input.frames import read_data

    return read_data(data, name=name)


def _clean(v):
    """A JSON-safe value with NaN as None."""
    if isinstance(v, float) and v != v:
        return None
    if isinstance(v, np.floating | np.integer):
        return _clean(v.item())
    return v


def _error(e) -> dict:
    return {"class": type(e).__name__, "message": e.message, "file": e.file, "row": e.row,
            "column": e.column, "code": e.code, "field": getattr(e, "field", None), "text": str(e)}


def outcome(name: str, data, design_obj: dict) -> dict:
    """What reading and preparing gives: the prepared numbers and notes, or the error."""
    from samesource.errors import InputError
    from samesource.input.design import parse_design
    from samesource.input.drafting import draft_from_table
    from samesource.input.loading import text_answers
    from samesource.input.prepare import numeric_columns, prepare

    try:
        table = _read(name, data)
    except InputError as e:
        return {"stage": "load", "error": _error(e)}
    loaded = {"columns": [str(c) for c in table.frame.columns], "rows": [int(r) for r in table.row_numbers],
              "row_label": table.row_label, "format": table.format, "encoding": table.encoding,
              "delimiter": table.delimiter, "decimal": table.decimal, "row_names": table.row_names,
              "warnings": table.warnings, "numeric_columns": numeric_columns(table),
              "text_answers": text_answers(table)}
    try:
        draft = draft_from_table(table)
        loaded["draft"] = {"design": draft.design, "left_out": draft.left_out, "notes": draft.notes}
    except InputError as e:
        loaded["draft"] = {"error": _error(e)}
    try:
        p = prepare(table, parse_design(design_obj))
    except InputError as e:
        return {"stage": "prepare", "loaded": loaded, "error": _error(e)}
    return {"stage": "ok", "loaded": loaded, "prepared": {
        "items": [[_clean(v) for v in row] for row in p.items.to_numpy().tolist()],
        "columns": list(p.items.columns), "index": [int(i) for i in p.items.index],
        "ids": None if p.ids is None else [_clean(v) for v in p.ids.tolist()],
        "groups": None if p.groups is None else [_clean(v) for v in p.groups.tolist()],
        "scale": [_clean(p.scale_min), _clean(p.scale_max), p.scale_source], "n_rows": p.n_rows,
        "missing_cells": p.missing_cells, "warnings": p.warnings}}


def all_outcomes() -> dict:
    out = {}
    for name, (fname, make, design_obj) in {**ERROR_CASES, **GOOD_CASES}.items():
        out[name] = json.loads(json.dumps(outcome(fname, make(), design_obj), default=str))
    return out


def oddities_report() -> dict:
    from samesource.executor import SerialExecutor
    from samesource.pipeline import analyze

    analysis = analyze(str(DATA / "oddities_survey.csv"), ODD_DESIGN, {"missing": "fiml"},
                       executor=SerialExecutor())
    return json.loads(json.dumps(analysis.report))


# ------------------------------------------------------------------ tests


def _diff(got, want, path=""):
    if isinstance(want, dict) and isinstance(got, dict):
        out = [f"{path}: key {k!r} missing" for k in want if k not in got]
        out += [f"{path}: new key {k!r}" for k in got if k not in want]
        for k in want:
            if k in got:
                out += _diff(got[k], want[k], f"{path}/{k}")
        return out
    if isinstance(want, list) and isinstance(got, list) and len(want) == len(got):
        return [d for i, (g, w) in enumerate(zip(got, want, strict=True)) for d in _diff(g, w, f"{path}/{i}")]
    if isinstance(want, float) and isinstance(got, int | float) and not isinstance(got, bool):
        return [] if math.isclose(got, want, rel_tol=1e-12, abs_tol=1e-12) else [f"{path}: {got!r} != {want!r}"]
    return [] if got == want else [f"{path}: {got!r} != {want!r}"]


@pytest.fixture(scope="module")
def pinned() -> dict:
    return json.loads(PINNED.read_text(encoding="utf-8"))


def test_the_fixture_files_are_the_generated_ones():
    assert (DATA / "oddities_survey.csv").read_bytes() == oddities_csv()
    assert (DATA / "oddities_decimal_comma.csv").read_bytes() == decimal_comma_csv()


def test_every_case_is_pinned(pinned):
    assert sorted(pinned) == sorted({**ERROR_CASES, **GOOD_CASES})


@pytest.mark.parametrize("case", sorted(ERROR_CASES))
def test_bad_cells_give_the_pinned_error(case, pinned):
    fname, make, design_obj = ERROR_CASES[case]
    got = json.loads(json.dumps(outcome(fname, make(), design_obj), default=str))
    assert "error" in pinned[case], pinned[case]
    diffs = _diff(got, pinned[case])
    assert not diffs, "\n".join(diffs[:20])


@pytest.mark.parametrize("case", sorted(GOOD_CASES))
def test_odd_cells_read_as_pinned(case, pinned):
    fname, make, design_obj = GOOD_CASES[case]
    got = json.loads(json.dumps(outcome(fname, make(), design_obj), default=str))
    assert pinned[case]["stage"] == "ok"
    diffs = _diff(got, pinned[case])
    assert not diffs, "\n".join(diffs[:20])


def test_the_oddities_report_is_unchanged():
    from test_report_pinned import _differences

    want = json.loads(PINNED_REPORT.read_text(encoding="utf-8"))
    diffs = _differences(oddities_report(), want)
    assert not diffs, f"{len(diffs)} differences:\n" + "\n".join(diffs[:40])


if __name__ == "__main__":  # rewrite the fixtures and the pins from the code as it stands
    sys.path.insert(0, str(ROOT))
    DATA.mkdir(parents=True, exist_ok=True)
    (DATA / "oddities_survey.csv").write_bytes(oddities_csv())
    (DATA / "oddities_decimal_comma.csv").write_bytes(decimal_comma_csv())
    PINNED.write_text(json.dumps(all_outcomes(), indent=1, sort_keys=True) + "\n", encoding="utf-8")
    report = oddities_report()
    report.pop("timings", None)
    PINNED_REPORT.write_text(json.dumps(report, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    print("written", PINNED, PINNED_REPORT)


# ------------------------------------------------------------------ the two text readers agree

_TOKENS = ["1", "2", "3", "4", "5", "007", "+3", " 3", "3 ", "3.0", "-0", "1e0", "NA", "", " ", "abc",
           "1,5", "2.5", "-99", "99999999999999999999", "True", "inf", "nan", "Agree", "10", "-7",
           "2e2", "12E2", "300", "-1e2"]


def _plain_file(rng: np.random.Generator, delim: str, crlf: bool) -> bytes:
    """A quote-free table: some columns whole numbers only, others any of _TOKENS."""
    n, k = int(rng.integers(3, 40)), int(rng.integers(2, 7))
    names = [f"q{j}" for j in range(k)]
    cols = []
    for _ in range(k):
        if rng.random() < 0.5:
            cols.append([str(v) for v in rng.integers(-3, 12, size=n)])
        else:
            pool = [t for t in _TOKENS if delim not in t] + ["4"] * 8
            cols.append([pool[i] for i in rng.integers(len(pool), size=n)])
    lines = [delim.join(names)] + [delim.join(c[i] for c in cols) for i in range(n)]
    end = "\r\n" if crlf else "\n"
    return (end.join(lines) + end).encode("utf-8")


@pytest.mark.parametrize("seed", range(40))
def test_the_column_wise_reader_gives_what_the_record_reader_gives(seed, monkeypatch):
    import samesource.input.loading as loading
    from samesource.input.prepare import _label

    rng = np.random.default_rng(seed)
    delim = [",", ";", "\t", "|"][seed % 4]
    data = _plain_file(rng, delim, crlf=bool(seed % 3 == 0))
    k = data.split(b"\n", 1)[0].count(delim.encode()) + 1
    design = {"constructs": {"a": {"items": [f"q{j}" for j in range(1, k)]}}, "response_scale": {"min": -99, "max": 99},
              "missing_codes": [-99], "id_column": "q0", "group_column": "q0"}
    name = {",": "s.csv", ";": "s.csv", "\t": "s.tsv", "|": "s.txt"}[delim]

    def seen(result: dict) -> dict:
        prepared = result.get("prepared")
        if prepared and prepared["ids"] is not None:
            prepared["ids"] = [_label(v) for v in prepared["ids"]]
        return json.loads(json.dumps(result, default=str))

    fast = seen(outcome(name, data, design))
    monkeypatch.setattr(loading, "_read_text_plain", lambda text, delim: None)
    exact = seen(outcome(name, data, design))
    assert _diff(fast, exact) == []


@pytest.mark.parametrize("ids", [["100", "2e2", "300", "400"], ["100", "2e2", "", "300"], ["1200", "12E2", "5", "6"]])
def test_an_id_written_with_the_exponent_2_is_read_as_written(ids, monkeypatch):
    # 2e2 is as long as 200, so the line lengths cannot tell them apart: the column is read as
    # text, as the record reader reads it (the reference), and the ids stay as written
    import samesource.input.loading as loading

    rows = ["1,2", "2,3", "3,4", "4,5"]
    data = ("rid,a1,a2\n" + "".join(f"{i},{r}\n" for i, r in zip(ids, rows, strict=True))).encode()
    design = {"constructs": {"a": {"items": ["a1", "a2"]}}, "response_scale": {"min": 1, "max": 5}, "id_column": "rid"}
    fast = json.loads(json.dumps(outcome("s.csv", data, design), default=str))
    monkeypatch.setattr(loading, "_read_text_plain", lambda text, delim: None)
    exact = json.loads(json.dumps(outcome("s.csv", data, design), default=str))
    assert _diff(fast, exact) == []
    assert ids[1] in json.dumps(fast)


@pytest.mark.parametrize("cell", ["", " r3", "r3 ", "\x0br3", "r3\x1f", "r3\xa0", "\u3000", "r\x003", "é"])
def test_text_ids_with_and_without_spaces_at_their_edges_read_as_the_record_reader_reads_them(cell, monkeypatch):
    # the column-wise reader skips stripping a text column none of whose cells begins or ends
    # with whitespace (Python's str.isspace, the record reader's rule): one cell of each kind,
    # among plain ids, and the reference is the record reader
    import samesource.input.loading as loading

    ids = ["r1", "r2", cell, "r4", "r5"]
    data = ("rid,a1,a2\n" + "".join(f"{i},{1 + k % 5},{1 + (k * 3) % 5}\n" for k, i in enumerate(ids))).encode()
    design = {"constructs": {"a": {"items": ["a1", "a2"]}}, "response_scale": {"min": 1, "max": 5},
              "id_column": "rid", "group_column": "rid"}
    fast = json.loads(json.dumps(outcome("s.csv", data, design), default=str))
    monkeypatch.setattr(loading, "_read_text_plain", lambda text, delim: None)
    exact = json.loads(json.dumps(outcome("s.csv", data, design), default=str))
    assert _diff(fast, exact) == []


def test_text_cells_against_python_str_methods():
    # the facts of a text column found without a step per cell, against str.strip and len
    from samesource.input.loading import text_cells

    rng = np.random.default_rng(11)
    pool = ["a", "bc", "", " a", "a ", "\ta", "a\x1c", "\x85", "é", "a\x00b", "\u2009x", "xyz"]
    for _ in range(200):
        cells = np.array([pool[i] for i in rng.integers(len(pool), size=int(rng.integers(0, 8)))] + [np.nan] * int(rng.integers(0, 2)),
                         dtype=object)
        rng.shuffle(cells)
        facts = text_cells(cells)
        text = [c for c in cells if isinstance(c, str)]
        assert facts.spaced == any(c != c.strip() for c in text)
        assert facts.missing.tolist() == [not isinstance(c, str) for c in cells]
        if all(c.isascii() and "\x00" not in c for c in text):
            assert facts.lengths.tolist() == [len(c) if isinstance(c, str) else 0 for c in cells]
        else:
            assert facts.lengths is None
