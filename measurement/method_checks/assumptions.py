"""The assumptions behind every correction, each checked by a stated rule.

Each check returns one :class:`Assumption`: ``status`` is ``holds``, ``doubtful``,
``fails`` or ``untestable``; ``affects`` names the path estimates that rest on it. The
preferred estimate is chosen only among estimates none of whose assumptions fails or is
doubtful (unless a remedy was applied, such as robust standard errors); an estimate that
rests on an untestable assumption may lead, and says so. Rules and sources are in
docs/methods.md ("Assumption checks").
"""

from __future__ import annotations

import itertools
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from samesource.input.design import Design
from samesource.input.rows import FrameRows, ItemRows, map_in_threads
from samesource.method_checks.verdict import adjusted_tests

STATUSES = ("holds", "doubtful", "fails", "untestable")

MF, MM, MA = "method_factor_adjusted", "measured_method_adjusted", "marker_adjusted"
MODEL_BASED = ("disattenuated_omega", "errors_in_variables", "latent", MF, MM)
METHOD_CORRECTIONS = (MA, MF, MM)
# estimates that correct unreliability at most, so they assume no shared method variance
UNRELIABILITY_ONLY = ("observed", "disattenuated", "disattenuated_omega", "errors_in_variables", "latent")

SHARE_FOUND = 0.03           # the verdict's "minor" share: below it a check found nothing worth naming
AGREE_FACTOR = 3.0           # checks_agree: shares that differ by more than this factor disagree
BOOT_FAIL_LIMIT = 0.10       # estimate_stable: more failed bootstrap replicates demote an estimate
SE_RATIO_LIMIT = 1.5         # estimate_stable: robust / normal-theory SE beyond 1.5 (or below 1/1.5)
# method_loadings: where the free-loading solution is not a regular one, the equal-vs-free difference
# is divided by this before its chi-square test (our rule, measured here: on simulated surveys with
# truly equal loadings the difference averaged 1.4 to 1.7 times its df, at most 43.9 on 13 df in 72
# samples; halved, none of them reached p < .05)
IRREGULAR_LR_SCALE = 2.0

# items_continuous (sources in the rule texts)
MIN_CATEGORIES = 5           # Rhemtulla, Brosseau-Liard & Savalei (2012)
SEVERE_SKEW, SEVERE_KURTOSIS = 2.0, 7.0   # Curran, West & Finch (1996)
MODERATE_SKEW = 1.0          # common practice
MODERATE_SHARE = 0.25        # more than a quarter of the items moderately skewed (our rule)


@dataclass(frozen=True)
class Assumption:
    id: str
    status: str
    message: str
    evidence: list[str]
    affects: list[str]
    rule: str
    source: str
    remedy: str | None = None               # applied, so the doubt does not demote the estimate
    checks: list[str] = field(default_factory=list)        # method checks (not estimates) it concerns
    by_estimate: dict[str, str] | None = None             # estimate_stable: status per estimate

    def blocks(self, method: str) -> bool:
        """Does this assumption keep ``method`` from being the preferred estimate?"""
        status = self.by_estimate.get(method, "holds") if self.by_estimate is not None else self.status
        if method not in self.affects and self.by_estimate is None:
            return False
        return status == "fails" or (status == "doubtful" and self.remedy is None)

    def to_dict(self) -> dict:
        d = asdict(self)
        if d["by_estimate"] is None:
            d.pop("by_estimate")
        return d


def _fmt(v: float | None, digits: int = 2) -> str:
    return "n/a" if v is None else f"{v:.{digits}f}"


def _ci(ci: list[float] | None) -> str:
    return "" if not ci else f" [{ci[0]:.2f}, {ci[1]:.2f}]"


def _p(test: dict | None) -> float | None:
    return None if not test else test.get("p")


def _found(share: float | None, p: float | None) -> bool:
    """A share worth naming with a significant test (``p`` Holm-adjusted with the verdict's
    family: an unadjusted p of .04 that the verdict does not count is no finding here either)."""
    return bool(share is not None and share >= SHARE_FOUND and p is not None and p < 0.05)


# --- marker_carries_method ------------------------------------------------------------

