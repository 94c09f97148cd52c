"""Generate the bundled sample survey: a fictional company's staff survey with known truth.

    python sample_surveys/generate.py [--out DIR]

Writes staff_survey.csv, staff_survey_design.json and staff_survey_truth.json to DIR
(default: this folder). Fixed seed: the same bytes on every run.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # runnable from a checkout without installing the package
    sys.path.insert(0, str(ROOT))

from measurement.design import check_columns, parse_design  # noqa: E402
from measurement.simulate import (  # noqa: E402
    ID_COLUMN,
    TEAM_COLUMN,
    ConstructSpec,
    SurveySpec,
    simulate_survey,
)

COMPANY = "Quernmoor Bakery Cooperative"
SEED = 7301
N = 2500
N_TEAMS = 120
MISSING_CODE = -99
MISSING_RATE = 0.015
N_BLANK_CELLS = 14
# Planted careless responders: every item answered with the same value.
STRAIGHT_LINE_VALUES = (7, 4, 1)
DIGITS = 6  # floats in the truth file

SCALE_LABELS = {
    1: "Strongly disagree",
    2: "Disagree",
    3: "Somewhat disagree",
    4: "Neither agree nor disagree",
    5: "Somewhat agree",
    6: "Agree",
    7: "Strongly agree",
}

# name, label, role, prefix, trait loadings, method loading, reverse positions, item wording.
# Substantive and marker items: trait loading ~0.70 and method loading 0.35 (method share
# 0.1225 of item variance). The impression scale measures the method factor itself.
SCALES: list[dict[str, Any]] = [
    {
        "name": "support", "label": "Manager support", "role": "substantive", "prefix": "sup",
        "loadings": [0.74, 0.70, 0.72, 0.66], "method_loading": 0.35, "reverse": [4],
        "wording": [
            "My shift manager makes time to talk through problems with me.",
            "When a bake goes wrong, my manager backs me up in front of others.",
            "My manager notices when I have done good work.",
            "My manager is hard to reach when I need a decision.",
        ],
    },
    {
        "name": "workload", "label": "Workload", "role": "substantive", "prefix": "wld",
        "loadings": [0.72, 0.70, 0.66, 0.70], "method_loading": 0.35, "reverse": [3],
        "wording": [
            "I have more orders to prepare than I can manage in a normal shift.",
            "I often skip breaks to keep up with my work.",
            "I can usually finish my tasks within my scheduled hours.",
            "I am regularly asked to cover extra shifts at short notice.",
        ],
    },
    {
        "name": "engagement", "label": "Work engagement", "role": "substantive", "prefix": "eng",
        "loadings": [0.74, 0.68, 0.66, 0.76, 0.66], "method_loading": 0.35, "reverse": [],
        "wording": [
            "I look forward to the start of my shift.",
            "I feel proud of what comes out of our ovens.",
            "When I am working, the hours pass quickly.",
            "I am keen to learn new parts of my job.",
            "I put in extra effort without being asked.",
        ],
    },
    {
        "name": "intent", "label": "Intent to stay", "role": "substantive", "prefix": "stay",
        "loadings": [0.76, 0.66, 0.70], "method_loading": 0.35, "reverse": [],
        "wording": [
            "I expect to still be working for Quernmoor two years from now.",
            "I would turn down a similar job elsewhere at the same pay.",
            "I rarely think about leaving the cooperative.",
        ],
    },
    {
        "name": "weather", "label": "Interest in weather (marker)", "role": "marker",
        "prefix": "wth", "loadings": [0.72, 0.70, 0.68], "method_loading": 0.35, "reverse": [],
        "wording": [
            "On my days off I like to follow how the weather changes through the day.",
            "I enjoy reading about how storms and fronts form.",
            "I keep a note of rainfall or temperatures out of curiosity.",
        ],
    },
    {
        "name": "impression", "label": "Impression management (method scale)", "role": "method",
        "prefix": "imp", "loadings": [0.70, 0.64, 0.60, 0.66], "method_loading": 0.0,
        "reverse": [],
        "wording": [
            "I have never been irritated with a colleague.",
            "I keep every promise I make, without exception.",
            "I have never taken a longer break than I was entitled to.",
            "I am always polite, even to people I dislike.",
        ],
    },
]

PATHS = {"engagement": {"support": 0.30, "workload": -0.20}, "intent": {"engagement": 0.45}}
EXOGENOUS_CORR = {("support", "workload"): -0.25}
TEAM_ICC = {"support": 0.10, "workload": 0.10}
TEAM_SIZE_DISPERSION = 0.55


def survey_spec() -> SurveySpec:
    constructs = [
        ConstructSpec(name=s["name"], n_items=len(s["wording"]), loading=s["loadings"],
                      method_loading=s["method_loading"], reverse=s["reverse"], role=s["role"],
                      prefix=s["prefix"])
        for s in SCALES
    ]
    return SurveySpec(constructs=constructs, paths=PATHS, exogenous_corr=EXOGENOUS_CORR, n=N,
                      scale_points=7, missing_rate=MISSING_RATE, missing_code=MISSING_CODE,
                      n_teams=N_TEAMS, team_icc=TEAM_ICC,
                      team_size_dispersion=TEAM_SIZE_DISPERSION, seed=SEED)


def item_wording() -> dict[str, str]:
    return {f"{s['prefix']}{i}": w for s in SCALES for i, w in enumerate(s["wording"], 1)}


def design() -> dict:
    cons: dict[str, Any] = {}
    for s in SCALES:
        items = [f"{s['prefix']}{i}" for i in range(1, len(s["wording"]) + 1)]
        entry: dict[str, Any] = {"items": items}
        if s["reverse"]:
            entry["reverse"] = [items[r - 1] for r in s["reverse"]]
        if s["role"] != "substantive":
            entry["role"] = s["role"]
        cons[s["name"]] = entry
    return {
        "constructs": cons,
        "paths": [{"outcome": y, "predictors": list(p)} for y, p in PATHS.items()],
        "response_scale": {"min": 1, "max": 7},
        "missing_codes": [MISSING_CODE],
        "id_column": ID_COLUMN,
        "group_column": TEAM_COLUMN,
    }


def _rounded(obj: Any) -> Any:
    if isinstance(obj, float):
        return round(obj, DIGITS) + 0.0  # + 0.0 turns -0.0 into 0.0
    if isinstance(obj, dict):
        return {k: _rounded(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_rounded(v) for v in obj]
    return obj


def build() -> tuple[pd.DataFrame, dict, dict]:
    """The survey data, its design and its truth."""
    spec = survey_spec()
    df, sim_truth = simulate_survey(spec)
    items = [c for c in df.columns if c not in (ID_COLUMN, TEAM_COLUMN)]
    # Separate stream for the planted problems, so the simulated answers do not depend on them.
    rng = np.random.default_rng([SEED, 1])

    rows = rng.choice(N, size=len(STRAIGHT_LINE_VALUES), replace=False)
    careless = []
    for r, v in zip(rows, STRAIGHT_LINE_VALUES, strict=True):
        df.loc[r, items] = v
        careless.append({"respondent": df.at[r, ID_COLUMN], "row": int(r) + 2, "value": v})

    values = df[items].to_numpy()
    eligible = np.argwhere(values != MISSING_CODE)
    eligible = eligible[~np.isin(eligible[:, 0], rows)]
    picks = eligible[rng.choice(len(eligible), size=N_BLANK_CELLS, replace=False)]
    picks = picks[np.lexsort((picks[:, 1], picks[:, 0]))]
    df[items] = df[items].astype("Int64")
    blanks = []
    for r, c in picks:
        df.loc[int(r), items[c]] = pd.NA
        blanks.append({"respondent": df.at[int(r), ID_COLUMN], "item": items[c], "row": int(r) + 2})

    n_cells = N * len(items)
    coded = int((df[items] == MISSING_CODE).sum().sum())
    sizes = sim_truth["sample"]["team_sizes"]
    small = sorted(t for t, s in sizes.items() if s < 5)
    if len(small) < 3:  # the demo must exercise small-group protection
        raise RuntimeError("expected some teams under 5 members; adjust the seed")

    population = {k: v for k, v in sim_truth.items() if k != "sample"}
    truth = {
        "scenario": {
            "company": COMPANY,
            "fictional": True,
            "description": "An invented cooperative of bakeries and bakery shops; staff, teams, "
                           "item wording and answers are all invented for demonstration.",
            "response_scale": {str(k): v for k, v in SCALE_LABELS.items()},
            "constructs": {s["name"]: {"label": s["label"], "role": s["role"]} for s in SCALES},
            "items": item_wording(),
        },
        "generator": {"script": "sample_surveys/generate.py", "seed": SEED,
                      "planted_problems_seed": [SEED, 1]},
        "population": population,
        "sample": {
            **sim_truth["sample"],
            "missing_coded_cells": coded,
            "missing_coded_share": coded / n_cells,
            "blank_cells": blanks,
            "careless_responders": careless,
            "teams_under_5": small,
            "notes": [
                "The answers of the careless responders were overwritten after simulation: "
                "every item, reverse-keyed ones included, holds one value.",
                "Missing cells: simulated MCAR cells coded -99 (missing_coded_cells counts what "
                "remains after the careless rows were overwritten), plus a few blank cells.",
                "Population values describe the model the answers were drawn from; estimates from "
                "these 2,500 rows scatter around them.",
            ],
        },
    }
    return df, design(), _rounded(truth)


def write(out: Path) -> list[Path]:
    df, des, truth = build()
    parsed = parse_design(des)
    check_columns(parsed, df.columns)
    out.mkdir(parents=True, exist_ok=True)
    paths = [out / "staff_survey.csv", out / "staff_survey_design.json",
             out / "staff_survey_truth.json"]
    df.to_csv(paths[0], index=False, lineterminator="\n")
    paths[1].write_text(json.dumps(des, indent=2) + "\n", encoding="utf-8")
    paths[2].write_text(json.dumps(truth, indent=2, allow_nan=False) + "\n", encoding="utf-8")
    return paths


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path(__file__).resolve().parent,
                    help="folder to write the three files to (default: this folder)")
    args = ap.parse_args(argv)
    for p in write(args.out):
        print(f"wrote {p}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
