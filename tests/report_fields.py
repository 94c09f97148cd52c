"""Report dicts carrying the fields the assumption checks and the input review add to report.json
(assumptions, paths[].trust / bounds / bounds_wide / cannot_pin_down / sensitivity.marks,
measurement_model.htmt2 and htmt_variant, review_needed and review_reasons, the verdict level
"undetermined"), laid over a real report so the HTML can be tested before and after every
analysis produces them. The values are shaped as the fields are specified; the numbers are
taken from the report they are laid over wherever one exists.
"""

from __future__ import annotations

import copy

ASSUMPTION_IDS = ("marker_carries_method", "method_loadings", "method_orthogonal", "items_continuous",
                  "estimate_stable", "checks_agree")
STATUSES = ("untestable", "doubtful", "fails", "holds", "doubtful", "holds")


def with_new_fields(report: dict, *, wide: bool = True, review: bool = True) -> dict:
    r = copy.deepcopy(report)
    r["assumptions"] = [
        {"id": i, "status": st, "evidence": [f"evidence one for {i}", f"evidence two for {i}"],
         "affects": ["marker_adjusted", "method_factor_adjusted"],
         "message": f"Plain sentence about {i.replace('_', ' ')}, as long as a real one: the check found what it found "
                    "and says what follows for the estimates.", "rule": f"The rule for {i}.",
         "source": f"Source for {i} (2001)"} for i, st in zip(ASSUMPTION_IDS, STATUSES, strict=True)]
    levels = ("high", "medium", "low")
    for k, p in enumerate(r.get("paths") or []):
        pref = p["estimates"][p["preferred"]]
        lo, hi = pref["ci"] if pref.get("ci") else (pref["estimate"], pref["estimate"])
        p["trust"] = {"level": levels[k % 3], "reasons": [f"Reason {k} for the trust level."]}
        p["bounds"] = {"low": lo - 0.2, "high": hi + 0.1, "basis": "published range of method shares",
                       "plausible_share": [0.0, 0.3], "share_source": "published"}
        p["bounds_wide"] = wide and k == 0
        p["cannot_pin_down"] = ("the marker could not be vouched for and no method scale was measured; a second "
                                "source or a measured method scale would pin it down") if p["bounds_wide"] else ""
        s = p.get("sensitivity") or {}
        s["marks"] = {"estimated_share": s.get("estimated_method_share"), "estimated_share_ci": [0.08, 0.16],
                      "published_range": [0.0, 0.3]}
        p["sensitivity"] = s
    mm = r.get("measurement_model") or {}
    if mm.get("htmt"):
        mm["htmt2"] = {k: v * 0.98 for k, v in mm["htmt"].items()}
        mm["htmt_variant"] = "absolute correlations throughout (published formula)"
    if review:
        r["review_needed"] = True
        r["review_reasons"] = [{"code": "negative_alpha", "message": "The scale workload has a negative alpha.",
                                "items": ["wld2", "wld4"],
                                "fix": 'mark wld2 and wld4 as "reverse" in the design of workload'}]
    return r
