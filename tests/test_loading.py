"""Reading survey files: every format we accept, and a clear refusal for everything else."""

import gzip
import io
import os
import re
import zipfile

import numpy as np
import openpyxl
import pandas as pd
import pyreadstat
import pytest

from samesource.errors import DataError, UnsupportedFormat
from samesource.input.loading import detect_format, load_table, sniff_delimiter


def write(tmp_path, name: str, content: bytes | str, encoding: str = "utf-8"):
    p = tmp_path / name
    p.write_bytes(content.encode(encoding) if isinstance(content, str) else content)
    return p


def cells(table) -> list[list]:
    """The cells as text, blanks None. A delimited file's column of whole numbers each written
    as the integer itself is read as numbers (its text is then exactly that integer's)."""
    def text(v, numeric: bool):
        if v is None or (isinstance(v, float) and np.isnan(v)):
            return None
        return str(int(v)) if numeric and table.format in ("csv", "tsv", "txt") else v
    kinds = [table.frame[c].dtype.kind in "iuf" for c in table.frame.columns]
    return [[text(v, k) for v, k in zip(r, kinds, strict=True)]
            for r in table.frame.to_numpy(dtype=object).tolist()]


# ---------------------------------------------------------------- delimited text


def test_csv_comma(tmp_path):
    p = write(tmp_path, "survey.csv", "id,sup1,sup2\nr1,1,2\nr2,3,\n")
    t = load_table(p)
    assert t.format == "csv" and t.delimiter == "," and t.decimal == "."
    assert t.encoding == "utf-8" and t.row_label == "row"
    assert list(t.frame.columns) == ["id", "sup1", "sup2"]
    # Text stays text: the preparation step names bad values as typed.
    assert cells(t) == [["r1", "1", "2"], ["r2", "3", None]]
    assert t.row_numbers.tolist() == [2, 3]
    assert t.source == str(p) and t.size_bytes == p.stat().st_size and len(t.sha256) == 64


def test_csv_semicolon_with_decimal_comma(tmp_path):
    p = write(tmp_path, "eu.csv", "id;sup1;sup2;note\nr1;3,5;2;a, b\nr2;4;-1,25;x\n")
    t = load_table(p)
    assert t.delimiter == ";" and t.decimal == ","
    assert cells(t) == [["r1", "3.5", "2", "a, b"], ["r2", "4", "-1.25", "x"]]


def test_semicolon_without_decimals_keeps_point(tmp_path):
    t = load_table(write(tmp_path, "a.csv", "a;b\n1;2.5\n3;4\n"))
    assert t.delimiter == ";" and t.decimal == "."
    assert cells(t) == [["1", "2.5"], ["3", "4"]]


def test_tsv(tmp_path):
    t = load_table(write(tmp_path, "s.tsv", "id\tsup1\tsup2\nr1\t1\t2\n"))
    assert t.format == "tsv" and t.delimiter == "\t"
    assert cells(t) == [["r1", "1", "2"]]


def test_tab_with_decimal_comma(tmp_path):
    t = load_table(write(tmp_path, "s.tsv", "id\tsup1\nr1\t2,5\n"))
    assert t.decimal == "," and cells(t) == [["r1", "2.5"]]


@pytest.mark.parametrize("delim", ["|", "\t"])
def test_txt_pipe_and_tab(tmp_path, delim):
    body = delim.join(["id", "sup1", "sup2"]) + "\n" + delim.join(["r1", "4", "5"]) + "\n"
    t = load_table(write(tmp_path, "export.txt", body))
    assert t.format == "txt" and t.delimiter == delim
    assert list(t.frame.columns) == ["id", "sup1", "sup2"] and cells(t) == [["r1", "4", "5"]]


def test_utf8_bom_header_comes_out_clean(tmp_path):
    p = write(tmp_path, "bom.csv", b"\xef\xbb\xbfid,sup1,sup2\nr1,1,2\n")
    t = load_table(p)
    assert list(t.frame.columns) == ["id", "sup1", "sup2"]
    assert t.encoding == "utf-8-sig"


