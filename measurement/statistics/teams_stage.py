"""report["teams"]: agreement, small-group protection, within/between and split-team paths."""

from __future__ import annotations

import numpy as np
import pandas as pd

from samesource.input.design import Design
from samesource.input.missing import MissingPlan
from samesource.input.prepare import PreparedData
from samesource.options import AnalysisOptions
from samesource.results import Notice, SectionResult, freeze
from samesource.statistics.scores import score_array
from samesource.statistics.teams import (
    group_item_variances,
    group_means,
    group_table_of,
    icc_oneway,
    rwg_from_variance,
    same_source_team_estimate,
    split_team_estimate,
    within_between,
)

MEANING = {
    "icc1": "share of a construct's variance that lies between teams (Bliese 2000): above about .05 team "
            "membership matters (common practice)",
    "icc2": "reliability of the team means: below about .70 team means are too noisy to compare teams "
            "(common practice)",
    "rwg_j": "within-team agreement against random answering (James, Demaree & Wolf 1984): a median above "
             ".70 is the common-practice bar for treating a team mean as a shared view",
}


def teams_section(design: Design, prepared: PreparedData, plan: MissingPlan,
                  opts: AnalysisOptions) -> SectionResult:
    """report["teams"] (None without a group column) and its notices."""
    if not design.group_column or prepared.groups is None:
        return SectionResult(None)
    said: list[Notice] = []
    # each analysis row's group as an integer code (-1 for none), looked up once by row label;
    # codes follow the sorted group names, the order np.unique gives the names themselves
    cat = pd.Categorical(prepared.groups.to_numpy(dtype=object))
    at = prepared.groups.index.get_indexer(plan.rows.labels)
    all_codes = np.where(at >= 0, cat.codes[np.maximum(at, 0)], -1).astype(np.intp)
    keep = all_codes >= 0
    codes = all_codes[keep]
    labels = np.asarray(cat.categories, dtype=object)
    names = [c.name for c in design.substantive]

    def scores_of(constructs: list[str]) -> np.ndarray:
        # a few constructs' scores at a time (a pass over their items each), not every
        # construct's at once: 80 MB a construct at 10,000,000 rows
        s = score_array(plan.rows, design, constructs)
        return s if keep.all() else s[keep]

    sizes = np.bincount(codes, minlength=len(labels))
    min_size = opts.min_group_size
    n_options = int(round(prepared.scale_max - prepared.scale_min)) + 1
    # a second source's constructs have that source's answer range (measurement/input/sources.py)
    source_options = {link.name: int(round(link.response_scale["max"] - link.response_scale["min"])) + 1
                      for link in prepared.links}

    constructs = {}
    means = np.empty((len(labels), len(names)))
    for j, c in enumerate(design.substantive):
        score = scores_of([c.name])[:, 0]
        means[:, j] = group_means(score, codes, len(labels))
        icc = icc_oneway(score, codes)
        del score
        options = source_options.get(c.source, n_options)
        complete, s2 = group_item_variances(plan.rows, list(c.items), all_codes, len(labels))
        rwgs = [rwg_from_variance(float(s2[t]), len(c.items), options)
                for t in range(len(labels)) if sizes[t] >= 2 and complete[t] >= 2]
        constructs[c.name] = {"icc1": icc.icc1, "icc2": icc.icc2,
                              "rwg_j_median": float(np.median(rwgs)) if rwgs else None,
                              "rwg_j_groups": len(rwgs)}

    paths = []

    for p in design.paths:
        sub = scores_of([p.outcome, *p.predictors])
        ok = ~np.isnan(sub).any(axis=1)
        if not ok.all():
            sub = sub[ok]
        gg = codes if ok.all() else codes[ok]
        y, X = sub[:, 0], sub[:, 1:]
        with np.errstate(all="ignore"):
            wb = within_between(y, X, gg)
        if wb is None:
            said.append(Notice("too_few_teams",
                               f"Too few teams with two or more respondents to estimate the "
                               f"within- and between-team paths of {p.outcome}."))
            continue
        split = split_team_estimate(sub, gg, seed=opts.seed, confidence=opts.confidence)
        same = same_source_team_estimate(sub, gg)
        for j, x in enumerate(p.predictors):
            paths.append({
                "outcome": p.outcome, "predictor": x,
                "within": {"estimate": float(wb["within"]["std"][j]), "b": float(wb["within"]["b"][j]),
                           "se_b": float(wb["within"]["se"][j])},
                "between": {"estimate": float(wb["between"]["std"][j]), "b": float(wb["between"]["b"][j]),
                            "se_b": float(wb["between"]["se"][j]), "teams": wb["between"]["teams"]},
                "within_between_test": {"difference_b": float(wb["difference"]["b"][j]),
                                        "se": float(wb["difference"]["se"][j]),
                                        "wald": wb["difference"]["wald"], "df": wb["difference"]["df"],
                                        "p": wb["difference"]["p"],
                                        "differ": bool(wb["difference"]["p"] < 0.05)},
                "same_source_team": {"estimate": same[j] if same else None},
                "split_source": {"estimate": split["estimate"][j] if split["estimate"] else None,
                                 "ci": split["ci"][j] if split.get("ci") else None,
                                 "splits": split["splits"], "teams_used": split["teams_used"],
                                 "min_team_size": split["min_team_size"],
                                 "note": split.get("note")},
            })
        if wb["difference"]["p"] < 0.05:
            said.append(Notice("within_between_differ",
                               f"For {p.outcome}, the within-team and between-team paths differ "
                               f"(p = {wb['difference']['p']:.3f}): the predictors correlate with team "
                               "effects, so a single pooled (random-effects) estimate would be biased; "
                               "read the within-team path for individual-level questions."))

    table, withheld = group_table_of(means, sizes, names, labels, min_size)
    if withheld:
        said.append(Notice("small_groups_withheld",
                           f"{withheld} group(s) with fewer than {min_size} respondents are left out "
                           "of every group-level table; their members still count in pooled results."))
    return SectionResult(freeze({
        "group_column": design.group_column,
        "groups": int((sizes > 0).sum()),
        "groups_reported": int((sizes >= min_size).sum()),
        "groups_withheld": withheld,
        "min_group_size": min_size,
        "respondents_without_group": int((~keep).sum()),
        "constructs": constructs,
        "paths": paths,
        "group_scores": table,
        "meaning": MEANING,
        "notes": [
            "Within and between: group-mean centring; the test of their difference regresses on the "
            "predictors and their team means with cluster-robust standard errors (Mundlak 1978).",
            "Split-team estimate: each construct's team mean comes from a different random part of the "
            "team, so no respondent rates both sides and individual-level common-method variance cannot "
            "produce the association; team-level method variance (a shared team response style) could. "
            "Corrected for the unreliability of part-team means by Spearman-Brown from ICC(1); the "
            "interval is a team bootstrap.",
        ],
    }), tuple(said))