def marker_carries_method(design: Design, mv: dict) -> Assumption | None:
    """A marker can stand for the shared method only if its items carry that method.
    Evidence from elsewhere: a measured method scale, a method factor identified without
    the marker, and r_M against the smallest substantive correlation. A marker that finds
    nothing is no pass: with no other evidence the assumption is untestable."""
    if design.marker is None:
        return None
    mk, mf, mm = mv.get("marker") or {}, mv.get("method_factor") or {}, mv.get("measured_method")
    evidence: list[str] = []
    mf_share = mf.get("method_share") if mf.get("usable_as_correction") else None
    adj = adjusted_tests(mv)
    mf_found = _found(mf_share, adj["method_factor"])
    rm_found = bool(mk and adj["marker"] is not None and adj["marker"] < 0.05 and mk["r_m"] >= 0.05)
    evidence.append(f"marker-identified method factor: share {_fmt(mf_share)}{_ci(mf.get('method_share_ci'))}, "
                    f"test p {_fmt(_p((mf.get('tests') or {}).get('used_vs_none')), 3)} "
                    f"(Holm-adjusted {_fmt(adj['method_factor'], 3)})")
    if mk:
        evidence.append(f"r_M (the marker's smallest correlation with a substantive scale) {_fmt(mk.get('r_m'))}, "
                        f"p {_fmt(mk.get('r_m_p'), 3)} (Holm-adjusted {_fmt(adj['marker'], 3)})")
        small = mk.get("smallest_substantive_r")
        if small:
            evidence.append(f"smallest correlation between two substantive scales {small['abs_r']:.2f} ({small['pair']}): "
                            "shared method adds to every such correlation, so a marker carrying the same method "
                            "would correlate with the scales at about that size or less")
    marker_found = mf_found or rm_found

    others: list[tuple[str, float | None, bool]] = []   # (label, share, found)
    if mm:
        ok = mm.get("status") == "ok"
        s = mm.get("method_share") if ok else None
        f = _found(s, adj["measured_method"])
        evidence.append(f"measured method scale '{mm['method_construct']}': share {_fmt(s)}{_ci(mm.get('method_share_ci'))}"
                        + ("" if ok else f" (model status {mm.get('status')}: no evidence)"))
        if ok:
            others.append((f"the measured method scale '{mm['method_construct']}'", s, f))
    plain = mf.get("without_marker")
    if plain:
        evidence.append(f"method factor without the marker (equal loadings): status {plain['status']}, share "
                        f"{_fmt(plain.get('method_share'))}{_ci(plain.get('method_share_ci'))}, test p "
                        f"{_fmt(_p(plain.get('test')), 3)}"
                        + ("" if plain.get("found_method") or plain.get("shows_absence") else ": no evidence either way"))
        if plain.get("found_method") or plain.get("shows_absence"):
            others.append(("a method factor identified without the marker", plain.get("method_share"),
                           plain["found_method"]))

    found_elsewhere = [o for o in others if o[2]]
    if marker_found and found_elsewhere:
        top = max(found_elsewhere, key=lambda o: o[1] or 0)
        if mf_share is not None and top[1] and mf_share > 0 and top[1] / mf_share > AGREE_FACTOR:
            status, message = "doubtful", (
                f"The marker carries some of the shared method, but {top[0]} finds much more ({top[1]:.2f} of "
                f"item variance against {mf_share:.2f}): the marker-based corrections likely remove too little.")
        else:
            status, message = "holds", ("The marker picks up the shared method, and another check finds a "
                                        "similar amount.")
    elif marker_found:
        status, message = "holds", ("The marker picks up shared method variance; nothing else in this design "
                                    "can say whether it carries all of it.")
    elif found_elsewhere:
        status, message = "fails", (
            f"The marker finds no shared method, but {found_elsewhere[0][0]} does: the marker does not carry the "
            "method, so every marker-based check and correction misses it.")
    elif others:
        status, message = "holds", ("Neither the marker nor another check finds shared method variance.")
    else:
        status, message = "untestable", (
            "The marker finds no shared method, and nothing else in this design can tell whether that is because "
            "there is none or because the marker does not carry it: its 'nothing found' is not a pass.")
    return Assumption(
        id="marker_carries_method", status=status, message=message, evidence=evidence,
        affects=[MA] + ([MF] if mf.get("identified_by") == "marker" else []),
        checks=["marker", "cfa_marker", "method_factor"],
        rule="fails when the marker finds no method (share below 0.03 or r_M not significant) while a measured "
             "method scale or a method factor identified without the marker finds some (share at least 0.03, "
             "p < .05, every p Holm-adjusted as in the verdict; the factor without the marker counts only where the items' loadings differ within a "
             f"scale, as it is not identified otherwise); doubtful when another check finds over {AGREE_FACTOR:g} times the marker's share; "
             "untestable when no other check is informative (our rules)",
        source="Lindell & Whitney (2001) and Williams, Hartman & Cavazotte (2010) assume the marker shares the "
               "method; Richardson, Simmering & Sturman (2009) show the techniques fail when it does not")


