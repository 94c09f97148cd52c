"""report.json on the bundled sample survey, pinned: a change that moves any number shows here.

The pinned files under tests/data/ were written by this module (``python
tests/test_report_pinned.py`` rewrites them) from the code as it stood before issue 15's
speed work; the check is that later changes keep every number. Outside reference: the pinned
reports themselves, not the project's current code. Excluded: ``timings`` (seconds and
memory of one run) and ``tool.version``. Numbers compare within ``REL`` relative or ``ABS``
absolute tolerance: the fits stop at an optimizer tolerance, and a bootstrap replicate's
covariance matrix formed another way rounds differently in the last bits (a refit from it
then stops a little elsewhere within that tolerance).
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
SURVEY = ROOT / "sample_surveys" / "staff_survey.csv"
DESIGN = ROOT / "sample_surveys" / "staff_survey_design.json"

REL = 1e-6
ABS = 1e-6
# Bootstrap intervals are quantiles of replicates that each stop within the fitting
# tolerance; a looser bound there (still far below any reported digit).
BOOT_ABS = 1e-4

CASES = {
    "fiml": {"missing": "fiml"},
    "listwise": {"missing": "listwise"},
    "bootstrap": {"missing": "listwise", "bootstrap": 40, "seed": 7},
}
EXCLUDED = {("timings",), ("tool", "version")}


def _report(options: dict) -> dict:
    from samesource.executor import SerialExecutor
    from samesource.pipeline import analyze

    design = json.loads(DESIGN.read_text(encoding="utf-8"))
    analysis = analyze(str(SURVEY), design, options, executor=SerialExecutor())
    return json.loads(json.dumps(analysis.report))


def _differences(got, want, path=(), boot=False) -> list[str]:
    if path in EXCLUDED:
        return []
    where = "/".join(map(str, path)) or "(top)"
    boot = boot or "bootstrap" in path
    if isinstance(want, dict):
        if not isinstance(got, dict):
            return [f"{where}: {type(got).__name__} instead of an object"]
        out = [f"{where}: key {k!r} missing" for k in want if k not in got and path + (k,) not in EXCLUDED]
        out += [f"{where}: new key {k!r}" for k in got if k not in want and path + (k,) not in EXCLUDED]
        for k in want:
            if k in got:
                out += _differences(got[k], want[k], path + (k,), boot)
        return out
    if isinstance(want, list):
        if not isinstance(got, list) or len(got) != len(want):
            return [f"{where}: list of {len(got) if isinstance(got, list) else '-'} instead of {len(want)}"]
        out = []
        for i, (g, w) in enumerate(zip(got, want, strict=True)):
            out += _differences(g, w, path + (i,), boot)
        return out
    if isinstance(want, bool) or isinstance(got, bool) or not isinstance(want, int | float):
        return [] if got == want else [f"{where}: {got!r} instead of {want!r}"]
    if not isinstance(got, int | float):
        return [f"{where}: {got!r} instead of {want!r}"]
    if math.isclose(got, want, rel_tol=REL, abs_tol=BOOT_ABS if boot else ABS):
        return []
    return [f"{where}: {got!r} instead of {want!r}"]


@pytest.mark.parametrize("case", sorted(CASES))
def test_report_json_is_unchanged_on_the_sample_survey(case):
    want = json.loads((DATA / f"pinned_report_{case}.json").read_text(encoding="utf-8"))
    got = _report(CASES[case])
    diffs = _differences(got, want)
    assert not diffs, f"{len(diffs)} differences from the pinned report ({case}):\n" + "\n".join(diffs[:40])


def test_the_file_read_a_block_at_a_time_gives_the_same_report(monkeypatch):
    # Every plain CSV file streamed (SAMESOURCE_STREAM_MB=0): the answers kept one byte a cell
    # (measurement/input/streamed.py) and every stage reading them a block at a time give the
    # pinned FIML report, and no stage builds the answers' DataFrame.
    from samesource.input import streamed

    monkeypatch.setenv("SAMESOURCE_STREAM_MB", "0")
    keeps = streamed.StreamedPreparedData.items.fset  # the reader sets it empty; reading it is the fault
    monkeypatch.setattr(streamed.StreamedPreparedData, "items", property(_no_frame, keeps))
    want = json.loads((DATA / "pinned_report_fiml.json").read_text(encoding="utf-8"))
    got = _report(CASES["fiml"])
    assert got["data"]["format"] == want["data"]["format"]
    diffs = _differences(got, want)
    assert not diffs, f"{len(diffs)} differences from the pinned report (streamed):\n" + "\n".join(diffs[:40])


def _no_frame(self):
    raise AssertionError("a stage built the answers' DataFrame of a streamed file")


def test_the_comparison_sees_a_changed_number():
    want = {"a": [1.0, {"b": 2.0}], "tool": {"version": "1"}, "timings": {"load": 1.0}}
    assert _differences({"a": [1.0, {"b": 2.0}], "tool": {"version": "2"}}, want) == []
    assert _differences({"a": [1.0, {"b": 2.001}], "tool": {"version": "1"}}, want) == ["a/1/b: 2.001 instead of 2.0"]
    assert _differences({"a": [1.0, {"b": None}], "tool": {}}, want) == ["a/1/b: None instead of 2.0"]
    assert "a: list of 1 instead of 2" in _differences({"a": [1.0], "tool": {"version": "1"}}, want)
    assert _differences({"a": [1.0, {"b": 2.0}]}, want) == ["(top): key 'tool' missing"]


if __name__ == "__main__":  # rewrite the pinned reports from the code as it stands
    sys.path.insert(0, str(ROOT))
    DATA.mkdir(exist_ok=True)
    for name, opts in CASES.items():
        report = _report(opts)
        report.pop("timings", None)
        (DATA / f"pinned_report_{name}.json").write_text(json.dumps(report, indent=1, sort_keys=True) + "\n",
                                                          encoding="utf-8")
        print("written", name)
