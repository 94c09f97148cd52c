"""The decision in plain words: one sentence per key path, for the reader who acts on it.

Shared by the report (:mod:`samesource.output.report_html`) and the one-page brief
(:mod:`samesource.output.brief`). Reads report.json values only; every number it prints is a
report value rounded for reading (two decimals), never a new estimate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from samesource.output.report import KeyPath

MINUS = "\u2212"

# Words for the size of a standardized association: Cohen's (1988) conventions for r (.10
# small, .30 medium, .50 large), common practice, from memory.
SIZE_WORDS = ((0.10, "hardly matters"), (0.30, "matters a little"), (0.50, "clearly matters"),
              (math.inf, "matters strongly"))

TRUST_LABELS = {"high": "high", "medium": "medium", "low": "low"}
TRUST_NOTCHES = {"high": 3, "medium": 2, "low": 1}

STATUS_LABELS = {"holds": "holds", "doubtful": "doubtful", "fails": "fails", "untestable": "cannot be tested"}
STATUS_SYMBOLS = {"holds": "\u2713", "doubtful": "?", "fails": "\u2717", "untestable": "\u2013"}

# A standardized coefficient lies between -1 and 1; an interval wider than half of that range
# cannot tell a clear positive from a clear negative effect (our rule, stated on the page).
IMPRECISE_WIDTH = 1.0

DIRECTION_NOTE = ("A shared answering style pushes every correlation between answers of the same people "
                  "towards the positive, so it makes a negative link look weaker than it is.")


def finite(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def num(v: Any, d: int = 3) -> str:
    """A number with ``d`` decimals and a true minus sign; a dash when there is none (no "-0.000").

    The one number format of report.html and brief.html."""
    if not finite(v):
        return "\u2014"
    s = f"{v:.{d}f}"
    if float(s) == 0:
        s = s.lstrip("-")
    return s.replace("-", MINUS)


def ci_pair(ci: Any) -> tuple[float, float] | None:
    if isinstance(ci, list | tuple) and len(ci) == 2 and all(finite(x) for x in ci):
        return float(ci[0]), float(ci[1])
    return None


def too_imprecise(ci: Any) -> bool:
    """An interval wider than half the coefficient's range (-1 to 1) is too imprecise to read."""
    c = ci_pair(ci)
    return c is not None and c[1] - c[0] > IMPRECISE_WIDTH


@dataclass(frozen=True)
class Trust:
    level: str | None  # high | medium | low, None when the report does not rate it
    label: str
    notches: int
    reasons: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class Decision:
    title: str
    sentence: str
    direction_note: str | None
    trust: Trust
    estimate_text: str  # "0.293 [0.233, 0.354]"
    estimate_label: str
    bounds_text: str | None
    cannot_pin_down: str | None
    preferred: str | None


def trust_of(p: KeyPath) -> Trust:
    t = p.trust
    level = t.level if t is not None and t.level in TRUST_LABELS else None
    reasons = [str(r) for r in (t.reasons if t is not None else ()) if r]
    if level is None:
        return Trust(None, "not rated", 0, reasons)
    return Trust(level, TRUST_LABELS[level], TRUST_NOTCHES[level], reasons)


def _size_word(v: float) -> str:
    return next(w for top, w in SIZE_WORDS if abs(v) < top)


def _cap(s: str) -> str:
    return s[:1].upper() + s[1:]


def sentence(p: KeyPath) -> tuple[str, str | None]:
    """The one sentence for a path, and the note on the direction of method bias when it applies."""
    x, y = str(p.predictor or "the predictor"), str(p.outcome or "the outcome")
    key = p.preferred
    pref = p.preferred_estimate
    # .get: a path without an observed estimate (an edited or older report) reads as None
    obs = p.estimates.get("observed")
    pr, o = (pref.estimate if pref else None), (obs.estimate if obs else None)
    if not finite(pr):
        return f"No estimate could be computed for {x} and {y}, so this survey gives no answer here.", None
    corrected = key not in ("observed", "latent", "disattenuated", "disattenuated_omega", "errors_in_variables")
    removed = ("once the shared answering style and measurement error are removed" if corrected else
               "once measurement error is removed (a shared answering style could not be removed and may remain)"
               if key != "observed" else "taken at face value")
    if p.sources is not None and p.sources.free_of_same_rater_bias:  # measurement/corrections/source_paths.py
        removed = ("with measurement error removed and no shared rater behind it (predictor and outcome "
                   "come from different sources)" if key != "observed" else
                   "taken at face value, with no shared rater behind it (different sources)")
    ci = ci_pair(pref.ci if pref else None)
    if ci is not None and ci[0] <= 0 <= ci[1]:
        head = f"{_cap(x)} may not matter for {y}: about {num(pr, 2)} on a {MINUS}1 to 1 scale {removed}, and no link at all is also consistent with the data"
    else:
        way = "" if pr > 0 else f" (more {x} goes with less {y})"
        head = f"{_cap(x)} {_size_word(pr)} for {y}{way}: about {num(pr, 2)} on a {MINUS}1 to 1 scale {removed}"
    tail = ""
    if finite(o) and key != "observed":
        if pr * o < 0 and abs(o) >= 0.005:
            tail = f"; the raw survey number, {num(o, 2)}, points the other way"
        elif round(abs(pr), 2) < round(abs(o), 2):
            tail = f"; the raw survey number, {num(o, 2)}, overstates it"
        elif round(abs(pr), 2) > round(abs(o), 2):
            tail = f"; the raw survey number, {num(o, 2)}, understates it"
        else:
            tail = f"; the raw survey number, {num(o, 2)}, is about the same"
    note = DIRECTION_NOTE if corrected and pr < 0 else None
    return head + tail + ".", note


def decision(p: KeyPath, *, labels: dict[str, str] | None = None) -> Decision:
    labels = labels or {}
    key = p.preferred
    pref = p.preferred_estimate
    s, note = sentence(p)
    e = pref.estimate if pref else None
    ci = ci_pair(pref.ci if pref else None)
    text = num(e) + (f" [{num(ci[0])}, {num(ci[1])}]" if ci else "") if finite(e) else "\u2014"
    b = p.bounds
    bounds_text = None
    if b is not None and finite(b.low) and finite(b.high):
        share = ci_pair(b.plausible_share)
        src = {"estimated": "as estimated here", "published": "as published reviews report"}.get(
            str(b.share_source), "")
        share_txt = (f" ({num(share[0] * 100, 0)}% to {num(share[1] * 100, 0)}% of each answer's variance"
                     f"{', ' + src if src else ''})") if share else ""
        bounds_text = (f"Allowing for any plausible amount of shared method{share_txt}: between "
                       f"{num(b.low, 2)} and {num(b.high, 2)}.")
    cannot = None
    if p.bounds_wide:
        why = str(p.cannot_pin_down or "").strip()
        cannot = "This survey cannot pin the answer down" + (f": {why}" if why else ".")
        if not cannot.endswith("."):
            cannot += "."
    return Decision(title=f"{p.predictor} \u2192 {p.outcome}", sentence=s, direction_note=note,
                    trust=trust_of(p), estimate_text=text, estimate_label=labels.get(str(key), str(key or "")),
                    bounds_text=bounds_text, cannot_pin_down=cannot, preferred=key)


__all__ = ["Decision", "Trust", "decision", "sentence", "trust_of", "too_imprecise", "DIRECTION_NOTE",
           "STATUS_LABELS", "STATUS_SYMBOLS", "IMPRECISE_WIDTH", "finite", "num", "ci_pair"]
