"""Synthetic workloads for the benchmarks: a survey of N respondents and K items with known
truth (sample_surveys/simulate.py), 5 items per construct, one marker and one measured method scale."""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "sample_surveys"))  # the simulator

from simulate import ConstructSpec, SurveySpec, design_for, simulate_survey  # noqa: E402


def survey(n: int, n_items: int, seed: int = 0):
    per = 5
    n_cons = n_items // per
    cons = [ConstructSpec(f"c{i}", per, 0.7, 0.35, prefix=f"c{i}_") for i in range(n_cons - 2)]
    cons.append(ConstructSpec("mark", per, 0.7, 0.35, role="marker", prefix="mk"))
    cons.append(ConstructSpec("meth", per, 0.65, role="method", prefix="mt"))
    paths = {"c1": {"c0": 0.3}}
    if n_cons - 2 >= 3:
        paths["c2"] = {"c1": 0.4}
    spec = SurveySpec(constructs=cons, paths=paths, n=n, scale_points=5, seed=seed)
    df, truth = simulate_survey(spec)
    return df, design_for(spec), truth