def test_cp1252_accented_header(tmp_path):
    p = write(tmp_path, "fr.csv", "équipe;sup1;sup2\nNord;1;2\nSüd;3;4\n", encoding="cp1252")
    t = load_table(p)
    assert t.encoding == "cp1252"
    assert list(t.frame.columns) == ["équipe", "sup1", "sup2"]
    assert t.frame["équipe"].tolist() == ["Nord", "Süd"]
    assert any(w["code"] == "encoding_guessed" for w in t.warnings)


def test_utf8_accents_are_utf8(tmp_path):
    t = load_table(write(tmp_path, "a.csv", "équipe,sup1\nNord,1\n"))
    assert t.encoding == "utf-8" and list(t.frame.columns) == ["équipe", "sup1"]
    assert t.warnings == []


def test_utf16_with_bom_is_read(tmp_path):
    # What a spreadsheet's "Unicode text" export writes: UTF-16 with a byte-order mark, tabs.
    t = load_table(write(tmp_path, "u.txt", "id\tsup1\nr1\t3\n".encode("utf-16")))
    assert t.encoding == "utf-16" and cells(t) == [["r1", "3"]]


@pytest.mark.parametrize("codec", ["utf-16-le", "utf-16-be", "utf-32-le", "utf-32-be"])
def test_utf16_and_utf32_in_either_byte_order_are_read_by_their_mark(tmp_path, codec):
    # Big-endian UTF-16 was decoded in this machine's (little-endian) order, and UTF-32 as
    # UTF-16: garbled cells, with NUL characters in the column names.
    data = "\ufeffid,sup1\nr1,3\n".encode(codec)
    t = load_table(write(tmp_path, "u.csv", data))
    assert t.encoding == codec[:6] and list(t.frame.columns) == ["id", "sup1"]
    assert cells(t) == [["r1", "3"]]


def test_crlf_line_ends_and_trailing_blank_lines(tmp_path):
    t = load_table(write(tmp_path, "w.csv", b"id,sup1\r\nr1,1\r\nr2,2\r\n\r\n\r\n"))
    assert cells(t) == [["r1", "1"], ["r2", "2"]]
    assert t.row_numbers.tolist() == [2, 3]
    assert t.warnings == []  # blank lines at the end are not worth a mention


def test_blank_lines_between_rows_keep_row_numbers(tmp_path):
    t = load_table(write(tmp_path, "b.csv", "\nid,sup1\nr1,1\n\n,\nr2,2\n"))
    # Header on row 2 (a blank line before it); rows 4 and 5 are empty.
    assert t.row_numbers.tolist() == [3, 6]
    assert cells(t) == [["r1", "1"], ["r2", "2"]]
    [w] = t.warnings
    assert w["code"] == "blank_rows_skipped" and "rows 4, 5" in w["message"]


def test_quoted_fields_with_embedded_delimiters_and_quotes(tmp_path):
    body = 'id,comment,sup1\nr1,"late, again",3\nr2,"said ""fine""",4\nr3,"two\nlines",5\nr4,x,1\n'
    t = load_table(write(tmp_path, "q.csv", body))
    assert cells(t) == [["r1", "late, again", "3"], ["r2", 'said "fine"', "4"],
                        ["r3", "two\nlines", "5"], ["r4", "x", "1"]]
    # Rows are records, as a spreadsheet shows them.
    assert t.row_numbers.tolist() == [2, 3, 4, 5]
    assert [w["code"] for w in t.warnings] == ["multiline_values"]


def test_trailing_delimiters_and_empty_trailing_columns(tmp_path):
    t = load_table(write(tmp_path, "t.csv", "id,sup1,sup2,,\nr1,1,2,,\nr2,3,4\nr3,5,6,\n"))
    assert list(t.frame.columns) == ["id", "sup1", "sup2"]
    assert cells(t) == [["r1", "1", "2"], ["r2", "3", "4"], ["r3", "5", "6"]]


def test_short_rows_are_padded_and_noted(tmp_path):
    t = load_table(write(tmp_path, "s.csv", "id,sup1,sup2\nr1,1\nr2,2,3\n"))
    assert cells(t) == [["r1", "1", None], ["r2", "2", "3"]]
    assert [w["code"] for w in t.warnings] == ["short_rows"]


