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
import pytest

from samesource.engine.fitting import fit_model
from samesource.errors import DataError
from samesource.executor import SerialExecutor
from samesource.input import streamed
from samesource.input.design import parse_design
from samesource.input.loading import load_table
from samesource.input.prepare import prepare
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


def _with_cells(tmp_path: Path, cells: dict[tuple[int, str], str]) -> Path:
    """The sample survey with some cells replaced ((user row, column) -> text)."""
    lines = SURVEY.read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    for (row, col), text in cells.items():
        fields = lines[row - 1].split(",")
        fields[header.index(col)] = text
        lines[row - 1] = ",".join(fields)
    out = tmp_path / "survey.csv"
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
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
