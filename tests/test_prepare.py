"""Preparing item data from a design: numbers out, or a refusal naming the row and column."""

import datetime as dt

import numpy as np
import openpyxl
import pandas as pd
import pyreadstat
import pytest

from samesource.errors import DataError, DesignError
from samesource.input.design import parse_design
from samesource.input.loading import load_table
from samesource.input.prepare import numeric_columns, prepare


def design(**extra) -> object:
    obj = {
        "constructs": {
            "support": {"items": ["sup1", "sup2", "sup3"], "reverse": ["sup3"]},
            "engagement": {"items": ["eng1", "eng2"]},
        },
        "paths": [{"outcome": "engagement", "predictors": ["support"]}],
        "response_scale": {"min": 1, "max": 5},
        "missing_codes": [-99],
    }
    obj.update(extra)
    return parse_design({k: v for k, v in obj.items() if v is not None})


def csv_table(tmp_path, text: str, name: str = "survey.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return load_table(p)


GOOD = """id,team,eng2,sup1,sup2,sup3,eng1,comment
r1,A,4,1,2,5,3,fine
r2,B,2,2,3,4,4,"so, so"
r3,A,5,3,4,2,5,
r4,B,1,5,5,1,2,anything goes here
"""


def codes(d: dict) -> list[str]:
    return [w["code"] for w in d]


def test_items_in_design_order_with_reverse_keying(tmp_path):
    p = prepare(csv_table(tmp_path, GOOD), design())
    assert list(p.items.columns) == ["sup1", "sup2", "sup3", "eng1", "eng2"]
    assert (p.items.dtypes == "float64").all()
    assert p.items.index.tolist() == [2, 3, 4, 5] and p.items.index.name == "row"
    assert p.items["sup1"].tolist() == [1, 2, 3, 5]
    # sup3 is reverse-keyed on the 1..5 scale: 1 + 5 - x.
    assert p.items["sup3"].tolist() == [1, 2, 4, 5]
    assert p.items["eng2"].tolist() == [4, 2, 5, 1]
    assert (p.scale_min, p.scale_max, p.scale_source) == (1, 5, "design")
    assert p.n_rows == 4 and p.missing_cells == 0 and p.warnings == []
    assert p.ids is None and p.groups is None
    assert p.table.format == "csv"


def test_non_item_columns_are_not_checked(tmp_path):
    # The free-text comment column holds text; it is not an item, so nothing complains.
    p = prepare(csv_table(tmp_path, GOOD), design())
    assert "comment" not in p.items.columns


def test_missing_codes_as_numbers_and_strings(tmp_path):
    text = ("id,sup1,sup2,sup3,eng1,eng2\n"
            "r1,-99,2,3,4,5\n"
            "r2,1,-99.0,3,2, -99 \n"
            "r3,2,3,,5,1\n"
            "r4,3,1,2,1,2\n")
    p = prepare(csv_table(tmp_path, text), design())
    assert np.isnan(p.items.loc[2, "sup1"]) and np.isnan(p.items.loc[3, "sup2"])
    assert np.isnan(p.items.loc[3, "eng2"]) and np.isnan(p.items.loc[4, "sup3"])
    assert p.missing_cells == 4


def test_missing_codes_in_xlsx_numbers(tmp_path):
    path = tmp_path / "s.xlsx"
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["sup1", "sup2", "sup3", "eng1", "eng2"])
    ws.append([1, -99, 3.0, "4", 5])
    ws.append([2, 3, -99.0, 1, "-99"])
    ws.append([5, 1, 2, 3, 1])
    wb.save(path)
    p = prepare(load_table(path), design())
    assert np.isnan(p.items.loc[2, "sup2"]) and np.isnan(p.items.loc[3, "sup3"])
    assert np.isnan(p.items.loc[3, "eng2"]) and p.items.loc[2, "eng1"] == 4.0
    assert p.missing_cells == 3


