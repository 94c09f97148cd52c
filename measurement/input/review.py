"""Whether a report needs review before use: report.json's ``review_needed`` and ``review_reasons``.

A report can be computed without error and still mislead, when the design does not match the
data: a scale whose alpha is negative, or items that load negatively on their own construct,
almost always mean reverse-worded items the design does not mark (or marks wrongly), or
codes for "no answer" read as answers. Each reason names the items and the design change
that would fix them, so the block at the top of every output can say what to do.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

from samesource.input.design import Design


@dataclass(frozen=True)
class ReviewReason:
    code: str  # negative_alpha | negative_loading | scale_from_data
    message: str
    items: list[str] = field(default_factory=list)
    fix: str = ""
    construct: str | None = None


def _flip(items: list[str], reversed_now: set[str], construct: str) -> str:
    add = [i for i in items if i not in reversed_now]
    drop = [i for i in items if i in reversed_now]
    parts = []
    if add:
        parts.append(f"add {', '.join(add)} to \"reverse\" of construct '{construct}'")
    if drop:
        parts.append(f"take {', '.join(drop)} out of \"reverse\" of construct '{construct}'")
    return (" and ".join(parts) + " if they are worded the other way; otherwise check that they "
            "belong to this construct, and that response_scale and missing_codes are right")


def _against(entry: dict) -> list[str]:
    """Items of a construct that run against it: a negative loading, or, where no loading is
    available, a negative item-rest correlation."""
    out = []
    for it, st in (entry.get("item_stats") or {}).items():
        lam = st.get("loading")
        r = st.get("item_rest_r")
        if (lam is not None and lam < 0) or (lam is None and r is not None and r < 0):
            out.append(it)
    return out


def review_reasons(constructs: dict[str, dict], design: Design, *, scale_source: str) -> list[ReviewReason]:
    """The reasons a report built on ``constructs`` (report["constructs"]) needs review."""
    reasons: list[ReviewReason] = []
    for name, entry in constructs.items():
        c = design.constructs.get(name)
        reversed_now = set(c.reverse) if c else set()
        against = _against(entry)
        alpha = entry.get("alpha")
        if alpha is not None and alpha < 0:
            items = against or list(entry.get("items", []))
            reasons.append(ReviewReason(
                code="negative_alpha", construct=name, items=items,
                message=(f"Construct '{name}' has a negative alpha ({alpha:.2f}): its items do not "
                         "measure one thing in one direction, so its scores and every estimate "
                         "built on it are not usable as they are"
                         + (f"; {', '.join(against)} run against the rest" if against else "") + "."),
                fix=_flip(against, reversed_now, name) if against else
                "check the construct's items, its \"reverse\" list, response_scale and missing_codes"))
        elif against:
            reasons.append(ReviewReason(
                code="negative_loading", construct=name, items=against,
                message=(f"In construct '{name}', {', '.join(against)} load negatively on the "
                         "construct: as the design keys them, they measure its opposite."),
                fix=_flip(against, reversed_now, name)))
    reverse = [i for c in design.constructs.values() for i in c.reverse]
    if scale_source == "data" and reverse:
        reasons.append(ReviewReason(
            code="scale_from_data", items=reverse,
            message=("The design gives no response_scale, so reverse-keyed items were recoded with "
                     "the lowest and highest answers seen; if no one chose an end of the scale, "
                     "they are recoded wrongly."),
            fix="add \"response_scale\": {\"min\": ..., \"max\": ...} to the design"))
    return reasons


def review_section(constructs: dict[str, dict], design: Design, *, scale_source: str) -> dict[str, Any]:
    """``{"review_needed": bool, "review_reasons": [{code, message, items, fix, construct}]}``."""
    reasons = review_reasons(constructs, design, scale_source=scale_source)
    return {"review_needed": bool(reasons), "review_reasons": [asdict(r) for r in reasons]}
