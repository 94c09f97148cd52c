"""Simulated two-source surveys with known truth, for the tests of second sources.

The staff answer support, engagement and a marker (each item 0.70 on its trait and 0.35 on
one shared method factor: the simulator of sample_surveys/simulate.py); their managers rate,
on a 5-point scale, engagement as they see it (a view correlated VIEW with the staff
member's engagement trait) and performance (PERFORMANCE on engagement). The managers' items
carry none of the staff's method. True standardized paths: engagement on support SUPPORT
(same source), engagement_seen on support VIEW x SUPPORT and performance on engagement
PERFORMANCE (cross-source).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from simulate import (
    ConstructSpec,
    SurveySpec,
    design_for,
    likert_thresholds,
    simulate_survey,
)

SUPPORT = 0.30
VIEW = 0.90
PERFORMANCE = 0.40
TRUTH = {("engagement", "support"): SUPPORT, ("engagement_seen", "support"): VIEW * SUPPORT,
         ("performance", "engagement"): PERFORMANCE}


def two_source_survey(n: int = 1500, seed: int = 11, *, unrated: float = 0.05
                      ) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    """(staff answers, manager ratings, design). ``unrated``: share of staff without a rating."""
    spec = SurveySpec(
        constructs=[ConstructSpec("support", 4, 0.70, 0.35),
                    ConstructSpec("engagement", 4, 0.70, 0.35),
                    ConstructSpec("weather", 3, 0.70, 0.35, role="marker", prefix="wth")],
        paths={"engagement": {"support": SUPPORT}}, n=n, seed=seed, scale_points=5)
    staff, _truth, latent = simulate_survey(spec, return_latent=True)
    rng = np.random.default_rng([seed, 2])
    eng = latent["engagement"].to_numpy()
    traits = {"seen": VIEW * eng + np.sqrt(1 - VIEW ** 2) * rng.standard_normal(n),
              "perf": PERFORMANCE * eng + np.sqrt(1 - PERFORMANCE ** 2) * rng.standard_normal(n)}
    tau = likert_thresholds(5)
    ratings = {"employee": staff["respondent"].to_numpy()}
    for prefix, k in (("seen", 3), ("perf", 4)):
        for i in range(1, k + 1):
            x = 0.72 * traits[prefix] + np.sqrt(1 - 0.72 ** 2) * rng.standard_normal(n)
            ratings[f"{prefix}{i}"] = np.searchsorted(tau, x, side="right") + 1
    managers = pd.DataFrame(ratings)
    managers = managers[rng.random(n) >= unrated].sample(frac=1.0, random_state=seed)
    design = design_for(spec)
    design["id_column"] = "respondent"
    design["constructs"]["engagement_seen"] = {"items": ["seen1", "seen2", "seen3"], "source": "manager",
                                               "same_as": "engagement"}
    design["constructs"]["performance"] = {"items": [f"perf{i}" for i in range(1, 5)], "source": "manager"}
    design["paths"] += [{"outcome": "engagement_seen", "predictors": ["support"]},
                        {"outcome": "performance", "predictors": ["engagement"]}]
    design["sources"] = {"manager": {"id_column": "employee", "response_scale": {"min": 1, "max": 5}}}
    return staff, managers, design
