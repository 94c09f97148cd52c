"""Generate the bundled sample survey: a fictional company's staff survey with known truth.

    python sample_surveys/generate.py [--out DIR]

Writes staff_survey.csv, staff_survey_design.json and staff_survey_truth.json to DIR
(default: this folder), and the second source: the shift managers' ratings of their staff
(manager_ratings.csv), the design that joins it (staff_survey_two_sources_design.json) and
its truth (manager_ratings_truth.json). Fixed seeds: the same bytes on every run.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
if str(HERE) not in sys.path:  # the simulator beside this file, also when loaded by path
    sys.path.insert(0, str(HERE))

from samesource.input.design import check_columns, parse_design  # noqa: E402
from simulate import (  # noqa: E402
    ID_COLUMN,
    TEAM_COLUMN,
    ConstructSpec,
    SurveySpec,
    likert_thresholds,
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


# --- The second source: shift managers rate their staff ----------------------------------
# Every crew has one shift manager, who rated the crew's staff on a 5-point scale two months
# after the survey. Manager-rated engagement is the manager's view of the same engagement
# (correlation 0.9 with the staff member's own engagement trait); performance depends on
# engagement (standardized path 0.40). A manager's leniency (one value per manager, loading
# 0.25 on every rating) is the managers' own method: it never touches the staff's answers.
MANAGER_SEED = [SEED, 2]
MANAGER_ID = "employee"
MANAGER_MISSING_CODE = 0  # "not observed"
MANAGER_POINTS = 5
MANAGER_LABELS = {1: "Far below expectations", 2: "Below expectations", 3: "Meets expectations",
                  4: "Above expectations", 5: "Far above expectations"}
VIEW_CORR = 0.90          # manager-seen engagement with the staff member's engagement
PERFORMANCE_PATH = 0.40   # performance on engagement
LENIENCY_LOADING = 0.25
NOT_RATED_SHARE = 0.06    # staff whose manager returned no rating
RATED_NOT_SURVEYED = 40   # ratings of staff who did not answer the survey
NOT_OBSERVED_RATE = 0.01  # item cells coded 0
MANAGER_SCALES: list[dict[str, Any]] = [
    {
        "name": "performance", "label": "Job performance (manager-rated)", "prefix": "perf",
        "loadings": [0.76, 0.72, 0.70, 0.68], "reverse": [4],
        "wording": [
            "Keeps to the bake schedule without reminders.",
            "Turns out work of a quality customers remark on.",
            "Handles a rush at the counter calmly and accurately.",
            "Needs to be reminded of the hygiene routine.",
        ],
    },
    {
        "name": "engagement_seen", "label": "Work engagement as the manager sees it", "prefix": "seen",
        "loadings": [0.74, 0.70, 0.72], "reverse": [], "same_as": "engagement",
        "wording": [
            "Starts the shift with energy.",
            "Takes visible pride in what leaves the ovens.",
            "Offers to help without being asked.",
        ],
    },
]
MANAGER_PATHS = {"engagement_seen": {"support": VIEW_CORR * PATHS["engagement"]["support"],
                                     "workload": VIEW_CORR * PATHS["engagement"]["workload"]},
                 "performance": {"engagement": PERFORMANCE_PATH}}


def manager_ratings(df: pd.DataFrame, latent: pd.DataFrame) -> tuple[pd.DataFrame, dict]:
    """The managers' ratings file (rows in the order the managers sent them) and its truth."""
    rng = np.random.default_rng(MANAGER_SEED)
    n = len(df)
    eng = latent["engagement"].to_numpy()
    traits = {
        "engagement_seen": VIEW_CORR * eng + np.sqrt(1 - VIEW_CORR ** 2) * rng.standard_normal(n),
        "performance": PERFORMANCE_PATH * eng + np.sqrt(1 - PERFORMANCE_PATH ** 2) * rng.standard_normal(n),
    }
    teams = sorted(df[TEAM_COLUMN].unique())
    leniency = dict(zip(teams, rng.standard_normal(len(teams)), strict=True))
    lenient = df[TEAM_COLUMN].map(leniency).to_numpy()
    tau = likert_thresholds(MANAGER_POINTS)
    out: dict[str, Any] = {MANAGER_ID: df[ID_COLUMN].tolist(),
                           "manager": [f"M{t[1:]}" for t in df[TEAM_COLUMN]]}
    for sc in MANAGER_SCALES:
        for i, lam in enumerate(sc["loadings"], 1):
            err = np.sqrt(1 - lam ** 2 - LENIENCY_LOADING ** 2)
            x = lam * traits[sc["name"]] + LENIENCY_LOADING * lenient + err * rng.standard_normal(n)
            v = np.searchsorted(tau, x, side="right") + 1
            if i in sc["reverse"]:
                v = MANAGER_POINTS + 1 - v
            v[rng.random(n) < NOT_OBSERVED_RATE] = MANAGER_MISSING_CODE
            out[f"{sc['prefix']}{i}"] = v.astype(np.int64)
    ratings = pd.DataFrame(out)
    rated = rng.random(n) >= NOT_RATED_SHARE
    not_rated = ratings.loc[~rated, MANAGER_ID].tolist()
    ratings = ratings[rated]
    # staff who left before the survey or did not answer it, rated all the same
    extra = ratings.sample(RATED_NOT_SURVEYED, random_state=rng.integers(2**31)).copy()
    extra[MANAGER_ID] = [f"R{n + 1 + i:05d}" for i in range(RATED_NOT_SURVEYED)]
    ratings = pd.concat([ratings, extra]).sample(frac=1.0, random_state=rng.integers(2**31))
    truth = {
        "scenario": {
            "company": COMPANY, "fictional": True,
            "description": "Shift managers' ratings of their crews' staff, two months after the survey; "
                           "invented like the survey itself.",
            "response_scale": {str(k): v for k, v in MANAGER_LABELS.items()},
            "missing_code": {str(MANAGER_MISSING_CODE): "not observed"},
            "items": {f"{sc['prefix']}{i}": w for sc in MANAGER_SCALES
                      for i, w in enumerate(sc["wording"], 1)},
        },
        "generator": {"script": "sample_surveys/generate.py", "seed": MANAGER_SEED},
        "population": {
            "paths": MANAGER_PATHS,
            "engagement_seen_corr_with_engagement": VIEW_CORR,
            "loadings": {sc["name"]: sc["loadings"] for sc in MANAGER_SCALES},
            "leniency_loading": LENIENCY_LOADING,
            "leniency_share": LENIENCY_LOADING ** 2,
            "notes": ["Leniency is one value per manager (crew): the managers' method, shared by the "
                      "ratings of one manager and by nothing in the staff's answers.",
                      "engagement_seen measures the staff member's engagement through the manager's eyes; "
                      "its paths are 0.9 times those of engagement."],
        },
        "sample": {
            "rows": len(ratings),
            "staff_not_rated": len(not_rated),
            "ratings_of_staff_not_surveyed": RATED_NOT_SURVEYED,
            "not_observed_cells": int((ratings.drop(columns=[MANAGER_ID, "manager"])
                                       == MANAGER_MISSING_CODE).to_numpy().sum()),
        },
    }
    return ratings, truth