def test_decimal_comma_values_become_numbers(tmp_path):
    text = "sup1;sup2;sup3;eng1;eng2\n1,5;2;3;4;5\n2;3,25;4;1;2\n"
    p = prepare(csv_table(tmp_path, text), design())
    assert p.items.loc[2, "sup1"] == 1.5 and p.items.loc[3, "sup2"] == 3.25


def test_text_missing_markers_are_blank_with_a_warning(tmp_path):
    text = "sup1,sup2,sup3,eng1,eng2\nNA,2,3,4,5\n1,.,3,2,n/a\n4,3,2,1,2\n"
    p = prepare(csv_table(tmp_path, text), design())
    assert p.missing_cells == 3
    [w] = [w for w in p.warnings if w["code"] == "text_missing_markers"]
    assert "'NA'" in w["message"] and "'.'" in w["message"]


def test_non_numeric_item_value(tmp_path):
    text = ("id,sup1,sup2,sup3,eng1,eng2\n"
            "r1,1,2,3,4,5\n"
            "r2,2,3,4,often,1\n"
            "r3,2,3,4,5,1\n"
            "r4,2,3,4,?,x\n")
    with pytest.raises(DataError) as e:
        prepare(csv_table(tmp_path, text), design())
    err = e.value
    msg = str(err)
    assert "'often'" in msg and "row 3" in msg and "column 'eng1'" in msg
    assert "survey.csv" in msg
    assert "1 other cell" in msg and "row 5" in msg  # the '?' further down
    assert "eng2" in msg  # another item with the same problem
    assert "missing_codes" in msg
    assert (err.row, err.column) == (3, "eng1")


def test_non_numeric_message_for_a_bad_decimal(tmp_path):
    text = 'sup1,sup2,sup3,eng1,eng2\n1,2,3,4,5\n1,"2,5",3,4,5\n'
    with pytest.raises(DataError) as e:
        prepare(csv_table(tmp_path, text), design())
    assert "'2,5'" in str(e.value) and "decimal comma" in str(e.value) and e.value.row == 3


@pytest.mark.parametrize("value, words", [(True, "TRUE/FALSE"),
                                          (dt.datetime(2024, 3, 1), "date")])
def test_excel_booleans_and_dates_in_items(tmp_path, value, words):
    path = tmp_path / "s.xlsx"
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["sup1", "sup2", "sup3", "eng1", "eng2"])
    ws.append([1, 2, 3, 4, 5])
    ws.append([1, 2, value, 4, 5])
    wb.save(path)
    with pytest.raises(DataError) as e:
        prepare(load_table(path), design())
    assert words in str(e.value) and (e.value.row, e.value.column) == (3, "sup3")
    assert "s.xlsx" in str(e.value)


def test_formula_without_result_in_an_item(tmp_path):
    path = tmp_path / "s.xlsx"
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["sup1", "sup2", "sup3", "eng1", "eng2"])
    ws.append([1, 2, "=A2+1", 4, 5])
    wb.save(path)
    with pytest.raises(DataError) as e:
        prepare(load_table(path), design())
    assert "'=A2+1'" in str(e.value) and "formula" in str(e.value)
    assert (e.value.row, e.value.column) == (2, "sup3")


def test_value_out_of_scale(tmp_path):
    text = ("sup1,sup2,sup3,eng1,eng2\n"
            "1,2,3,4,5\n"
            "2,3,4,9,1\n"
            "3,4,5,9,2\n"
            "3,4,5,6,2\n")
    with pytest.raises(DataError) as e:
        prepare(csv_table(tmp_path, text), design())
    msg = str(e.value)
    assert "value 9" in msg and "1 to 5" in msg and "row 3" in msg and "column 'eng1'" in msg
    assert "survey.csv" in msg and "missing_codes" in msg
    assert "3 values outside the scale" in msg and "9 (2x)" in msg and "6 (1x)" in msg
    assert (e.value.row, e.value.column) == (3, "eng1")