def test_whitespace_cells_are_blank_and_header_names_trimmed(tmp_path):
    t = load_table(write(tmp_path, "s.csv", " id , sup1\nr1,   \nr2, 4\n"))
    assert list(t.frame.columns) == ["id", "sup1"]
    assert cells(t) == [["r1", None], ["r2", "4"]]


def test_single_column_csv(tmp_path):
    t = load_table(write(tmp_path, "one.csv", "score\n1\n2\n"))
    assert list(t.frame.columns) == ["score"] and cells(t) == [["1"], ["2"]]


def test_sniffer_prefers_the_consistent_delimiter():
    # Commas appear in values, semicolons separate the fields.
    text = "a;b;c\n1,5;2;x, y, z\n3;4,5;q\n"
    assert sniff_delimiter(text) == (";", 1.0)
    assert sniff_delimiter('a,"b;c",d\n1,2,3\n')[0] == ","
    assert sniff_delimiter("just words\n")[0] is None


# ---------------------------------------------------------------- xlsx


def make_xlsx(path, sheets: dict[str, list[list]]):
    wb = openpyxl.Workbook()
    wb.remove(wb.active)
    for title, rows in sheets.items():
        ws = wb.create_sheet(title)
        for r in rows:
            ws.append(r)
    wb.save(path)
    return path


def test_xlsx_first_sheet_native_values(tmp_path):
    p = make_xlsx(tmp_path / "s.xlsx", {
        "Answers": [["id", "sup1", "sup2", "note"], ["r1", 1, 2.5, "ok"], ["r2", 3, None, "  "]],
        "Other": [["x"], [1]]})
    t = load_table(p)
    assert t.format == "xlsx" and t.sheet == "Answers" and t.encoding is None
    assert list(t.frame.columns) == ["id", "sup1", "sup2", "note"]
    assert cells(t) == [["r1", 1, 2.5, "ok"], ["r2", 3, None, None]]
    assert t.row_numbers.tolist() == [2, 3]


def test_xlsx_named_sheet_and_by_position(tmp_path):
    p = make_xlsx(tmp_path / "s.xlsx", {"Notes": [["text"], ["hello"]],
                                        "Data": [["id", "sup1"], ["r1", 4]]})
    t = load_table(p, sheet="Data")
    assert t.sheet == "Data" and cells(t) == [["r1", 4]]
    assert load_table(p, sheet=1).sheet == "Data"


def test_xlsx_sheet_not_found_lists_sheets(tmp_path):
    p = make_xlsx(tmp_path / "s.xlsx", {"Notes": [["a"], [1]], "Data": [["b"], [2]]})
    with pytest.raises(DataError) as e:
        load_table(p, sheet="Answers")
    msg = str(e.value)
    assert str(p) in msg and "'Answers' not found" in msg and "'Notes', 'Data'" in msg
    with pytest.raises(DataError, match="no sheet number 5"):
        load_table(p, sheet=5)


def test_xlsx_leading_blank_rows_and_trailing_empty_cells(tmp_path):
    p = tmp_path / "s.xlsx"
    wb = openpyxl.Workbook()
    ws = wb.active
    ws["A3"], ws["B3"] = "id", "sup1"
    ws["A4"], ws["B4"] = "r1", 2
    ws["A6"], ws["B6"] = "r2", 5
    ws["E10"] = ""  # an empty string far away must not widen or lengthen the table
    wb.save(p)
    t = load_table(p)
    assert list(t.frame.columns) == ["id", "sup1"]
    assert cells(t) == [["r1", 2], ["r2", 5]]
    assert t.row_numbers.tolist() == [4, 6]  # the sheet's own row numbers


def _set_cached_value(path, cell: str, value: str):
    """Give a formula cell a stored result, as a spreadsheet program does when it saves."""
    src = zipfile.ZipFile(path)
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as dst:
        for item in src.infolist():
            data = src.read(item.filename)
            if item.filename == "xl/worksheets/sheet1.xml":
                data = re.sub(rb'(<c r="' + cell.encode() + rb'"[^>]*><f>[^<]*</f>)<v\s*/>',
                              rb"\1<v>" + value.encode() + rb"</v>", data)
            dst.writestr(item, data)
    src.close()
    path.write_bytes(out.getvalue())