def two_source_design() -> dict:
    des = design()
    for sc in MANAGER_SCALES:
        items = [f"{sc['prefix']}{i}" for i in range(1, len(sc["wording"]) + 1)]
        entry: dict[str, Any] = {"items": items, "source": "manager"}
        if sc["reverse"]:
            entry["reverse"] = [items[r - 1] for r in sc["reverse"]]
        if sc.get("same_as"):
            entry["same_as"] = sc["same_as"]
        des["constructs"][sc["name"]] = entry
    des["paths"] += [{"outcome": y, "predictors": list(p)} for y, p in MANAGER_PATHS.items()]
    des["sources"] = {"manager": {"id_column": MANAGER_ID, "kind": "other_rater",
                                  "response_scale": {"min": 1, "max": MANAGER_POINTS},
                                  "missing_codes": [MANAGER_MISSING_CODE]}}
    return des


def build() -> tuple[pd.DataFrame, dict, dict]:
    """The survey data, its design and its truth."""
    df, des, truth, _ = build_with_latent()
    return df, des, truth


def build_with_latent() -> tuple[pd.DataFrame, dict, dict, pd.DataFrame]:
    spec = survey_spec()
    df, sim_truth, latent = simulate_survey(spec, return_latent=True)
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
    return df, design(), _rounded(truth), latent


def write(out: Path) -> list[Path]:
    df, des, truth, latent = build_with_latent()
    parsed = parse_design(des)
    check_columns(parsed, df.columns)
    ratings, manager_truth = manager_ratings(df, latent)
    two = two_source_design()
    parse_design(two)
    out.mkdir(parents=True, exist_ok=True)
    paths = [out / "staff_survey.csv", out / "staff_survey_design.json",
             out / "staff_survey_truth.json", out / "manager_ratings.csv",
             out / "staff_survey_two_sources_design.json", out / "manager_ratings_truth.json"]
    df.to_csv(paths[0], index=False, lineterminator="\n")
    paths[1].write_text(json.dumps(des, indent=2) + "\n", encoding="utf-8")
    paths[2].write_text(json.dumps(truth, indent=2, allow_nan=False) + "\n", encoding="utf-8")
    ratings.to_csv(paths[3], index=False, lineterminator="\n")
    paths[4].write_text(json.dumps(two, indent=2) + "\n", encoding="utf-8")
    paths[5].write_text(json.dumps(_rounded(manager_truth), indent=2, allow_nan=False) + "\n",
                        encoding="utf-8")
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