def test_missing_code_is_not_out_of_scale(tmp_path):
    text = "sup1,sup2,sup3,eng1,eng2\n1,2,3,4,5\n2,3,4,9,1\n3,1,2,3,4\n"
    p = prepare(csv_table(tmp_path, text), design(missing_codes=[9, -99]))
    assert np.isnan(p.items.loc[3, "eng1"])


def test_constant_item(tmp_path):
    text = "sup1,sup2,sup3,eng1,eng2\n1,2,3,4,5\n2,3,4,4,1\n3,2,1,4,2\n"
    with pytest.raises(DataError) as e:
        prepare(csv_table(tmp_path, text), design())
    msg = str(e.value)
    assert "item 'eng1' has the same answer (4) in every row" in msg
    assert "drop it from the design" in msg and "survey.csv" in msg
    assert e.value.column == "eng1"


def test_constant_item_apart_from_blanks(tmp_path):
    text = "sup1,sup2,sup3,eng1,eng2\n1,2,3,4,5\n2,3,4,,1\n3,2,1,4,2\n"
    with pytest.raises(DataError, match=r"same answer \(4\) in every row that has an answer"):
        prepare(csv_table(tmp_path, text), design())


def test_item_with_no_answers(tmp_path):
    text = "sup1,sup2,sup3,eng1,eng2\n1,2,3,-99,5\n2,3,4,,1\n"
    with pytest.raises(DataError) as e:
        prepare(csv_table(tmp_path, text), design())
    assert "no answers" in str(e.value) and e.value.column == "eng1"


def test_scale_inferred_from_data(tmp_path):
    text = "sup1,sup2,sup3,eng1,eng2\n1,2,7,4,5\n2,3,4,6,1\n3,2,2,4,2\n"
    p = prepare(csv_table(tmp_path, text), design(response_scale=None))
    assert (p.scale_min, p.scale_max, p.scale_source) == (1, 7, "data")
    assert p.items["sup3"].tolist() == [1, 4, 6]  # 1 + 7 - x
    [w] = [w for w in p.warnings if w["code"] == "scale_inferred"]
    assert "1 to 7" in w["message"] and "sup3" in w["message"]


def test_rows_without_any_answer_stay(tmp_path):
    text = "sup1,sup2,sup3,eng1,eng2,comment\n1,2,3,4,5,\n,,,,,left early\n3,3,1,2,2,\n"
    p = prepare(csv_table(tmp_path, text), design())
    assert p.n_rows == 3 and p.items.index.tolist() == [2, 3, 4]
    assert p.items.loc[3].isna().all() and p.missing_cells == 5
    [w] = [w for w in p.warnings if w["code"] == "rows_without_answers"]
    assert w["message"].startswith("1 row(s)") and "row 3" in w["message"]


def test_ids_and_groups(tmp_path):
    text = ("resp,unit,sup1,sup2,sup3,eng1,eng2\n"
            "a1,7,1,2,3,4,5\n"
            "a2, north ,2,3,4,1,2\n"
            "a1,,3,2,1,4,2\n"
            "a4,7,4,4,4,4,4\n")
    p = prepare(csv_table(tmp_path, text), design(id_column="resp", group_column="unit"))
    assert p.ids.tolist() == ["a1", "a2", "a1", "a4"] and p.ids.index.tolist() == [2, 3, 4, 5]
    assert p.groups.iloc[0] == "7" and p.groups.iloc[1] == "north"
    assert pd.isna(p.groups.iloc[2]) and p.groups.iloc[3] == "7"
    assert {"duplicate_ids", "missing_groups"} <= set(codes(p.warnings))
    [dup] = [w for w in p.warnings if w["code"] == "duplicate_ids"]
    assert dup["message"].startswith("1 id value(s)") and "rows 2 and 4" in dup["message"]
    [miss] = [w for w in p.warnings if w["code"] == "missing_groups"]
    assert miss["message"].startswith("1 row(s)") and "row 4" in miss["message"]


