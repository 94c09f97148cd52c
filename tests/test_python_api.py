"""The Python face: samesource.analyze and the Report it returns.

Outside references: the pinned report.json of the sample survey (tests/data, the record the
command line wrote before the Python face existed; compared as tests/test_report_pinned.py
compares it) and report.json itself for every number a table or typed section repeats. A
DataFrame must give the analysis of the file it was read from (pandas' own CSV reader).
"""

from __future__ import annotations

import dataclasses
import io
import json
from pathlib import Path

import pandas as pd
import pytest
from conftest import small_survey
from test_report_pinned import DATA, DESIGN, SURVEY, _differences

import samesource
from samesource.errors import DataError, InputError
from samesource.executor import SerialExecutor

SOURCE_FIELDS = ("file", "format", "encoding", "delimiter", "decimal", "sha256")


@pytest.fixture(scope="module")
def sample():
    return samesource.analyze(SURVEY, DESIGN, missing="listwise", executor=SerialExecutor())


@pytest.fixture(scope="module")
def small():
    data, design = small_survey()
    from_bytes = samesource.analyze(data, design, name="small.csv", executor=SerialExecutor())
    frame = pd.read_csv(io.BytesIO(data))
    from_frame = samesource.analyze(frame, design, executor=SerialExecutor())
    return from_bytes, from_frame, frame


def test_to_dict_is_the_pinned_report(sample):
    want = json.loads((DATA / "pinned_report_listwise.json").read_text(encoding="utf-8"))
    diffs = _differences(sample.to_dict(), want)
    assert not diffs, "\n".join(diffs[:20])


def test_to_json_is_report_json_and_save_writes_what_the_command_line_writes(sample, tmp_path):
    assert json.loads(sample.to_json()) == sample.to_dict()
    out = sample.save(tmp_path / "out", when="2025-01-01 00:00 UTC")
    written = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    tables = sorted(f"tables/{n}.csv" for n in sample.table_names)
    assert written == sorted(["report.json", "report.html", "brief.html", "tables.xlsx", *tables])
    assert (out / "report.json").read_text(encoding="utf-8") == sample.to_json()
    assert "2025-01-01 00:00 UTC" in (out / "report.html").read_text(encoding="utf-8")


def test_to_frame_names_are_the_table_files_and_their_numbers_are_report_json(sample, tmp_path):
    rep = sample.to_dict()
    out = sample.save(tmp_path / "t")
    for name in sample.table_names:
        frame = sample.to_frame(name)
        on_disk = pd.read_csv(out / "tables" / f"{name}.csv")
        assert list(on_disk.columns) == list(frame.columns), name
        assert len(on_disk) == len(frame), name
    constructs = sample.to_frame("constructs").set_index("construct")
    for name, c in rep["constructs"].items():
        assert constructs.loc[name, "alpha"] == pytest.approx(c["alpha"])
        assert constructs.loc[name, "omega"] == pytest.approx(c["omega"])
    paths = sample.to_frame("paths")
    for p in rep["paths"]:
        for method, e in p["estimates"].items():
            row = paths[(paths.outcome == p["outcome"]) & (paths.predictor == p["predictor"])
                        & (paths.method == method)]
            assert len(row) == 1
            if e and e.get("estimate") is not None:
                assert row.estimate.iloc[0] == pytest.approx(e["estimate"])
    htmt = sample.to_frame("htmt")
    for key, v in rep["measurement_model"]["htmt"].items():
        a, b = key.split("|")
        got = htmt[(htmt.construct_a == a) & (htmt.construct_b == b)].htmt.iloc[0]
        assert (pd.isna(got) and v is None) or got == pytest.approx(v)


