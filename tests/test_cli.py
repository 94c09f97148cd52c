"""The command line as an analyst uses it: exit codes, messages, files written."""

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_surveys" / "staff_survey.csv"
DESIGN = ROOT / "sample_surveys" / "staff_survey_design.json"


def run(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "samesource.service.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd or ROOT, timeout=600)


def small_design(tmp_path: Path, **extra) -> Path:
    d = {"constructs": {"sup": {"items": ["sup1", "sup2", "sup3"]},
                        "eng": {"items": ["eng1", "eng2", "eng3"]}},
         "paths": [{"outcome": "eng", "predictors": ["sup"]}],
         "response_scale": {"min": 1, "max": 5}}
    d.update(extra)
    p = tmp_path / "design.json"
    p.write_text(json.dumps(d), encoding="utf-8")
    return p


def small_csv(tmp_path: Path, rows: list[str] | None = None, name: str = "survey.csv") -> Path:
    import numpy as np

    rng = np.random.default_rng(1)
    lines = ["respondent,sup1,sup2,sup3,eng1,eng2,eng3"]
    for i in range(120):
        f = rng.normal()
        vals = np.clip(np.round(3 + f + rng.normal(size=6) * 0.8), 1, 5).astype(int)
        lines.append(f"R{i},{','.join(map(str, vals))}")
    if rows:
        lines[1:1 + len(rows)] = rows
    p = tmp_path / name
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return p


def write(folder: Path, name: str, content: str | bytes) -> Path:
    p = folder / name
    if isinstance(content, bytes):
        p.write_bytes(content)
    else:
        p.write_text(content, encoding="utf-8")
    return p


def assert_one_clean_error(res: subprocess.CompletedProcess, *words: str) -> None:
    assert res.returncode == 2, res.stderr
    assert "Traceback" not in res.stderr
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, res.stderr
    for w in words:
        assert w in lines[0], lines[0]


def test_analyze_small_file_writes_report(tmp_path):
    out = tmp_path / "out"
    res = run("analyze", small_csv(tmp_path), "--design", small_design(tmp_path), "--out", out)
    assert res.returncode == 0, res.stderr
    report = json.loads((out / "report.json").read_text(encoding="utf-8"))
    assert report["schema"] == "samesource.report/1"
    assert report["data"]["rows"] == 120
    assert set(report["constructs"]) == {"sup", "eng"}
    assert "Report:" in res.stdout
    html = (out / "report.html").read_text(encoding="utf-8")
    # (the chart downloads are base64 data: links, whose letters may spell anything)
    assert "<html" in html and "NaN" not in re.sub(r'href="data:[^"]*"', "", html)
    # the one-page brief beside it: dated, with the data's fingerprint
    brief = (out / "brief.html").read_text(encoding="utf-8")
    assert "<html" in brief and report["data"]["sha256"] in brief and "produced 20" in brief
    assert (out / "tables" / "paths.csv").exists() and (out / "tables.xlsx").stat().st_size > 0


def test_bootstrap_option_reaches_the_report(tmp_path):
    out = tmp_path / "out"
    res = run("analyze", small_csv(tmp_path), "--design", small_design(tmp_path), "--out", out,
              "--bootstrap", "20", "--seed", "3", "--quiet")
    assert res.returncode == 0, res.stderr
    report = json.loads((out / "report.json").read_text(encoding="utf-8"))
    assert report["options"]["bootstrap"] == 20 and report["options"]["seed"] == 3
    latent = report["paths"][0]["estimates"]["latent"]
    assert latent["bootstrap"]["n_boot"] == 20 and latent["ci_method"] in ("bca", "percentile")


def test_confidence_option_sets_every_wald_interval(tmp_path):
    from scipy.stats import norm

    out = tmp_path / "out"
    res = run("analyze", small_csv(tmp_path), "--design", small_design(tmp_path), "--out", out,
              "--confidence", "0.9", "--bootstrap", "0", "--quiet")
    assert res.returncode == 0, res.stderr
    report = json.loads((out / "report.json").read_text(encoding="utf-8"))
    assert report["options"]["confidence"] == 0.9
    wald = [e for e in report["paths"][0]["estimates"].values()
            if e is not None and e.get("se") and e.get("ci_method") == "wald"]
    assert len(wald) >= 4
    for e in wald:
        # a 90% Wald interval is estimate +/- z(.95) SE (z from scipy.stats.norm)
        assert (e["ci"][1] - e["ci"][0]) / (2 * e["se"]) == pytest.approx(norm.ppf(0.95), rel=1e-6)


def test_bad_option_exits_2(tmp_path):
    res = run("analyze", small_csv(tmp_path), "--design", small_design(tmp_path), "--bootstrap", "-4")
    assert_one_clean_error(res, "options.bootstrap")
    res = run("analyze", small_csv(tmp_path), "--design", small_design(tmp_path), "--confidence", "95")
    assert_one_clean_error(res, "options.confidence")


@pytest.mark.parametrize("make, words", [
    (lambda t: write(t, "empty.csv", b""), ["empty.csv", "empty"]),
    (lambda t: write(t, "head.csv", "sup1,sup2,sup3,eng1,eng2,eng3\n"), ["head.csv", "no data rows"]),
    (lambda t: write(t, "pic.csv", b"\x89PNG\r\n\x1a\n" + b"\0" * 64), ["pic.csv", "PNG"]),
    (lambda t: small_csv(t, ["R0,1,2,3,4,5,5,9"]), ["survey.csv", "row 2"]),
    (lambda t: small_csv(t, ["R0,1,two,3,4,5,5"]), ["survey.csv", "row 2", "sup2", "two"]),
    (lambda t: small_csv(t, ["R0,1,2,3,4,5,8"]), ["survey.csv", "row 2", "eng3", "8"]),
    (lambda t: write(t, "dup.csv", "sup1,sup1,sup3,eng1,eng2,eng3\n1,2,3,4,5,5\n"), ["dup.csv", "sup1", "twice"]),
])
def test_bad_files_exit_2_with_one_message(tmp_path, make, words):
    assert_one_clean_error(run("analyze", make(tmp_path), "--design", small_design(tmp_path)), *words)


def test_constant_item_is_named(tmp_path):
    p = small_csv(tmp_path)
    lines = p.read_text().splitlines()
    lines = [lines[0]] + [",".join(ln.split(",")[:3] + ["3"] + ln.split(",")[4:]) for ln in lines[1:]]
    p.write_text("\n".join(lines) + "\n")
    assert_one_clean_error(run("analyze", p, "--design", small_design(tmp_path)), "sup3")


@pytest.mark.parametrize("design, words", [
    ({"constructs": {"sup": {"items": ["sup1"]}, "eng": {"items": ["eng1", "eng2"]}}}, ["constructs.sup.items", "at least 2"]),
    ({"constructs": {"sup": {"items": ["sup1", "sup2", "supX"]}, "eng": {"items": ["eng1", "eng2"]}}},
     ["constructs.sup.items[2]", "supX"]),
    ({"constructs": {"sup": {"items": ["sup1", "sup2"]}, "eng": {"items": ["eng1", "eng2"]}},
      "paths": [{"outcome": "eng", "predictors": ["pay"]}]}, ["paths[0].predictors[0]", "pay"]),
    ({"constructs": {"sup": {"items": ["sup1", "sup2"], "role": "boss"}}}, ["constructs.sup.role", "boss"]),
])
def test_bad_designs_exit_2_naming_the_field(tmp_path, design, words):
    p = tmp_path / "d.json"
    p.write_text(json.dumps(design))
    assert_one_clean_error(run("analyze", small_csv(tmp_path), "--design", p), *words)


def test_design_file_not_json(tmp_path):
    p = tmp_path / "d.json"
    p.write_text("{constructs: }")
    assert_one_clean_error(run("analyze", small_csv(tmp_path), "--design", p), "d.json", "not valid JSON")


def test_missing_data_file(tmp_path):
    assert_one_clean_error(run("analyze", tmp_path / "none.csv", "--design", small_design(tmp_path)), "none.csv")


def test_draft_design_prints_a_valid_design(tmp_path):
    res = run("draft-design", SAMPLE)
    assert res.returncode == 0, res.stderr
    draft = json.loads(res.stdout)
    from samesource.input.design import parse_design

    d = parse_design(draft)
    assert {"sup", "eng"} <= set(d.constructs)
    assert draft["id_column"] == "respondent" and draft["group_column"] == "team"


def test_progress_line_on_a_terminal_only(tmp_path):
    # On a terminal stderr shows one line rewritten in place as the stages pass, then cleared;
    # piped (as every other test here runs) it gets plain lines instead.
    import os
    import pty

    args = ["analyze", small_csv(tmp_path), "--design", small_design(tmp_path),
            "--out", tmp_path / "out", "--bootstrap", "20"]
    import threading

    leader, follower = pty.openpty()
    chunks: list[bytes] = []

    def drain() -> None:  # read as it comes, so a full terminal buffer never blocks the run
        while True:
            try:
                block = os.read(leader, 65536)
            except OSError:  # the terminal's other end is closed: all read
                return
            if not block:
                return
            chunks.append(block)

    reader = threading.Thread(target=drain, daemon=True)
    reader.start()
    try:
        proc = subprocess.run([sys.executable, "-m", "samesource.service.cli", *map(str, args)],
                              stdout=subprocess.PIPE, stderr=follower, cwd=ROOT, timeout=600)
    finally:
        os.close(follower)
        reader.join(timeout=10)
        os.close(leader)
    assert proc.returncode == 0
    shown = b"".join(chunks).decode()
    assert "\r  load (step 1 of 8)" in shown and "\r  bootstrap " in shown
    assert shown.endswith("\r")  # the line is cleared before the summary

    # piped: plain lines, one per stage after the data are read (issue 12; stderr was empty
    # here before), and none with --quiet
    piped = run(*args)
    lines = piped.stderr.splitlines()
    assert piped.returncode == 0 and "\r" not in piped.stderr
    assert lines[0] == "samesource: screen (stage 2 of 8)"
    assert all(ln.startswith("samesource: ") for ln in lines)
    assert run(*args, "--quiet").stderr == ""


def test_help_lists_every_format_of_the_registry():
    from samesource.input.loading import READERS

    res = run("analyze", "--help")
    assert res.returncode == 0, res.stderr
    text = " ".join(res.stdout.split())  # argparse wraps the help at hyphens and spaces
    for f in READERS:
        assert f.suffixes[0] in text, (f.name, text)


def test_the_shell_tells_numpy_not_to_ask_for_huge_pages_unless_chosen():
    # service/__init__.py: set before numpy loads, in a fresh interpreter as the command line
    # starts; an explicit choice in the environment stands
    import os
    import subprocess
    import sys

    code = ("import samesource.service.cli; from numpy._core import multiarray as m; "
            "print(m._get_madvise_hugepage())")
    env = {k: v for k, v in os.environ.items() if k != "NUMPY_MADVISE_HUGEPAGE"}
    off = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    chosen = subprocess.run([sys.executable, "-c", code], env={**env, "NUMPY_MADVISE_HUGEPAGE": "1"},
                            capture_output=True, text=True, check=True)
    assert off.stdout.strip() == "False" and chosen.stdout.strip() == "True"