def test_whole_number_ids_give_the_note_text_ids_give(tmp_path):
    # the same file with ids 17, 23, 17, 40 and with ids "x17", ... : one note, word for word
    # apart from the id itself (whole-number ids are checked without a label per row)
    rows = ["1,2,3,4,5", "2,3,4,1,2", "3,2,1,4,2", "4,4,4,4,4"]

    def note(ids):
        text = "resp,sup1,sup2,sup3,eng1,eng2\n" + "".join(f"{i},{r}\n" for i, r in zip(ids, rows, strict=True))
        p = prepare(csv_table(tmp_path, text), design(id_column="resp"))
        return [w["message"] for w in p.warnings if w["code"] == "duplicate_ids"]

    [num] = note([17, 23, 17, 40])
    [txt] = note(["x17", "x23", "x17", "x40"])
    assert num == txt.replace("x17", "17") and "rows 2 and 4" in num


def test_numeric_group_codes_from_xlsx_become_strings(tmp_path):
    path = tmp_path / "g.xlsx"
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["team", "sup1", "sup2", "sup3", "eng1", "eng2"])
    ws.append([3, 1, 2, 3, 4, 5])
    ws.append([3.0, 2, 3, 4, 1, 2])
    ws.append([12, 5, 1, 2, 3, 3])
    wb.save(path)
    p = prepare(load_table(path), design(group_column="team"))
    assert p.groups.tolist() == ["3", "3", "12"]


def test_design_column_not_in_data(tmp_path):
    with pytest.raises(DesignError) as e:
        prepare(csv_table(tmp_path, GOOD.replace("eng2", "eng_2")), design())
    assert "eng2" in str(e.value) and "survey.csv" in str(e.value)


def test_sav_cases_with_user_missing(tmp_path):
    df = pd.DataFrame({"sup1": [1.0, 2, 3, 4, 5], "sup2": [2.0, 97, 3, 4, 1],
                       "sup3": [5.0, 4, 3, -99, 1], "eng1": [1.0, 2, 2, 3, 4],
                       "eng2": [3.0, 3, 4, 1, 2]})
    path = tmp_path / "s.sav"
    pyreadstat.write_sav(df, str(path), missing_ranges={"sup2": [{"lo": 97, "hi": 99}],
                                                         "sup3": [-99]})
    # The design does not list 97 or -99: the file's own missing values are applied.
    p = prepare(load_table(path), design(missing_codes=[]))
    assert p.items.index.name == "case" and p.items.index.tolist() == [1, 2, 3, 4, 5]
    assert np.isnan(p.items.loc[2, "sup2"]) and np.isnan(p.items.loc[4, "sup3"])
    assert p.items.loc[1, "sup3"] == 1.0  # reverse-keyed: 1 + 5 - 5
    assert "spss_missing_values" in codes(p.warnings)


def test_sav_out_of_scale_names_the_case(tmp_path):
    df = pd.DataFrame({"sup1": [1.0, 2, 8], "sup2": [2.0, 3, 3], "sup3": [5.0, 4, 3],
                       "eng1": [1.0, 2, 2], "eng2": [3.0, 3, 4]})
    path = tmp_path / "s.sav"
    pyreadstat.write_sav(df, str(path))
    with pytest.raises(DataError) as e:
        prepare(load_table(path), design())
    assert (e.value.row, e.value.column) == (3, "sup1") and "s.sav" in str(e.value)


def test_numeric_columns_for_drafting(tmp_path):
    t = csv_table(tmp_path, GOOD)
    assert numeric_columns(t) == ["eng2", "sup1", "sup2", "sup3", "eng1"]


def test_large_file_is_quick(tmp_path):
    rng = np.random.default_rng(1)
    n = 20_000
    data = rng.integers(1, 6, size=(n, 5)).astype(str)
    lines = ["sup1,sup2,sup3,eng1,eng2"] + [",".join(r) for r in data]
    p = prepare(csv_table(tmp_path, "\n".join(lines) + "\n"), design())
    assert p.items.shape == (n, 5)
    assert np.array_equal(p.items["sup1"].to_numpy(), data[:, 0].astype(float))