def test_xlsx_formula_cell_gives_its_value(tmp_path):
    p = make_xlsx(tmp_path / "f.xlsx", {"S": [["id", "sup1", "sup2"], ["r1", 2, "=B2+1"]]})
    _set_cached_value(p, "C2", "3")
    t = load_table(p)
    assert cells(t) == [["r1", 2, 3]]
    assert t.warnings == []


def test_xlsx_formula_without_saved_result_is_not_read_as_blank(tmp_path):
    p = make_xlsx(tmp_path / "f.xlsx", {"S": [["id", "sup1", "sup2"], ["r1", 2, "=B2+1"]]})
    t = load_table(p)
    assert cells(t) == [["r1", 2, "=B2+1"]]
    [w] = t.warnings
    assert w["code"] == "formulas_without_results" and "C2" in w["message"]


def test_xlsx_empty_sheet_and_header_only(tmp_path):
    p = make_xlsx(tmp_path / "e.xlsx", {"Empty": [], "Head": [["id", "sup1"]]})
    with pytest.raises(DataError, match="sheet 'Empty' is empty"):
        load_table(p)
    with pytest.raises(DataError) as e:
        load_table(p, sheet="Head")
    assert "no data rows" in str(e.value) and e.value.row == 1


def test_xlsx_errors_name_columns_by_letter(tmp_path):
    p = make_xlsx(tmp_path / "d.xlsx", {"S": [["id", "sup1", "sup2", "sup1"], ["r1", 1, 2, 3]]})
    with pytest.raises(DataError) as e:
        load_table(p)
    assert "columns B and D" in str(e.value) and e.value.column == "sup1"
    p = make_xlsx(tmp_path / "x.xlsx", {"S": [["id", "sup1"], ["r1", 1, None, 7]]})
    with pytest.raises(DataError) as e:
        load_table(p)
    assert e.value.row == 2 and e.value.column == "D" and "'7'" in str(e.value)


def test_xlsx_that_cannot_be_opened(tmp_path):
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("[Content_Types].xml", "<Types/>")
        z.writestr("xl/workbook.xml", "this is not a workbook")
    p = write(tmp_path, "broken.xlsx", buf.getvalue())
    with pytest.raises(DataError) as e:
        load_table(p)
    assert not isinstance(e.value, UnsupportedFormat)
    assert str(p) in str(e.value) and "cannot open the Excel workbook" in str(e.value)


def test_truncated_xlsx_cannot_be_opened(tmp_path):
    p = make_xlsx(tmp_path / "s.xlsx", {"S": [["id", "sup1"], ["r1", 1]] * 50})
    cut = write(tmp_path, "cut.xlsx", p.read_bytes()[:1500])
    with pytest.raises(DataError, match="cannot open the Excel workbook"):
        load_table(cut)


def test_workbook_out_of_memory_says_so_and_what_to_do(tmp_path, monkeypatch):
    import openpyxl

    p = make_xlsx(tmp_path / "s.xlsx", {"S": [["id", "sup1"], ["r1", 1]]})

    def exhausted(*a, **k):
        raise MemoryError

    monkeypatch.setattr(openpyxl, "load_workbook", exhausted)
    with pytest.raises(DataError, match="ran out of memory opening the Excel workbook") as e:
        load_table(p)
    assert ".csv or .parquet" in str(e.value) and str(p) in str(e.value)
    assert isinstance(e.value.__context__, MemoryError)  # the service and command line look for it


# ---------------------------------------------------------------- sav


def make_sav(path):
    df = pd.DataFrame({"id": ["r1", "r2", "r3", "r4", "r5"],
                       "sup1": [1.0, 2.0, -99.0, 98.0, 5.0],
                       "sup2": [3.0, 97.0, 4.0, np.nan, 2.0]})
    pyreadstat.write_sav(
        df, str(path),
        missing_ranges={"sup1": [-99, {"lo": 97, "hi": 99}], "sup2": [{"lo": 97, "hi": 99}]},
        variable_value_labels={"sup1": {1: "disagree", 5: "agree"}})
    return path