# --- method_loadings ------------------------------------------------------------------

def method_loadings(mv: dict) -> Assumption:
    mf = mv.get("method_factor") or {}
    tests = mf.get("tests") or {}
    conc = mf.get("free_loadings_concentration") or {}
    rule = ("free loadings are used only when the free-loading factor is proper, fits significantly better "
            "than equal loadings and than no method factor (p < .05), is not degenerate and is not "
            "concentrated (" + str(conc.get("rule", "")) + "); equal loadings otherwise. Equal loadings are "
            "untestable where the free model has no clean solution or the scales' items are tau-equivalent (unless "
            "the difference halved is still significant at p < .05: doubtful), doubtful where free loadings fit "
            "better at p < .05")
    evidence = [f"free vs equal loadings: p {_fmt(_p(tests.get('equal_vs_free')), 3)}",
                f"free loadings vs no method factor: p {_fmt(_p(tests.get('free_vs_none')), 3)}",
                f"equal loadings vs no method factor: p {_fmt(_p(tests.get('method_vs_none')), 3)}"]
    if conc.get("ratio") is not None:
        evidence.append(f"least / most affected construct's method share under free loadings: {conc['ratio']:.2f}")
    evidence += [f"free loadings not used: {r}" for r in mf.get("free_loadings_not_used_because") or []]
    src = "Podsakoff et al. (2003); Richardson, Simmering & Sturman (2009); methods.md pitfalls"
    if not mf.get("usable_as_correction"):
        return Assumption("method_loadings", "untestable", "No method factor could be used here, so its loadings "
                          "could not be examined.", evidence, [MF], rule, src)
    if mf.get("loadings") == "free":
        return Assumption("method_loadings", "holds", "The method affects items unequally, and the free-loading "
                          "method factor that allows for this passed every check.", evidence, [MF], rule, src)
    p_free = _p(tests.get("equal_vs_free"))
    unclean = mf.get("free_loadings_unclean") or []
    tau = (mf.get("without_marker") or {}).get("loadings_differ")
    if tau is False:
        evidence.append("the items' trait loadings do not differ within a scale (tau-equivalence not rejected)")
    irregular = bool(unclean) or tau is False
    test = tests.get("equal_vs_free") or {}
    if irregular and p_free is not None and test.get("chi2_diff") is not None and test.get("df_diff"):
        # Far beyond what the irregular comparison gives by chance it is still evidence against equal
        # loadings (a response style that follows the keying gives differences in the hundreds).
        p_scaled = float(stats.chi2.sf(max(test["chi2_diff"], 0.0) / IRREGULAR_LR_SCALE, test["df_diff"]))
        evidence.append(f"free vs equal loadings with the difference divided by {IRREGULAR_LR_SCALE:g} (the free "
                        f"solution is not a regular one): p {_fmt(p_scaled, 3)}")
        if p_scaled < 0.05:
            return Assumption("method_loadings", "doubtful", "The answering style clearly affects items unequally "
                              "(equal loadings fit far worse even allowing for an irregular comparison), but the model "
                              "that allows for this cannot be trusted here, so the method-factor correction rests on "
                              "equal loadings that the data reject.", evidence, [MF], rule, src)
    if irregular or p_free is None:
        # The chi-square difference is no test of equal loadings when the free solution is not a
        # regular one (not converged, improper, degenerate: the reference distribution assumes a
        # regular interior solution; Self & Liang 1987, Stoel, Garre, Dolan & van den Wittenboer
        # 2006), nor when every scale's items load equally: free method loadings proportional to
        # the trait loadings are then traded against the trait correlations (the free model is not
        # identified; the same pitfall as the plain factor's). Measured here on surveys whose true
        # method loadings are equal: mean difference 21 on 13 df at n = 150 and 19 at n = 600,
        # p < .05 in 35-38% of them (docs/coverage.md).
        why = "; ".join(unclean) if unclean else (
            "the items of each scale load equally on it, so free method loadings cannot be told apart from the "
            "trait correlations" if tau is False else "no test")
        return Assumption("method_loadings", "untestable", "Whether the answering style affects every item "
                          "equally cannot be tested here (" + why + "), so the method-factor correction assumes "
                          "equal loadings without a check.", evidence, [MF], rule, src)
    if p_free < 0.05:
        return Assumption("method_loadings", "doubtful", "The method seems to affect items unequally, but the "
                          "model that allows for this cannot be trusted here, so the method-factor correction rests "
                          "on equal loadings that the data question.", evidence, [MF], rule, src)
    return Assumption("method_loadings", "holds", "Equal method loadings fit as well as free ones.",
                      evidence, [MF], rule, src)


