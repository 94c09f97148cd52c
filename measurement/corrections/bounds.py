"""Bounds on a key path over the method shares that remain plausible.

The sensitivity curve re-estimates the path at each assumed share of item variance due to
a shared method (:mod:`samesource.corrections.sensitivity`). The bounds run from the lowest interval
end to the highest over the plausible shares, so sampling error is included. The
plausible shares are the interval of the share estimated by a check whose assumptions
hold; where no such check exists, zero to the upper end of the shares reported in
published reviews of method variance.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from samesource.method_checks.assumptions import Assumption, find


@dataclass(frozen=True)
class PublishedShares:
    range: tuple[float, float]
    source: str


# Reviews of multitrait-multimethod studies: Lance, Dawson, Birkelbach & Hoffman (2010),
# method variance 18% of variance on average (their abstract); Cote & Buckley (1987), 26%
# on average and 41% for attitude measures (from memory, as quoted by Podsakoff et al.
# 2003); Doty & Glick (1998), about a third (from memory). Upper end: 0.41.
PUBLISHED_SHARES = PublishedShares(
    range=(0.0, 0.41),
    source="reviews of method variance in organisational and attitude measures: on average 18% of item "
           "variance (Lance, Dawson, Birkelbach & Hoffman 2010), 26% on average and up to 41% for attitude "
           "measures (Cote & Buckley 1987, from memory)")

# A range wider than this on the -1 to 1 scale, and over twice the width of the preferred
# estimate's own interval, cannot guide a decision (our rule).
WIDE = 0.30


@dataclass(frozen=True)
class PlausibleShares:
    low: float
    high: float
    source: str                    # "estimated" | "published"
    basis: str
    estimated_share: float | None  # the share the method checks estimated (for the figure)
    estimated_ci: list[float] | None
    estimated_by: str | None


def plausible_shares(mv: dict, assumptions: list[Assumption]) -> PlausibleShares:
    """The share interval of the checks whose assumptions hold: the most precise one when the
    checks agree, the union of their intervals otherwise."""
    mf, mm = mv.get("method_factor") or {}, mv.get("measured_method")
    marker = find(assumptions, "marker_carries_method")
    loadings = find(assumptions, "method_loadings")
    # untestable equal loadings (no clean free-loading model) leave the equal-loading share as the
    # only estimate; it is used and the basis says it rests on them
    loadings_ok = loadings is None or loadings.status in ("holds", "untestable")
    untested = loadings is not None and loadings.status == "untestable"
    found: list[tuple[str, float, list[float]]] = []
    if mf.get("usable_as_correction") and mf.get("method_share_ci") and loadings_ok:
        if mf.get("identified_by") != "marker" or (marker is not None and marker.status == "holds"):
            found.append((f"the {mf['identified_by'] if mf['identified_by'] == 'marker' else 'plain'}-identified "
                          "method factor", mf["method_share"], mf["method_share_ci"]))
    plain = mf.get("without_marker")
    if plain and (plain.get("found_method") or plain.get("shows_absence")):
        found.append(("the method factor identified without the marker", plain["method_share"],
                      plain["method_share_ci"]))
    if mm and mm.get("status") == "ok" and mm.get("method_share_ci"):
        found.append((f"the measured method scale '{mm['method_construct']}'", mm["method_share"],
                       mm["method_share_ci"]))
    if found:
        agree = find(assumptions, "checks_agree")
        if agree is not None and agree.status == "holds":
            # the checks agree: the most precise one's interval
            best = min(found, key=lambda f: f[2][1] - f[2][0])
            lo, hi = best[2]
            names = best[0] + " (the most precise of the checks, which agree)"
        else:
            # they disagree or cannot be compared: every interval they allow
            lo = min(ci[0] for _, _, ci in found)
            hi = max(ci[1] for _, _, ci in found)
            names = " and ".join(n for n, _, _ in found)
        return PlausibleShares(lo, hi, "estimated",
                               f"method share {lo:.2f} to {hi:.2f}: the confidence interval of the share estimated by "
                               f"{names}, whose assumptions hold"
                               + (" (equal method loadings, which this survey cannot test, included)"
                                  if untested and "method factor" in names else ""),
                               found[0][1], found[0][2], found[0][0])
    est = mf.get("method_share") if mf.get("usable_as_correction") else None
    lo, hi = PUBLISHED_SHARES.range
    return PlausibleShares(
        lo, hi, "published",
        f"method share {lo:.2f} to {hi:.2f}: no check in this survey could measure the shared method with "
        f"assumptions that hold, so the range reported in {PUBLISHED_SHARES.source} is used",
        est, mf.get("method_share_ci") if est is not None else None,
        "the method factor (could not be vouched for)" if est is not None else None)


@dataclass(frozen=True)
class Bounds:
    low: float | None
    high: float | None
    basis: str
    plausible_share: list[float]
    share_source: str
    truncated_at: float | None     # the model holds no larger share: larger ones are impossible here
    wide: bool
    cannot_pin_down: str | None

    def to_dict(self) -> dict:
        d = asdict(self)
        d.pop("wide")
        d.pop("cannot_pin_down")
        return d


def _at(curve: list[dict], share: float, key) -> float | None:
    """Linear interpolation of key(point) at ``share`` along the curve."""
    xs = [c["method_share"] for c in curve]
    ys = [key(c) for c in curve]
    pts = [(x, y) for x, y in zip(xs, ys, strict=True) if y is not None]
    if not pts:
        return None
    px, py = zip(*pts, strict=True)
    return float(np.interp(share, px, py))


def path_bounds(sensitivity: dict, shares: PlausibleShares, preferred: dict | None) -> Bounds:
    """The range of the path over ``shares``, interval ends included (see the module)."""
    curve = sensitivity.get("curve") or []
    if not curve:
        return Bounds(None, None, "the sensitivity curve could not be computed", [shares.low, shares.high],
                      shares.source, None, True, "The survey cannot bound this path: the model with an assumed "
                      "shared method could not be fitted.")
    top = curve[-1]["method_share"]
    hi_share = min(shares.high, top)
    truncated = top if shares.high > top + 1e-9 else None
    lo_share = min(shares.low, hi_share)

    def lo_end(c):
        return c["ci"][0] if c.get("ci") else c["estimate"]

    def hi_end(c):
        return c["ci"][1] if c.get("ci") else c["estimate"]

    inside = [c for c in curve if lo_share - 1e-9 <= c["method_share"] <= hi_share + 1e-9]
    lows = [lo_end(c) for c in inside] + [v for v in (_at(curve, lo_share, lo_end), _at(curve, hi_share, lo_end))
                                          if v is not None]
    highs = [hi_end(c) for c in inside] + [v for v in (_at(curve, lo_share, hi_end), _at(curve, hi_share, hi_end))
                                           if v is not None]
    low, high = float(min(lows)), float(max(highs))
    basis = shares.basis + (f"; the model holds no share above {truncated:.2f} for these data" if truncated else "")
    ci = (preferred or {}).get("ci")
    if shares.source == "estimated" and ci:
        # The curve assumes the same share in every item; the preferred correction's own
        # model (free loadings, say) may spread it differently, so its interval is kept in
        # the bounds (measured: congeneric loadings, docs/coverage.md).
        low, high = min(low, ci[0]), max(high, ci[1])
        basis += "; the preferred estimate's own interval included"
    crosses = low < 0 < high
    ci_width = (ci[1] - ci[0]) if ci else 0.0
    # wide: allowing for the method moves the answer well beyond sampling error, or turns an
    # association the interval shows into one that may not exist (our rule)
    wide = ((high - low) > max(WIDE, 2 * ci_width)
            or (crosses and bool(ci) and (ci[0] > 0 or ci[1] < 0)))
    why = None
    if wide:
        if shares.source == "published":
            cause = ("no check in this survey could measure how much of the answers is shared answering style, so "
                     "the whole range seen in other studies has to be allowed for")
        else:
            cause = "the shared answering style was measured, but not precisely enough"
        why = (f"This survey cannot pin the answer down: allowing for shared answering style, the association lies "
               f"anywhere from {low:.2f} to {high:.2f}" + (", which includes no association at all" if crosses else "")
               + f", because {cause}. A second source (for example manager ratings or records) or a short measured "
                 "method scale in the next survey would narrow it.")
    return Bounds(low, high, basis, [lo_share, hi_share], shares.source, truncated, wide, why)
