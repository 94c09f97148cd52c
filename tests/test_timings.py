"""report["timings"]: seconds per stage and peak memory (measurement/timings.py)."""

from __future__ import annotations

import resource
import sys

from samesource.timings import StageClock, peak_memory_mb


class FakeClock:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t


def test_stages_are_timed_between_progress_calls_and_the_bootstrap_apart():
    fake = FakeClock()
    clock = StageClock(fake)
    seen = []
    step = clock.timed(lambda *a: seen.append(a))
    for stage, done, total, dt in [("load", 0, 3, 1.0), ("paths", 1, 3, 2.0),
                                   ("bootstrap", 0, 10, 0.5), ("bootstrap", 5, 10, 0.5),
                                   ("bootstrap", 10, 10, 3.0), ("teams", 2, 3, 0.25)]:
        step(stage, done, total)
        fake.t += dt
    out = clock.finish()
    # load 1 s; paths 2 s before the bootstrap and 3 s after it (sensitivity curves, say);
    # bootstrap from its first call to its last; teams until finish
    assert out["load"] == 1.0 and out["paths"] == 5.0 and out["bootstrap"] == 1.0
    assert out["teams"] == 0.25 and out["total"] == 7.25
    assert seen[0] == ("load", 0, 3) and len(seen) == 6  # the wrapped callback still hears all


def test_peak_memory_is_getrusage_maxrss():
    # Reference: the standard library's resource module (ru_maxrss in KiB on Linux)
    kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    got = peak_memory_mb()
    if sys.platform.startswith("linux"):
        assert abs(got - kib * 1024 / 1e6) <= 0.1 + 0.01 * got  # it may grow in between
    assert got > 1.0


def test_report_json_has_timings_for_every_stage(tmp_path):
    import json
    from pathlib import Path

    from samesource.pipeline import STAGES, analyze

    root = Path(__file__).resolve().parents[1] / "sample_surveys"
    report = analyze(str(root / "staff_survey.csv"),
                     json.loads((root / "staff_survey_design.json").read_text(encoding="utf-8"))).report
    t = report["timings"]
    assert set(t) == set(STAGES) | {"total", "peak_memory_mb"}
    assert all(t[s] >= 0 for s in STAGES) and t["peak_memory_mb"] > 0
    assert abs(sum(t[s] for s in STAGES) - t["total"]) < 1e-2
