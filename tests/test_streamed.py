"""The answers read a block of lines at a time (samesource.input.streamed) against the
in-memory reading of the same file.

Outside reference: the in-memory path's own report.json on the bundled sample survey, pinned
in tests/data/ (tests/test_report_pinned.py keeps it equal to the pinned reports), and
``prepare(load_table(...))``'s messages for the same bad cells. Small blocks make the
2,500-row survey many blocks, so a bad cell lies in a late one.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from samesource.engine.fitting import fit_model
from samesource.errors import DataError
from samesource.executor import SerialExecutor
from samesource.input import streamed
from samesource.input.design import parse_design
from samesource.input.loading import load_table
from samesource.input.prepare import prepare
from samesource.input.rows import CodedRows
from samesource.input.streamed import NotStreamable, stream_items
from samesource.pipeline import analyze

ROOT = Path(__file__).resolve().parents[1]
SURVEY = ROOT / "sample_surveys" / "staff_survey.csv"
DESIGN = json.loads((ROOT / "sample_surveys" / "staff_survey_design.json").read_text(encoding="utf-8"))


@pytest.fixture
def small_blocks(monkeypatch):
    monkeypatch.setattr(streamed, "BLOCK_BYTES", 7_000)   # about 100 lines a block


@pytest.fixture(scope="module")
def fiml_analysis():
    return analyze(str(SURVEY), DESIGN, {"missing": "fiml"}, executor=SerialExecutor())


def test_streamed_moments_and_fiml_fit_equal_the_in_memory_report(small_blocks, fiml_analysis):
    design = parse_design(DESIGN)
    got = stream_items(SURVEY, design)
    prepared = fiml_analysis.prepared
    assert got.n_rows == prepared.n_rows and got.missing_cells == prepared.missing_cells
    # Listwise moments: those of the complete rows in memory (numpy).
    complete = prepared.items.dropna().to_numpy(dtype=float)
    m = got.moments(design.items)
    assert m.n == len(complete)
    np.testing.assert_allclose(m.mean, complete.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(m.cov, np.cov(complete, rowvar=False, bias=True), rtol=1e-10, atol=1e-13)
    # FIML from the streamed pattern sums: report.json's measurement model numbers.
    spec = fiml_analysis.fits["measurement_model"].spec
    fit = fit_model(spec, got.fiml_data())
    want = fiml_analysis.report["measurement_model"]["fit"]
    for key in ("chi2", "df", "cfi", "tli", "rmsea", "srmr", "n", "loglik", "aic", "bic", "baseline_chi2"):
        assert getattr(fit, key) == pytest.approx(want[key], rel=1e-6, abs=1e-9), key
    ref = fiml_analysis.fits["measurement_model"].params
    np.testing.assert_allclose(fit.params["estimate"], ref["estimate"], rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(fit.params["se"], ref["se"], rtol=1e-4, atol=1e-7)


def _replaced(lines: list[str], cells: dict[tuple[int, str], str]) -> list[str]:
    """CSV lines with some cells replaced ((user row, column) -> text)."""
    lines = list(lines)
    header = lines[0].split(",")
    for (row, col), text in cells.items():
        fields = lines[row - 1].split(",")
        fields[header.index(col)] = text
        lines[row - 1] = ",".join(fields)
    return lines


def _with_cells(tmp_path: Path, cells: dict[tuple[int, str], str]) -> Path:
    """The sample survey with some cells replaced ((user row, column) -> text)."""
    out = tmp_path / "survey.csv"
    out.write_text("\n".join(_replaced(SURVEY.read_text(encoding="utf-8").splitlines(), cells)) + "\n",
                   encoding="utf-8")
    return out


@pytest.mark.parametrize("cells", [
    {(2400, "eng3"): "abc"},                                       # one text cell, late
    {(2300, "sup2"): "Agree", (2450, "sup2"): "agree", (2460, "wld1"): "x", (40, "sup2"): "4.5.1", (41, "eng1"): "n/a"},
    {(2490, "stay1"): "9"},                                        # outside the scale 1 to 7
    {(2201, "imp2"): "0", (2350, "imp2"): "12", (2351, "wth3"): "8"},
])
def test_a_bad_cell_in_a_late_block_gives_the_in_memory_message(small_blocks, tmp_path, cells):
    path = _with_cells(tmp_path, cells)
    design = parse_design(DESIGN)
    with pytest.raises(DataError) as want:
        prepare(load_table(str(path)), design)
    with pytest.raises(DataError) as got:
        stream_items(path, design)
    assert str(got.value) == str(want.value)
    assert (got.value.row, got.value.column, got.value.file) == (want.value.row, want.value.column,
                                                                  want.value.file)


def test_files_outside_the_plain_case_are_refused_for_memory(tmp_path):
    design = parse_design(DESIGN)
    quoted = _with_cells(tmp_path, {(2000, "team"): '"T 1"'})
    with pytest.raises(NotStreamable):
        stream_items(quoted, design)
    short = tmp_path / "short.csv"
    text = SURVEY.read_text(encoding="utf-8").splitlines()
    short.write_text("\n".join(text[:50] + [",".join(text[50].split(",")[:-1])] + text[51:]) + "\n")
    with pytest.raises(NotStreamable):
        stream_items(short, design)
    no_scale = {k: v for k, v in DESIGN.items() if k != "response_scale"}
    with pytest.raises(NotStreamable):
        stream_items(SURVEY, parse_design(no_scale))


# --------------------------------------------------------------------------- prepare_streamed
# Outside reference for each check below: the in-memory reader, prepare(load_table(path)), on the
# same file, and the hand-made files' own contents (the ids, groups and rows written in them).

HAND_DESIGN = {
    "constructs": {"calm": {"items": ["q1", "q2", "q3"], "reverse": ["q2"]},
                   "pace": {"items": ["q4", "q5", "q6"]}},
    "paths": [{"outcome": "pace", "predictors": ["calm"]}],
    "response_scale": {"min": 1, "max": 5}, "missing_codes": [9],
    "id_column": "person", "group_column": "unit",
}


@pytest.fixture
def tiny_blocks(monkeypatch):
    monkeypatch.setattr(streamed, "BLOCK_BYTES", 64)   # two or three lines a block


def _write(tmp_path: Path, lines: list[str], name: str = "hand.csv", *, bom: bool = False) -> Path:
    path = tmp_path / name
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + ("\n".join(lines) + "\n").encode("utf-8"))
    return path


def _both(path: Path, design: dict):
    dsg = parse_design(design)
    return streamed.prepare_streamed(path, dsg), prepare(load_table(str(path)), dsg)


def _assert_same(got, want) -> None:
    """Everything the pipeline reads of a PreparedData, the streamed against the in-memory."""
    rows = got.rows
    assert isinstance(rows, CodedRows)
    assert list(rows.names) == list(want.items.columns)
    answers = np.full((len(rows), len(rows.names)), -1.0)
    for start, X in rows.blocks(size=3):
        answers[start:start + len(X)] = X
    np.testing.assert_array_equal(answers, want.items.to_numpy())          # NaN where NaN
    np.testing.assert_array_equal(rows.labels, want.items.index.to_numpy())
    for key in ("scale_min", "scale_max", "scale_source", "n_rows", "missing_cells", "warnings"):
        assert getattr(got, key) == getattr(want, key), key
    for key in ("source", "format", "encoding", "delimiter", "decimal", "sha256", "size_bytes",
                "row_label", "warnings", "sheet"):
        assert getattr(got.table, key) == getattr(want.table, key), key
    assert list(got.table.frame.columns) == list(want.table.frame.columns)
    np.testing.assert_array_equal(got.table.row_numbers, want.table.row_numbers)
    for part in ("ids", "groups"):
        g, w = getattr(got, part), getattr(want, part)
        if w is None:
            assert g is None
            continue
        assert g.name == w.name and g.index.equals(w.index)
        assert [None if v != v else v for v in g.astype(object)] == [None if v != v else v for v in w], part
    assert got._frame is None   # reading never built the DataFrame


HAND = [
    "person,unit,q1,q2,q3,q4,q5,q6",
    "101,North,1,2,3,4,5,1",
    "102,North ,2,n/a,4,5,1,2",
    "103,,3,4,9,1,2,3",
    "104, South,,,,,,",
    "101,South,5,1,2,3,4,5",
    ",East,4,4,4,4,4,4",
    "106,East,1,5,1,5,1,5",
    "107,North,2,2,2,2,2,2",
]


def test_hand_made_file_equals_the_in_memory_reading(tiny_blocks, tmp_path):
    got, want = _both(_write(tmp_path, HAND), HAND_DESIGN)
    _assert_same(got, want)
    # The file's own contents: whole-number ids as numbers (a blank one NaN), groups stripped.
    assert got.ids.dtype == np.float64
    assert [None if v != v else int(v) for v in got.ids] == [101, 102, 103, 104, 101, None, 106, 107]
    assert [None if v != v else v for v in got.groups.astype(object)] == [
        "North", "North", None, "South", "South", "East", "East", "North"]
    assert [w["code"] for w in got.warnings] == ["text_missing_markers", "rows_without_answers",
                                                 "missing_ids", "duplicate_ids", "missing_groups"]
    assert got.rows.labels.tolist() == list(range(2, 10))
    assert got.rows.column("q2")[:2].tolist()[0] == 4.0   # 2 reverse-keyed on 1..5 (the file's row 2)
    # The sha256 of the file's bytes (hashlib on the file itself).
    import hashlib
    assert got.table.sha256 == hashlib.sha256((tmp_path / "hand.csv").read_bytes()).hexdigest()


def test_whole_number_ids_without_blanks_are_int64_and_texts_a_categorical(tiny_blocks, tmp_path):
    lines = [HAND[0]] + [f"{200 + i},U{i % 3},{1 + i % 5},{1 + (i * 2) % 5},{1 + (i * 3) % 5},"
                         f"{1 + (i // 2) % 5},{1 + (i // 3) % 5},{1 + (i // 4) % 5}"
                         for i in range(40)]
    got, want = _both(_write(tmp_path, lines), HAND_DESIGN)
    _assert_same(got, want)
    assert got.ids.dtype == np.int64 and got.ids.tolist() == list(range(200, 240))
    assert isinstance(got.groups.dtype, pd.CategoricalDtype) and got.groups.cat.categories.tolist() == ["U0", "U1", "U2"]
    # One id late in the file not written as a plain whole number: in memory the column is text.
    # (Not "2e2": in memory it is the number 200, its text as long as 200's, which the
    # column-wise reader's check of line lengths takes for the integer's own digits.)
    for odd in ("0233", "+233", "233.0", " 233", "2e02", "R233", "-9223372036854775808",
                "9223372036854775808"):
        text = lines[:34] + [lines[34].replace("233", odd, 1)] + lines[35:]
        got, want = _both(_write(tmp_path, text, "odd.csv"), HAND_DESIGN)
        _assert_same(got, want)
        assert isinstance(got.ids.dtype, pd.CategoricalDtype), odd
        assert got.ids.astype(object).tolist()[:3] == ["200", "201", "202"]
    text = lines[:34] + [lines[34].replace("233", "9223372036854775807", 1)] + lines[35:]
    got, want = _both(_write(tmp_path, text, "big.csv"), HAND_DESIGN)   # the largest int64: a number
    _assert_same(got, want)
    assert got.ids.dtype == np.int64 and got.ids.iloc[33] == 2 ** 63 - 1


def test_blank_lines_are_skipped_and_noted_as_in_memory(tiny_blocks, tmp_path):
    lines = HAND[:3] + ["", ",,,,,,,", HAND[3], "  ,,", "", HAND[4]] + HAND[5:] + [",,,,,,,", "", ""]
    path = _write(tmp_path, lines, bom=True)
    got, want = _both(path, HAND_DESIGN)
    _assert_same(got, want)
    assert got.table.warnings[0]["code"] == "blank_rows_skipped"
    assert got.rows.labels.tolist() == [2, 3, 6, 9, 10, 11, 12, 13]   # the file's line numbers
    assert got.table.encoding == "utf-8-sig"
    # A blank row makes the in-memory reader read every cell as text: the ids are texts.
    assert got.ids.astype(object).tolist()[:3] == ["101", "102", "103"]


def test_text_ids_repeated_and_blank_give_the_in_memory_notes(tiny_blocks, tmp_path):
    lines = [HAND[0]] + [f"{pid},North,{1 + k % 5},{1 + k % 4},{1 + k % 3},{1 + k % 3},{1 + k % 2},{1 + k % 2}" for k, pid in
                         enumerate(("A1", "B2", "  ", "A1 ", "C3", "B2", "B2", "D4", ""))]
    got, want = _both(_write(tmp_path, lines), HAND_DESIGN)
    _assert_same(got, want)
    dup = next(w["message"] for w in got.warnings if w["code"] == "duplicate_ids")
    assert "2 id value(s)" in dup and "'A1' in rows 2 and 5" in dup   # 'A1 ' is A1 (the file)
    assert next(w for w in got.warnings if w["code"] == "missing_ids")["message"].startswith("2 row(s)")


def _generated(tmp_path: Path, n: int, seed: int) -> Path:
    """A survey with known structure (invented): answers 1..5, 4% blank, some 9s (missing
    code), an id per row and 12 units."""
    rng = np.random.default_rng(seed)
    X = np.clip(np.rint(3 + rng.standard_normal((n, 1)) + 0.8 * rng.standard_normal((n, 6))), 1, 5)
    cells = X.astype(int).astype(str).astype(object)
    cells[rng.random((n, 6)) < 0.04] = ""
    cells[rng.random((n, 6)) < 0.01] = "9"
    units = rng.integers(0, 12, n)
    lines = [HAND[0]] + [f"{5000 + i},unit {units[i]}," + ",".join(cells[i]) for i in range(n)]
    return _write(tmp_path, lines, f"gen{seed}.csv")


@pytest.mark.parametrize("seed", [1, 2])
def test_generated_file_equals_the_in_memory_reading(monkeypatch, tmp_path, seed):
    monkeypatch.setattr(streamed, "BLOCK_BYTES", 3_000)
    got, want = _both(_generated(tmp_path, 2_000, seed), HAND_DESIGN)
    _assert_same(got, want)
    # The lazily built DataFrame is the in-memory one; the sums are those of stream_items.
    import pandas.testing as pdt
    pdt.assert_frame_equal(got.items, want.items)
    complete = want.items.dropna().to_numpy()
    np.testing.assert_allclose(got.sums.moments(list(want.items.columns)).cov,
                               np.cov(complete, rowvar=False, bias=True), rtol=1e-10)


@pytest.mark.parametrize("cells", [
    {(1900, "q3"): "abc"},                                    # one text cell, in a late block
    {(1800, "q5"): "Agree", (1950, "q5"): "inf", (1990, "q1"): "TRUE", (30, "q5"): "1e400"},
    {(1990, "q6"): "6"},                                      # outside the scale 1 to 5
    {(1500, "q2"): "0", (1700, "q2"): "12", (1701, "q4"): "8"},
])
def test_errors_in_a_late_block_are_the_in_memory_ones_word_for_word(monkeypatch, tmp_path, cells):
    monkeypatch.setattr(streamed, "BLOCK_BYTES", 3_000)
    path = _generated(tmp_path, 2_000, 3)
    path = _write(tmp_path, _replaced(path.read_text(encoding="utf-8").splitlines(), cells), "bad.csv")
    dsg = parse_design(HAND_DESIGN)
    with pytest.raises(DataError) as want:
        prepare(load_table(str(path)), dsg)
    with pytest.raises(DataError) as got:
        streamed.prepare_streamed(path, dsg)
    assert str(got.value) == str(want.value)
    assert (got.value.row, got.value.column, got.value.file) == (want.value.row, want.value.column,
                                                                  want.value.file)


def test_what_is_not_streamable_is_named(tmp_path):
    design = parse_design(HAND_DESIGN)
    cases = {
        "not whole numbers": HAND[:2] + ["102,North,2.5,3,4,5,1,2"] + HAND[3:],
        "quoted": HAND[:2] + ['102,"North",2,3,4,5,1,2'] + HAND[3:],
        "short row": HAND[:2] + ["102,North,2,3,4,5,1"] + HAND[3:],
        "header only": HAND[:1],
    }
    for what, lines in cases.items():
        with pytest.raises(NotStreamable):
            streamed.prepare_streamed(_write(tmp_path, lines, "x.csv"), design)
        if what == "not whole numbers":   # in memory it is read (3.5 is inside the scale)
            assert prepare(load_table(str(tmp_path / "x.csv")), design).n_rows == 8
    wide = dict(HAND_DESIGN, response_scale={"min": 0, "max": 300})
    half = dict(HAND_DESIGN, response_scale={"min": 0.5, "max": 5})
    for d in (wide, half, {k: v for k, v in HAND_DESIGN.items() if k != "response_scale"}):
        with pytest.raises(NotStreamable):
            streamed.prepare_streamed(_write(tmp_path, HAND, "y.csv"), parse_design(d))