def test_sav_user_missing_values_and_labels(tmp_path):
    t = load_table(make_sav(tmp_path / "s.sav"))
    assert t.format == "sav" and t.row_label == "case"
    assert t.row_numbers.tolist() == [1, 2, 3, 4, 5]
    assert list(t.frame.columns) == ["id", "sup1", "sup2"]
    assert t.frame["sup1"].tolist()[:2] == [1.0, 2.0]
    assert np.isnan(t.frame["sup1"].iloc[2]) and np.isnan(t.frame["sup1"].iloc[3])
    assert t.frame["sup1"].iloc[4] == 5.0
    assert np.isnan(t.frame["sup2"].iloc[1]) and t.frame["sup2"].iloc[2] == 4.0
    assert t.value_labels["sup1"] == {1: "disagree", 5: "agree"}
    assert t.user_missing["sup1"] == [{"lo": -99, "hi": -99}, {"lo": 97, "hi": 99}]
    assert t.user_missing["sup2"] == [{"lo": 97, "hi": 99}]
    assert any(w["code"] == "spss_missing_values" for w in t.warnings)


def test_sav_from_bytes(tmp_path):
    data = make_sav(tmp_path / "s.sav").read_bytes()
    t = load_table(data, name="upload.sav")
    assert t.source == "upload.sav" and t.format == "sav" and len(t.frame) == 5


def test_sav_that_crashes_the_reader_is_refused(tmp_path):
    # A string width out of step with its continuation records made readstat (the C library
    # under pyreadstat) crash the whole process, the service with it; it reads in a child.
    data = bytearray(make_sav(tmp_path / "s.sav").read_bytes())
    assert data[176:184] == b"\x02\x00\x00\x00\x02\x00\x00\x00"  # variable 'id': a string of width 2
    data[180] = 15
    with pytest.raises(DataError) as e:
        load_table(bytes(data), name="damaged.sav")
    assert str(e.value).startswith("damaged.sav: cannot read the SPSS file")
    assert len(load_table(tmp_path / "s.sav").frame) == 5  # and the next read still works


def test_sav_that_cannot_be_read(tmp_path):
    p = write(tmp_path, "bad.sav", b"$FL2" + b"\x01\x02garbage" * 10)
    with pytest.raises(DataError) as e:
        load_table(p)
    assert str(p) in str(e.value) and "cannot read the SPSS file" in str(e.value)


# ---------------------------------------------------------------- bytes, detection


def test_bytes_input_behaves_like_a_file(tmp_path):
    t = load_table(b"id;sup1\nr1;2,5\n", name="upload.csv")
    assert t.source == "upload.csv" and t.format == "csv" and t.decimal == ","
    assert cells(t) == [["r1", "2.5"]]
    with pytest.raises(DataError) as e:
        load_table(b"id,sup1\n", name="upload.csv")
    assert "upload.csv" in str(e.value)


def test_xlsx_bytes_input(tmp_path):
    data = make_xlsx(tmp_path / "s.xlsx", {"S": [["id", "sup1"], ["r1", 4]]}).read_bytes()
    t = load_table(data, name="form.xlsx")
    assert t.format == "xlsx" and cells(t) == [["r1", 4]]


def test_extension_disagreeing_with_content(tmp_path):
    real = make_xlsx(tmp_path / "s.xlsx", {"S": [["id", "sup1"], ["r1", 4]]}).read_bytes()
    t = load_table(write(tmp_path, "looks.csv", real))
    assert t.format == "xlsx" and cells(t) == [["r1", 4]]
    t = load_table(write(tmp_path, "really_text.xlsx", "id\tsup1\nr1\t4\n"))
    assert t.format == "tsv" and cells(t) == [["r1", "4"]]
    t = load_table(write(tmp_path, "spss.csv", make_sav(tmp_path / "x.sav").read_bytes()))
    assert t.format == "sav"


def test_unknown_extension_with_delimited_text(tmp_path):
    assert load_table(write(tmp_path, "data.dat", "a|b\n1|2\n")).format == "txt"
    assert load_table(write(tmp_path, "data", "a,b\n1,2\n")).format == "csv"
    assert detect_format(b"a\tb\n1\t2\n", None) == "tsv"
    with pytest.raises(UnsupportedFormat, match="not a delimited table"):
        load_table(write(tmp_path, "notes.dat", "dear team,\nthanks.\nsee you\n"))