# --- method_orthogonal ----------------------------------------------------------------

def method_orthogonal(design: Design) -> Assumption:
    affects = [MF] + ([MA] if design.marker else []) + ([MM] if design.method else [])
    return Assumption(
        "method_orthogonal", "untestable",
        "Every correction assumes the answering style is unrelated to the attitudes themselves; one survey "
        "cannot test this, so the bounds and the sensitivity section show how far the answer moves if it is not.",
        ["a method source correlated with a trait is confounded with that trait in a single cross-sectional survey"],
        affects, "never 'holds': not testable from one cross-sectional survey",
        "Podsakoff et al. (2003); Richardson, Simmering & Sturman (2009)")


# --- items_continuous -----------------------------------------------------------------

def distinct_values(x: np.ndarray) -> np.ndarray:
    """The distinct values of ``x`` (no NaN), sorted: ``np.unique(x)``, found without a sort
    where the values are whole numbers in a modest range (answer codes), by one bincount."""
    if x.size == 0:
        return x[:0]
    counted = _block_counts(x[:, None], np.ones((x.size, 1), dtype=bool), True)
    if counted is None:
        return np.unique(x)
    lo, counts = counted
    return lo + np.flatnonzero(counts[0]).astype(float)


def distinct_count(x: np.ndarray) -> int:
    """How many distinct values ``x`` (no NaN) holds: ``len(np.unique(x))`` (see
    :func:`distinct_values`)."""
    return int(len(distinct_values(x)))


def _block_counts(X: np.ndarray, answered: np.ndarray, complete: bool) -> tuple[float, np.ndarray] | None:
    """(lowest answer, counts: columns x answers from it) of a block whose answers are whole
    numbers in a modest range (answer codes), by one bincount over the block; None otherwise."""
    k = X.shape[1]
    given = X if complete else X[answered]
    if not given.size:
        return None
    lo, hi = float(given.min()), float(given.max())
    span = int(hi - lo) + 1 if hi - lo < 1e4 else 0
    if not span or k * span >= 1e7 or not np.array_equal(given, np.floor(given)):
        return None
    with np.errstate(invalid="ignore"):  # NaN cells cast to nonsense, masked out below
        at = (X - lo).astype(np.int64) + np.arange(k) * span
    return lo, np.bincount(at.ravel() if complete else at[answered], minlength=k * span).reshape(k, span)


