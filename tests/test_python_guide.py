"""docs/python.md runs as written: its ```python blocks in order in one namespace (as a
notebook runs its cells), its ```python script block as a script of its own, without a
``__main__`` guard, with a bootstrap on the local pool of worker processes.

Outside reference: the report the guide's analysis gives must be the pinned one
(tests/data/pinned_report_listwise.json, compared as tests/test_report_pinned.py compares it).
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest
from test_python_api import SOURCE_FIELDS
from test_report_pinned import DATA, _differences

ROOT = Path(__file__).resolve().parents[1]
GUIDE = ROOT / "docs" / "python.md"
FENCE = re.compile(r"^```(python(?: script)?)\n(.*?)^```", re.S | re.M)
MAX_REPLICATES = 50  # the suite's budget for the guide's bootstrap


def blocks(kind: str) -> list[str]:
    return [code for k, code in FENCE.findall(GUIDE.read_text(encoding="utf-8")) if k == kind]


@pytest.fixture()
def in_a_fresh_folder(tmp_path, monkeypatch):
    (tmp_path / "sample_surveys").symlink_to(ROOT / "sample_surveys")
    monkeypatch.chdir(tmp_path)
    return tmp_path


def test_the_cells_run_in_order_and_give_the_pinned_report(in_a_fresh_folder):
    cells = blocks("python")
    assert len(cells) > 10
    namespace: dict = {"__name__": "guide"}
    for i, code in enumerate(cells):
        try:
            exec(compile(code, f"{GUIDE.name}, cell {i + 1}", "exec"), namespace)
        except Exception as exc:  # name the cell that failed
            raise AssertionError(f"cell {i + 1} of docs/python.md failed:\n{code}") from exc
    report = namespace["report"]
    want = json.loads((DATA / "pinned_report_listwise.json").read_text(encoding="utf-8"))
    got = report.to_dict()
    # what differs between the file and the frame read from it: the source's description,
    # and rows named by the frame's index (file row r, with its header on row 1, is index r - 2)
    for side in (got, want):
        for k in SOURCE_FIELDS:
            side["data"].pop(k)
    for f in want["screening"]["flagged_rows"]:
        f["row"] -= 2
    diffs = _differences(got, want)
    assert diffs == [], "\n".join(diffs)
    assert repr(report) in GUIDE.read_text(encoding="utf-8")  # the output shown is today's
    assert (in_a_fresh_folder / "quernmoor-report" / "report.html").is_file()


def test_the_plain_script_bootstraps_without_a_main_guard(in_a_fresh_folder):
    (script,) = blocks("python script")
    assert "__main__" not in script
    n = [int(v) for v in re.findall(r"bootstrap=(\d+)", script)]
    assert n and max(n) <= MAX_REPLICATES
    path = in_a_fresh_folder / "plain_script.py"
    path.write_text(script, encoding="utf-8")
    done = subprocess.run([sys.executable, str(path)], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    lines = done.stdout.strip().splitlines()
    assert len(lines) == 3 and all(f"from {max(n)} replicates" in ln for ln in lines), done.stdout