def test_typed_sections_read_report_json_and_refuse_changes(sample):
    rep = sample.to_dict()
    sup = sample.constructs["support"]
    assert sup.alpha == rep["constructs"]["support"]["alpha"]
    assert sup.items == tuple(rep["constructs"]["support"]["items"])
    first = next(iter(sup.item_stats))
    assert sup.item_stats[first].loading == rep["constructs"]["support"]["item_stats"][first]["loading"]
    p = sample.paths[0]
    assert p.preferred == rep["paths"][0]["preferred"]
    assert p.preferred_estimate.estimate == rep["paths"][0]["estimates"][p.preferred]["estimate"]
    pair = next(iter(rep["measurement_model"]["htmt"]))
    assert sample.measurement_model.htmt[tuple(pair.split("|"))] == rep["measurement_model"]["htmt"][pair]
    assert sample.measurement_model.fit.cfi == rep["measurement_model"]["fit"]["cfi"]
    assert sample.method_variance.verdict.level == rep["method_variance"]["verdict"]["level"]
    assert [a.id for a in sample.assumptions] == [a["id"] for a in rep["assumptions"]]
    assert sample.cautions == tuple(rep["cautions"]) and sample.cautions
    from samesource.engine.fitting import FitResult

    assert isinstance(sample.fits["measurement_model"], FitResult)
    with pytest.raises(dataclasses.FrozenInstanceError):
        sup.alpha = 1.0
    with pytest.raises(TypeError):
        sample.constructs["support"] = sup
    changed = sample.to_dict()
    changed["constructs"]["support"]["alpha"] = -1
    assert sample.to_dict()["constructs"]["support"]["alpha"] == rep["constructs"]["support"]["alpha"]
    assert samesource.Report.from_dict(rep).to_json() == sample.to_json()


def test_summary_and_notebook_view_keep_the_cautions_and_escape_names(sample):
    assert sample.summary().startswith("samesource") and str(sample) == sample.summary()
    html = sample._repr_html_()
    for c in sample.cautions:
        assert c.replace("'", "&#39;").replace('"', "&#34;")[:40] in html
    rep = sample.to_dict()
    rep["data"]["file"] = "<script>x</script>.csv"
    html = samesource.Report.from_dict(rep)._repr_html_()
    assert "<script>" not in html and "&lt;script&gt;" in html
    assert "substantial" in repr(sample) or "Report(" in repr(sample)


def test_a_dataframe_gives_the_analysis_of_its_file(small):
    from_bytes, from_frame, frame = small
    a, b = from_bytes.to_dict(), from_frame.to_dict()
    assert b["data"]["format"] == "dataframe" and b["data"]["file"] == "DataFrame"
    for side in (a, b):
        side.pop("timings")
        for k in SOURCE_FIELDS:
            side["data"].pop(k)
        for f in side["screening"]["flagged_rows"]:
            f.pop("row")
    assert _differences(b, a) == []
    # rows are named by the frame's index: file row r (header on row 1) is df.loc[r - 2]
    rows_a = [f["row"] for f in from_bytes.to_dict()["screening"]["flagged_rows"]]
    rows_b = [f["row"] for f in from_frame.to_dict()["screening"]["flagged_rows"]]
    assert rows_b == [r - 2 for r in rows_a]
    assert all(r in frame.index for r in rows_b)


def test_a_dataframe_of_mixed_cells_reads_like_its_csv(tmp_path):
    frame = pd.DataFrame({"a": [1, "2", None, 4.5], 7: ["x", "y", "z", "w"]})
    from samesource.input.frames import frame_table

    t = frame_table(frame)
    assert list(t.frame.columns) == ["a", "7"] and t.format == "dataframe"
    assert list(t.frame["a"].iloc[[0, 1, 3]]) == ["1", "2", "4.5"] and pd.isna(t.frame["a"].iloc[2])
    assert list(t.row_numbers) == [0, 1, 2, 3]
    t = frame_table(frame.set_index(pd.Index([10, 20, 30, 40])))
    assert list(t.row_numbers) == [10, 20, 30, 40]


def test_bad_input_is_an_input_error_naming_what(sample):
    _, design = small_survey(n=50)
    with pytest.raises(InputError) as e:
        samesource.analyze(123, design)
    assert e.value.field == "data"
    with pytest.raises(InputError) as e:
        samesource.analyze(b"a,b\n1,2\n", design, bootstrapp=10)
    assert e.value.field == "options.bootstrapp" and "bootstrap" in str(e.value)
    with pytest.raises(DataError, match="appears twice"):
        samesource.analyze(pd.DataFrame([[1, 2]], columns=["a", "a"]), design)
    with pytest.raises(DataError, match="no rows"):
        samesource.analyze(pd.DataFrame({"a": []}), design)
    with pytest.raises(KeyError, match="did you mean 'paths'"):
        sample.to_frame("pathz")


def test_the_public_names_load_when_used():
    import subprocess
    import sys

    code = ("import sys, samesource; assert 'samesource.pipeline' not in sys.modules; "
            "samesource.analyze; assert 'samesource.pipeline' in sys.modules; "
            "print(sorted(n for n in dir(samesource) if not n.startswith('_')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=Path(__file__).resolve().parent)
    for name in ("analyze", "Report", "Design", "load_design", "AnalysisOptions", "InputError"):
        assert name in out.stdout