class _AnswerCounts:
    """Counts of each whole-number answer per column, over blocks (the range grows as needed)."""

    def __init__(self, k: int) -> None:
        self.k, self.lo, self.counts = k, 0.0, np.zeros((k, 0), dtype=np.int64)

    def add(self, lo: float, counts: np.ndarray) -> None:
        if not self.counts.shape[1]:
            self.lo, self.counts = lo, counts.astype(np.int64)
            return
        new_lo = min(self.lo, lo)
        new_hi = max(self.lo + self.counts.shape[1], lo + counts.shape[1])
        if new_lo < self.lo or new_hi > self.lo + self.counts.shape[1]:
            grown = np.zeros((self.k, int(new_hi - new_lo)), dtype=np.int64)
            at = int(self.lo - new_lo)
            grown[:, at:at + self.counts.shape[1]] = self.counts
            self.lo, self.counts = new_lo, grown
        at = int(lo - self.lo)
        self.counts[:, at:at + counts.shape[1]] += counts

    def power_sums(self, shift: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Per column the count and the sums of (answer - shift) to the powers 1 to 4."""
        values = self.lo + np.arange(self.counts.shape[1])
        d = values[None, :] - shift[:, None]
        c = self.counts.astype(float)
        return c.sum(axis=1), np.stack([(c * d ** p).sum(axis=1) for p in range(1, 5)])

    def distinct(self, j: int) -> np.ndarray:
        return self.lo + np.flatnonzero(self.counts[j]).astype(float)


def item_distribution(rows: ItemRows | pd.DataFrame, items: list[str]) -> pd.DataFrame:
    """Per item: answer categories used, skewness and excess kurtosis (as scipy.stats gives
    them, bias-corrected), a block of rows at a time: for whole-number answers in a modest
    range (answer codes) the count of each answer, by one bincount per block; for others each
    item's distinct answers and the power sums (orders 1 to 4) of its answers. Both about a
    shift (the item's mean in the first block, so that no digits are lost to a large mean)."""
    rows = rows if isinstance(rows, ItemRows) else FrameRows(rows[items].apply(pd.to_numeric, errors="coerce"))
    k = len(items)
    seen: list[np.ndarray] = [np.empty(0)] * k
    n = np.zeros(k)
    sums = np.zeros((4, k))
    coded = _AnswerCounts(k)
    blocks = iter(rows.blocks(items))
    first = next(blocks, None)
    shift = None
    if first is not None:
        X = first[1]
        answered = ~np.isnan(X)
        count = answered.sum(axis=0)
        shift = np.where(count > 0, np.where(answered, X, 0.0).sum(axis=0) / np.maximum(count, 1), 0.0)

    def one(block: tuple[int, np.ndarray]) -> tuple[tuple[float, np.ndarray] | None, tuple | None]:
        """(counted, summed), one of them None: a block's answer counts (lowest answer, counts)
        where its answers are codes, else its distinct answers per item, answer counts and power
        sums about the shift."""
        X = block[1]
        answered = ~np.isnan(X)
        complete = bool(answered.all())
        counted = _block_counts(X, answered, complete)
        if counted is not None:
            return counted, None
        distinct = [distinct_values(X[answered[:, j], j]) for j in range(k)]
        d = X - shift if complete else np.where(answered, X - shift, 0.0)
        power, out = d.copy(), np.empty((4, k))
        for order in range(4):
            out[order] = power.sum(axis=0)
            if order < 3:
                power *= d
        return None, (distinct, answered.sum(axis=0), out)

    for counted, summed in map_in_threads(one, itertools.chain([first] if first is not None else [], blocks)):
        if counted is not None:  # integer counts, added in any order alike
            coded.add(*counted)
            continue
        distinct, answered_n, power_sums = summed  # added in the blocks' order
        seen = [np.union1d(seen[j], distinct[j]) for j in range(k)]
        n += answered_n
        sums += power_sums
    shift = np.zeros(k) if shift is None else shift
    if coded.counts.shape[1]:
        c_n, c_sums = coded.power_sums(shift)
        n, sums = n + c_n, sums + c_sums
        seen = [np.union1d(seen[j], coded.distinct(j)) for j in range(k)]
    out = [{"item": it, "categories": len(seen[j]), **_skew_kurtosis(n[j], sums[:, j], shift[j])}
           for j, it in enumerate(items)]
    return pd.DataFrame(out, columns=["item", "categories", "skew", "kurtosis"]).set_index("item")


def _skew_kurtosis(n: float, s: np.ndarray, shift: float) -> dict[str, float]:
    """scipy.stats' skew and kurtosis (bias=False, Fisher's excess kurtosis) from the count and
    the power sums of the answers less ``shift``: the central moments m2, m3, m4 by the
    binomial expansion around the mean, then the sample-size corrections as scipy applies them;
    NaN for a constant item (scipy's rule: m2 at most (eps x mean)^2) or too few answers."""
    nan = float("nan")
    if n < 1:
        return {"skew": nan, "kurtosis": nan}
    mu = s[0] / n
    e2, e3, e4 = s[1] / n, s[2] / n, s[3] / n
    m2 = e2 - mu * mu
    m3 = e3 - 3 * mu * e2 + 2 * mu ** 3
    m4 = e4 - 4 * mu * e3 + 6 * mu * mu * e2 - 3 * mu ** 4
    if m2 <= (np.finfo(float).eps * (shift + mu)) ** 2:
        return {"skew": nan, "kurtosis": nan}
    skew = float(np.sqrt((n - 1) * n) / (n - 2) * m3 / m2 ** 1.5) if n > 2 else nan
    kurt = float(((n * n - 1) * m4 / m2 ** 2 - 3 * (n - 1) ** 2) / ((n - 2) * (n - 3))) if n > 3 else nan
    return {"skew": skew, "kurtosis": kurt}


def items_continuous(rows: ItemRows | pd.DataFrame, design: Design) -> Assumption:
    items = [it for c in design.constructs.values() for it in c.items]
    d = item_distribution(rows, items)
    few = d.index[d["categories"] < MIN_CATEGORIES].tolist()
    very_few = d.index[d["categories"] <= 3].tolist()
    severe = d.index[(d["skew"].abs() > SEVERE_SKEW) | (d["kurtosis"] > SEVERE_KURTOSIS)].tolist()
    moderate = d.index[d["skew"].abs() > MODERATE_SKEW].tolist()
    evidence = [f"answer categories used: {int(d['categories'].min())} to {int(d['categories'].max())}",
                f"skewness {d['skew'].min():.2f} to {d['skew'].max():.2f}, excess kurtosis "
                f"{d['kurtosis'].min():.2f} to {d['kurtosis'].max():.2f}"]
    if few:
        evidence.append(f"fewer than {MIN_CATEGORIES} categories used: {', '.join(few[:8])}")
    if severe:
        evidence.append(f"severely non-normal (|skew| > {SEVERE_SKEW:g} or kurtosis > {SEVERE_KURTOSIS:g}): "
                        f"{', '.join(severe[:8])}")
    if moderate:
        evidence.append(f"|skew| > {MODERATE_SKEW:g}: {len(moderate)} of {len(items)} items")
    rule = (f"fails when more than half of the items use 3 answer categories or fewer; doubtful when any item "
            f"uses fewer than {MIN_CATEGORIES} (Rhemtulla, Brosseau-Liard & Savalei 2012), any has |skew| > "
            f"{SEVERE_SKEW:g} or excess kurtosis > {SEVERE_KURTOSIS:g} (Curran, West & Finch 1996), or more than "
            f"{MODERATE_SHARE:.0%} have |skew| > {MODERATE_SKEW:g} (common practice); holds otherwise")
    src = "Rhemtulla, Brosseau-Liard & Savalei (2012); Curran, West & Finch (1996)"
    remedy = "Wald intervals use robust (sandwich) standard errors"
    if len(very_few) > len(items) / 2:
        return Assumption("items_continuous", "fails", "Most items have three answer options or fewer: every "
                          "estimate here treats answers as continuous and may be biased; read them with care.",
                          evidence, list(MODEL_BASED), rule, src, remedy=None)
    if few or severe or len(moderate) > MODERATE_SHARE * len(items):
        return Assumption("items_continuous", "doubtful", "The answers are far from normally distributed (skewed, "
                          "or few answer options), so intervals use robust standard errors; estimates from "
                          "strongly skewed answers can still be slightly off.", evidence, list(MODEL_BASED),
                          rule, src, remedy=remedy)
    return Assumption("items_continuous", "holds", "Answers use enough options and are close enough to normal "
                      "for the models used.", evidence, list(MODEL_BASED), rule, src)


# --- checks_agree ---------------------------------------------------------------------

def checks_agree(mv: dict, marker_status: str | None) -> Assumption:
    """Do the checks that estimate a method share agree? Only checks whose own assumption
    is not known to fail take part (the CFA marker technique with a marker of its own trait,
    marker-identified shares with a marker that does not carry the method, are left out)."""
    shares: list[tuple[str, float]] = []
    mf, mm, cm = mv.get("method_factor") or {}, mv.get("measured_method"), mv.get("cfa_marker")
    left_out: list[str] = []
    if mf.get("usable_as_correction") and mf.get("method_share") is not None:
        if mf.get("identified_by") == "marker" and marker_status in ("fails", "untestable"):
            left_out.append(f"marker-identified method factor ({mf['method_share']:.2f}): the marker could not be "
                            "vouched for")
        else:
            shares.append(("method factor", mf["method_share"]))
    plain = mf.get("without_marker")
    if plain and plain.get("found_method"):
        shares.append(("method factor without the marker", plain["method_share"]))
    if mm and mm.get("status") == "ok" and mm.get("method_share") is not None:
        shares.append((f"measured method '{mm['method_construct']}'", mm["method_share"]))
    if cm and cm.get("method_share_overall") is not None:
        if (cm.get("assumption") or {}).get("status") == "fails":
            left_out.append(f"CFA marker technique ({cm['method_share_overall']:.2f}): the marker has a trait of "
                            "its own")
        else:
            shares.append(("CFA marker technique", cm["method_share_overall"]))
    evidence = [f"{name}: {v:.3f}" for name, v in shares] + [f"left out: {x}" for x in left_out]
    rule = (f"doubtful when two method-share estimates differ by more than a factor of {AGREE_FACTOR:g} while the "
            f"larger is at least {SHARE_FOUND}, or one is at least 0.10 while another is below {SHARE_FOUND}; "
            "untestable with fewer than two estimates (our rule)")
    src = "Richardson, Simmering & Sturman (2009) compare the techniques; methods.md measurements"
    if len(shares) < 2:
        return Assumption("checks_agree", "untestable", "Fewer than two checks here can estimate how much of the "
                          "answers is shared method, so they cannot be compared.", evidence,
                          list(METHOD_CORRECTIONS), rule, src)
    vals = [max(v, 0.0) for _, v in shares]
    hi, lo = max(vals), min(vals)
    disagree = (hi >= SHARE_FOUND and hi > AGREE_FACTOR * max(lo, 1e-9)) or (hi >= 0.10 and lo < SHARE_FOUND)
    if disagree:
        return Assumption("checks_agree", "doubtful", "The checks disagree on how much of the answers is shared "
                          f"method ({lo:.2f} to {hi:.2f} of item variance): the corrected numbers depend on which "
                          "one is right.", evidence, list(METHOD_CORRECTIONS), rule, src)
    return Assumption("checks_agree", "holds", f"The checks agree on the size of the shared method ({lo:.2f} to "
                      f"{hi:.2f} of item variance).", evidence, list(METHOD_CORRECTIONS), rule, src)


# --- estimate_stable ------------------------------------------------------------------

def estimate_stable(paths: list[dict]) -> Assumption:
    """Per estimate: a proper solution, bootstrap replicates that mostly succeed, and
    normal-theory and robust SEs that roughly agree."""
    by: dict[str, str] = {}
    evidence: list[str] = []
    order = list(STATUSES)
    for p in paths:
        for m, e in p["estimates"].items():
            if e is None:
                continue
            st = "holds"
            # "undefined" is a formula that does not apply (a corrected correlation above 1),
            # said in the estimate's note; a model that did not fit cleanly is instability
            if e.get("status") not in ("ok", "undefined"):
                st = "fails"
                evidence.append(f"{m} ({p['outcome']} on {p['predictor']}): model status {e.get('status')}")
            b = e.get("bootstrap")
            if b and b.get("n_boot"):
                share = b["n_failed"] / b["n_boot"]
                if share > BOOT_FAIL_LIMIT:
                    st = "fails"
                    evidence.append(f"{m} ({p['outcome']} on {p['predictor']}): {share:.0%} of bootstrap "
                                    "replicates failed")
            ratio = e.get("se_ratio")
            if st == "holds" and ratio is not None and not (1 / SE_RATIO_LIMIT <= ratio <= SE_RATIO_LIMIT):
                st = "doubtful"
                evidence.append(f"{m} ({p['outcome']} on {p['predictor']}): robust SE {ratio:.2f} times the "
                                "normal-theory SE")
            if order.index(st) > order.index(by.get(m, "holds")):
                by[m] = st
            else:
                by.setdefault(m, st)
    worst = max(by.values(), key=order.index, default="holds")
    if not evidence:
        evidence.append("every estimate came from a proper solution"
                        + ("; bootstrap failures within the limit" if any(
                            (e or {}).get("bootstrap") for p in paths for e in p["estimates"].values()) else ""))
    message = {"holds": "Every estimate came from a clean, stable model fit.",
               "doubtful": "Some estimates' standard errors change markedly when computed robustly (shown); the "
                           "robust ones are used.",
               "fails": "Some estimates are unstable (a failed fit or many failed bootstrap replicates) and are not "
                        "used as the headline number."}[worst]
    return Assumption(
        "estimate_stable", worst, message, evidence, sorted(by),
        rule=f"fails for an estimate whose model is not a proper, converged solution or whose bootstrap replicates "
             f"fail in more than {BOOT_FAIL_LIMIT:.0%}; doubtful when its robust SE differs from the normal-theory "
             f"SE by more than a factor of {SE_RATIO_LIMIT:g} (our rules)",
        source="Efron & Tibshirani (1993) on bootstrap failures; White (1982) on comparing information-matrix and "
               "sandwich variances", remedy="robust standard errors are used" if worst == "doubtful" else None,
        by_estimate=by)


# --- no_shared_method -----------------------------------------------------------------

def no_shared_method(verdict: dict) -> Assumption:
    """The estimates that correct unreliability only (latent model, disattenuation) assume the
    answers share no method variance; the verdict says whether the checks found some. Without
    this, a method-factor estimate kept out by a doubt about its loadings handed the headline to
    the latent model, which the checks had just shown to be inflated (docs/coverage.md)."""
    level = verdict.get("level")
    status, message = {
        "none": ("holds", "No check whose own assumptions hold found shared method variance worth naming, so the "
                          "estimates that correct unreliability only are not known to be inflated by it."),
        "minor": ("doubtful", "The checks found modest shared method variance: estimates that correct "
                              "unreliability only are somewhat inflated by it."),
        "substantial": ("fails", "The checks found substantial shared method variance: estimates that correct "
                                 "unreliability only are inflated by it and are not used as the headline number."),
    }.get(level, ("untestable", "This survey cannot tell whether the answers share method variance, so estimates "
                                "that correct unreliability only may be inflated by it: see the bounds."))
    return Assumption(
        "no_shared_method", status, message, [f"method-variance verdict: {level}"], list(UNRELIABILITY_ONLY),
        rule="holds when the verdict is none, doubtful when minor, fails when substantial, untestable when "
             "undetermined (the verdict's rules: docs/method-variance.md)",
        source="Podsakoff, MacKenzie, Lee & Podsakoff (2003) on the inflation of same-source associations")


def method_assumptions(design: Design, rows: ItemRows | pd.DataFrame, mv: dict) -> list[Assumption]:
    """Every check that can be made before the paths are estimated (``rows``: the analysis
    rows' answers)."""
    out: list[Assumption] = []
    mc = marker_carries_method(design, mv)
    if mc is not None:
        out.append(mc)
    out.append(method_loadings(mv))
    out.append(method_orthogonal(design))
    out.append(items_continuous(rows, design))
    out.append(checks_agree(mv, mc.status if mc else None))
    cm = mv.get("cfa_marker")
    if cm and cm.get("assumption"):
        a = cm["assumption"]
        out.append(Assumption("marker_pure_method", a["status"], a["message"],
                              [f"mean correlation among the marker's items {a['mean_within_marker_r']:.2f}, with the "
                               f"substantive items {a['mean_marker_substantive_r']:.2f}"],
                              [], a["rule"], "Williams, Hartman & Cavazotte (2010)", checks=["cfa_marker"]))
    return out


def find(assumptions: list[Assumption], id_: str) -> Assumption | None:
    return next((a for a in assumptions if a.id == id_), None)