@pytest.mark.parametrize("name, content, looks", [
    ("photo.csv", b"\x89PNG\r\n\x1a\n" + b"\x00" * 20, "PNG image"),
    ("paper.pdf", b"%PDF-1.7\n%\xe2\xe3\xcf\xd3\n1 0 obj", "PDF document"),
    ("old.xls", b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\x00" * 50, ".xls workbook"),
    # mtime=0: the bytes are in the test's id, which both xdist workers must collect alike
    ("twice.csv.gz", gzip.compress(gzip.compress(b"a,b\n1,2\n", mtime=0), mtime=0),
     "gzip-compressed file"),
    ("noise.bin", bytes(range(256)) * 4, "binary data"),
    ("noise.csv", bytes(np.random.default_rng(3).integers(0, 256, 500, dtype=np.uint8)),
     "binary data"),
    ("page.csv", b"<!DOCTYPE html><html><body>Sign in</body></html>", "web page"),
    ("design.csv", b'{"constructs": {"sup": {"items": ["sup1", "sup2"]}}}', "JSON"),
])
def test_unsupported_content(tmp_path, name, content, looks):
    p = write(tmp_path, name, content)
    with pytest.raises(UnsupportedFormat) as e:
        load_table(p)
    msg = str(e.value)
    assert looks in msg and str(p) in msg
    assert ".csv, .tsv or .txt" in msg and ".xlsx" in msg and ".sav" in msg
    assert e.value.code == "unsupported_format"


def test_zip_that_is_not_a_workbook(tmp_path):
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("data.csv", "a,b\n1,2\n")
    with pytest.raises(UnsupportedFormat, match="ZIP archive"):
        load_table(buf.getvalue(), name="archive.zip")


# ---------------------------------------------------------------- refusals


@pytest.mark.parametrize("content", [b"", b"   \n\n \r\n", b"\xef\xbb\xbf", b",,,\n,,\n"])
def test_empty_file(tmp_path, content):
    p = write(tmp_path, "empty.csv", content)
    with pytest.raises(DataError) as e:
        load_table(p)
    assert "empty" in str(e.value) and str(p) in str(e.value)


def test_header_only(tmp_path):
    p = write(tmp_path, "head.csv", "id,sup1,sup2\n\n")
    with pytest.raises(DataError) as e:
        load_table(p)
    assert "no data rows" in str(e.value) and str(p) in str(e.value) and e.value.row == 1


def test_duplicate_column_names(tmp_path):
    p = write(tmp_path, "dup.csv", "id,sup1,sup2,eng1,eng2,eng3,sup2\nr1,1,2,3,4,5,6\n")
    with pytest.raises(DataError) as e:
        load_table(p)
    msg = str(e.value)
    assert "'sup2' appears twice" in msg and "columns 3 and 7" in msg and str(p) in msg
    assert e.value.column == "sup2" and e.value.row == 1


def test_duplicate_after_trimming_spaces(tmp_path):
    with pytest.raises(DataError, match="'sup1' appears twice"):
        load_table(write(tmp_path, "dup.csv", "sup1,sup1 \n1,2\n"))


def test_empty_column_name_with_values(tmp_path):
    p = write(tmp_path, "noname.csv", "id,sup1,,sup2\nr1,1,9,2\n")
    with pytest.raises(DataError) as e:
        load_table(p)
    msg = str(e.value)
    assert "column 3" in msg and "after 'sup1'" in msg and "no name" in msg and str(p) in msg
    assert e.value.row == 1 and e.value.column == "3"


def test_empty_unnamed_column_is_dropped(tmp_path):
    t = load_table(write(tmp_path, "gap.csv", "id,,sup1\nr1,,1\nr2,,2\n"))
    assert list(t.frame.columns) == ["id", "sup1"]


def test_ragged_row_with_more_fields_than_header(tmp_path):
    p = write(tmp_path, "ragged.csv", "id,sup1,sup2\nr1,1,2\nr2,3,4\nr3,3,5,5\n")
    with pytest.raises(DataError) as e:
        load_table(p)
    msg = str(e.value)
    assert str(p) in msg and "row 4" in msg and "4 values" in msg and "3 columns" in msg
    assert e.value.row == 4


def test_unclosed_quote(tmp_path):
    p = write(tmp_path, "q.csv", 'id,note,sup1\nr1,ok,1\nr2,"oops,2\nr3,x,3\n')
    with pytest.raises(DataError) as e:
        load_table(p)
    assert "never closed" in str(e.value) and e.value.row == 3 and str(p) in str(e.value)


def test_value_over_the_csv_field_limit_names_its_row(tmp_path):
    # The csv module's own error ("field larger than field limit") escaped unexplained.
    p = write(tmp_path, "long.csv", "id,note\nr1,ok\nr2," + "x" * 140_000 + "\nr3,ok\n")
    with pytest.raises(DataError) as e:
        load_table(p)
    assert e.value.row == 3 and "row 3" in str(e.value) and "characters long" in str(e.value)
    # the same length inside a quote never closed is the missing quote
    p = write(tmp_path, "open.csv", 'id,note\nr1,"oops\n' + "r,1\n" * 40_000)
    with pytest.raises(DataError) as e:
        load_table(p)
    assert e.value.row == 2 and "never closed" in str(e.value)


def test_loose_quote_is_read_and_noted(tmp_path):
    t = load_table(write(tmp_path, "q.csv", 'id,note,sup1\nr1,"great" team,1\nr2,x,2\n'))
    assert cells(t) == [["r1", "great team", "1"], ["r2", "x", "2"]]
    assert [w["code"] for w in t.warnings] == ["loose_quotes"]


def test_bom_but_not_utf8_is_undecodable(tmp_path):
    p = write(tmp_path, "mixed.csv", b"\xef\xbb\xbfid,name\nr1,caf\xe9\n")
    with pytest.raises(DataError) as e:
        load_table(p)
    msg = str(e.value)
    assert "line 2" in msg and "UTF-8" in msg and str(p) in msg


def test_file_over_max_bytes(tmp_path):
    p = write(tmp_path, "big.csv", "id,sup1\n" + "r,1\n" * 100)
    with pytest.raises(DataError) as e:
        load_table(p, max_bytes=100)
    assert e.value.code == "too_large" and str(p) in str(e.value)
    with pytest.raises(DataError):
        load_table(p.read_bytes(), name="big.csv", max_bytes=100)
    assert len(load_table(p, max_bytes=10_000).frame) == 100


def test_missing_file(tmp_path):
    with pytest.raises(DataError) as e:
        load_table(tmp_path / "nope.csv")
    assert "not found" in str(e.value) and "nope.csv" in str(e.value)


def test_messages_use_the_given_name(tmp_path):
    p = write(tmp_path, "x7f3a.bin", "id,sup1\n")
    with pytest.raises(DataError) as e:
        load_table(p, name="survey.csv")
    assert str(e.value).startswith("survey.csv")
    assert os.fspath(p) not in str(e.value)


# ---------------------------------------------------------------- Parquet and gzip


SAMPLE = os.path.join(os.path.dirname(__file__), os.pardir, "sample_surveys", "staff_survey.csv")


def _parquet(frame: pd.DataFrame, **kw) -> bytes:
    buf = io.BytesIO()
    frame.to_parquet(buf, engine="pyarrow", **kw)
    return buf.getvalue()


def test_parquet_gives_the_same_prepared_items_as_the_csv():
    # Reference: pandas' own CSV reader writes the Parquet file; the items prepared from it
    # equal those prepared from the CSV (same values, same missing cells, same row numbers).
    import json

    from samesource.input.design import parse_design
    from samesource.input.prepare import prepare

    design = parse_design(json.loads(open(os.path.join(os.path.dirname(SAMPLE), "staff_survey_design.json"),
                                          encoding="utf-8").read()))
    frame = pd.read_csv(SAMPLE, dtype={"respondent": str, "team": str})
    from_csv = prepare(load_table(SAMPLE), design)
    t = load_table(_parquet(frame, index=False), name="staff.parquet")
    assert t.format == "parquet" and t.row_label == "row"
    assert t.row_numbers.tolist() == list(range(1, len(frame) + 1))
    from_parquet = prepare(t, design)
    pd.testing.assert_frame_equal(from_parquet.items.reset_index(drop=True),
                                  from_csv.items.reset_index(drop=True))
    assert from_parquet.missing_cells == from_csv.missing_cells


def test_parquet_column_kinds(tmp_path):
    frame = pd.DataFrame({"id": ["a", "b", " "], "x": pd.array([1, 2, None], dtype="Int64"),
                          "team": pd.Categorical(["u", "v", "u"]), "f": [1.5, 2.5, 3.5]})
    p = write(tmp_path, "s.parquet", _parquet(frame, index=False))
    t = load_table(p)
    assert list(t.frame.columns) == ["id", "x", "team", "f"]
    assert cells(t) == [["a", 1.0, "u", 1.5], ["b", 2.0, "v", 2.5], [None, None, "u", 3.5]]
    assert t.size_bytes == p.stat().st_size and len(t.sha256) == 64


def test_parquet_refusals(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    with pytest.raises(DataError, match="cannot read the Parquet file") as e:
        load_table(b"PAR1" + b"\x00" * 40, name="cut.parquet")
    assert e.value.file == "cut.parquet"
    buf = io.BytesIO()
    pq.write_table(pa.table({"id": ["a"], "answers": [[1, 2]]}), buf)
    with pytest.raises(DataError, match="lists or structures") as e:
        load_table(buf.getvalue(), name="nested.parquet")
    assert e.value.column == "answers"
    buf = io.BytesIO()
    pq.write_table(pa.table([pa.array([1]), pa.array([2])], names=["sup1", "sup1"]), buf)
    with pytest.raises(DataError, match="appears twice") as e:
        load_table(buf.getvalue(), name="twice.parquet")
    assert e.value.column == "sup1"
    with pytest.raises(DataError, match="no rows"):
        load_table(_parquet(pd.DataFrame({"a": pd.Series([], dtype=float)})), name="empty.parquet")


def test_csv_gz_reads_as_its_csv(tmp_path):
    text = "id;sup1\nr1;3,5\nr2;4\n"
    plain = load_table(write(tmp_path, "s.csv", text))
    packed = write(tmp_path, "s.csv.gz", gzip.compress(text.encode()))
    t = load_table(packed)
    assert (t.format, t.delimiter, t.decimal) == ("csv", ";", ",")
    assert cells(t) == cells(plain) and t.row_numbers.tolist() == plain.row_numbers.tolist()
    assert t.size_bytes == packed.stat().st_size and t.warnings[0]["code"] == "unpacked"
    # several gzip members (as `cat a.gz b.gz` makes) are one file, as gzip itself reads them
    two = gzip.compress(b"id,sup1\nr1,3\n") + gzip.compress(b"r2,4\n")
    assert cells(load_table(two, name="two.csv.gz")) == [["r1", "3"], ["r2", "4"]]
    # the format inside comes from the contents: a gzip-compressed workbook is a workbook
    book = make_xlsx(tmp_path / "b.xlsx", {"S": [["id", "sup1"], ["r1", 4]]}).read_bytes()
    assert load_table(gzip.compress(book), name="b.xlsx.gz").format == "xlsx"
    frame = pd.DataFrame({"id": ["r1"], "sup1": [4.0]})
    assert load_table(gzip.compress(_parquet(frame)), name="p.parquet.gz").format == "parquet"


def test_csv_gz_refusals(tmp_path):
    good = gzip.compress(b"id,sup1\nr1,3\nr2,4\n")
    with pytest.raises(DataError, match="cannot unpack") as e:
        load_table(b"\x1f\x8b\x08\x00" + b"\x00" * 20, name="d.csv.gz")
    assert e.value.file == "d.csv.gz"
    with pytest.raises(DataError, match="cut short"):
        load_table(good[:-12], name="cut.csv.gz")
    with pytest.raises(UnsupportedFormat, match="unpacks to a PDF document") as e:
        load_table(gzip.compress(b"%PDF-1.7\n%\xe2\xe3"), name="paper.csv.gz")
    assert e.value.file == "paper.csv.gz"
    with pytest.raises(DataError, match="empty inside"):
        load_table(gzip.compress(b"  \n"), name="blank.csv.gz")
    # a small file that unpacks far beyond the limit stops while unpacking
    bomb = gzip.compress(b"1,2\n" * 2_000_000)
    with pytest.raises(DataError, match="unpacks to over") as e:
        load_table(bomb, name="bomb.csv.gz", max_bytes=len(bomb) * 2)
    assert e.value.code == "too_large"
