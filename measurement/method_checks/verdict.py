"""One verdict on common-method variance, from stated rules over every check's signal.

Each signal needs both statistical significance (p < .05 after Holm's adjustment over
every test that can raise the level) and a size worth naming, so that large samples do not
turn trivial method variance into a flag and several tests do not add up to a false alarm. Thresholds are ours and common practice; docs/method-variance.md
states them with their reasons.
"""

from __future__ import annotations

LEVELS = ("none", "minor", "substantial")
# "undetermined" stands beside them: no check whose assumptions hold could look
VERDICT_LEVELS = ("none", "minor", "substantial", "undetermined")

# Share of substantive item variance due to method (squared standardized method loading).
SHARE_MINOR = 0.03
SHARE_SUBSTANTIAL = 0.10
# Marker's smallest correlation with a substantive scale (Lindell & Whitney's r_M).
R_M_MINOR = 0.05
R_M_SUBSTANTIAL = 0.10

RULES = [
    f"Method factor (marker-identified, or plain when its identification checks pass) and measured "
    f"method factor: share of substantive item variance due to method, when the factor improves fit "
    f"significantly (p < .05): at least {SHARE_SUBSTANTIAL:.2f} is substantial, at least "
    f"{SHARE_MINOR:.2f} minor.",
    f"CFA marker technique: method share from the marker's factor, when adding it improves fit "
    f"significantly: at least {SHARE_SUBSTANTIAL:.2f} substantial, at least {SHARE_MINOR:.2f} minor; "
    "substantive correlations that change significantly when held at their baseline values: minor.",
    f"Marker correlation r_M significantly above zero: at least {R_M_SUBSTANTIAL:.2f} substantial, at "
    f"least {R_M_MINOR:.2f} minor.",
    "Harman's test flagged (one factor, or a first factor above 50% of variance): minor at most, as the "
    "test is insensitive and also flags strongly related constructs.",
    "Full-collinearity VIF above 3.3 (Kock 2015): minor at most, as collinearity has other causes.",
    "Each method factor is tested with the model actually used (free or equal loadings) against no method "
    "factor.",
    "The tests that can raise the level (method factor, method factor without the marker, measured method, "
    "CFA marker technique, r_M) are one family: their p-values are Holm-adjusted (Holm 1979) before they are "
    "compared with .05 (.01 for the method factor without the marker), so that a survey without method "
    "variance raises a false alarm at most 5% of the time however many checks its design allows.",
    "The verdict is the highest level any signal reaches. 'none' is said only when a check whose "
    "assumptions hold (a marker that could be vouched for, a measured method scale, an identified method "
    "factor without the marker) found nothing; otherwise 'undetermined'. Harman's test, the VIF and a marker "
    "that could not be vouched for can raise a level but never vouch for 'none'.",
]


def _share_level(share: float | None, significant: bool) -> str:
    if share is None or not significant:
        return "none"
    if share >= SHARE_SUBSTANTIAL:
        return "substantial"
    if share >= SHARE_MINOR:
        return "minor"
    return "none"


def holm(pvalues: dict[str, float | None]) -> dict[str, float | None]:
    """Holm's (1979) step-down adjusted p-values: the family-wise error rate stays at the
    chosen level under any dependence between the tests. ``None`` (no test) is left out."""
    named = sorted(((p, k) for k, p in pvalues.items() if p is not None), key=lambda t: t[0])
    m, running, out = len(named), 0.0, dict.fromkeys(pvalues)
    for i, (p, k) in enumerate(named):
        running = max(running, min(1.0, (m - i) * p))
        out[k] = running
    return out


def _p(test: dict | None) -> float | None:
    return test.get("p") if test else None


def adjusted_tests(mv: dict) -> dict[str, float | None]:
    """Every test that can raise the level, as one family: Holm-adjusted, so a clean survey
    raises a false alarm at most 5% of the time however many checks its design allows. The
    assumption checks read the same adjusted p-values, so a check they count as finding method
    variance is one the verdict counts too."""
    mf = mv.get("method_factor")
    plain = (mf or {}).get("without_marker")
    mm, cm, mk = mv.get("measured_method"), mv.get("cfa_marker"), mv.get("marker")
    return holm({
        "method_factor": _p(mf["tests"].get("used_vs_none") or mf["tests"]["method_vs_none"])
        if mf and mf.get("usable_as_correction") else None,
        "without_marker": _p(plain.get("test")) if plain and plain.get("informative") else None,
        "measured_method": _p(mm["tests"]["method_vs_none"]) if mm else None,
        "cfa_marker": _p(cm["tests"].get("baseline_vs_equal")) if cm and cm.get("tests") else None,
        "marker": mk.get("r_m_p") if mk else None,
    })


def verdict(mv: dict, assumptions: list | None = None) -> dict:
    """Weigh the method-variance sections (``report["method_variance"]`` without a verdict).

    ``assumptions``: the :class:`~samesource.method_checks.assumptions.Assumption` list, which says
    which checks can vouch for "nothing found"."""
    by_id = {a.id: a for a in (assumptions or [])}
    marker_ok = by_id["marker_carries_method"].status == "holds" if "marker_carries_method" in by_id else False
    cfa_ok = by_id["marker_pure_method"].status != "fails" if "marker_pure_method" in by_id else True
    signals: list[tuple[str, str, bool]] = []  # (level, reason, can vouch for "none")

    mf = mv.get("method_factor")
    plain = (mf or {}).get("without_marker")
    mm = mv.get("measured_method")
    cm = mv.get("cfa_marker")
    mk = mv.get("marker")
    adj = adjusted_tests(mv)

    def sig(name: str, level: float = 0.05) -> bool:
        return adj.get(name) is not None and adj[name] < level

    if mf and mf.get("usable_as_correction"):
        test = mf["tests"].get("used_vs_none") or mf["tests"]["method_vs_none"]
        lvl = _share_level(mf.get("method_share"), sig("method_factor"))
        vouch = marker_ok if mf["identified_by"] == "marker" else True
        signals.append((lvl, f"method factor ({mf['identified_by']}, {mf['loadings']} loadings): method share of "
                             f"item variance {_fmt(mf.get('method_share'))}, test p {_fmt(test['p'], 3)}"
                             + ("" if vouch or lvl != "none" else "; the marker could not be vouched for, so "
                                "this is no evidence of absence"), vouch))
    elif mf:
        signals.append(("none", "method factor: not usable here (" + "; ".join(mf.get("warnings") or ["checks failed"])
                        + ")", False))
    if plain and plain.get("informative"):
        # identified by the loading pattern alone: it counts only when clear either way
        lvl = _share_level(plain.get("method_share"), plain.get("found_method", False)
                           and sig("without_marker", 0.01))
        signals.append((lvl, f"method factor without the marker: method share {_fmt(plain.get('method_share'))}, "
                             f"test p {_fmt((plain.get('test') or {}).get('p'), 3)}",
                        bool(plain.get("shows_absence"))))

    if mm:
        ok = mm.get("status") == "ok"
        lvl = _share_level(mm.get("method_share"), sig("measured_method"))
        signals.append((lvl, f"measured method '{mm['method_construct']}': method share "
                             f"{_fmt(mm.get('method_share'))}, test p {_fmt(mm['tests']['method_vs_none']['p'], 3)}",
                        ok))

    if cm and cm.get("tests"):
        lvl = _share_level(cm.get("method_share_overall"), sig("cfa_marker"))
        vouch = marker_ok and cfa_ok
        signals.append((lvl, f"CFA marker technique: method share {_fmt(cm.get('method_share_overall'))}, "
                             f"test p {_fmt((cm['tests'].get('baseline_vs_equal') or {}).get('p'), 3)}"
                             + ("" if cfa_ok else "; the marker has a trait of its own, so this share is a lower "
                                "bound and no evidence of absence"), vouch))
        held = next((v for k, v in cm["tests"].items() if k.endswith("_vs_held")), None)
        if held and held.get("p") is not None and held["p"] < 0.05 and lvl != "none":
            signals.append(("minor", "CFA marker technique: the substantive correlations change when "
                                     "method variance is allowed for", False))

    if mk:
        r_m, r_sig = mk["r_m"], sig("marker")
        lvl = "none"
        if r_sig and r_m >= R_M_SUBSTANTIAL:
            lvl = "substantial"
        elif r_sig and r_m >= R_M_MINOR:
            lvl = "minor"
        signals.append((lvl, f"marker '{mk['marker']}': r_M {_fmt(r_m)} (p {_fmt(mk['r_m_p'], 3)})", marker_ok))

    h = mv.get("harman")
    if h:
        signals.append(("minor" if h["flag"] else "none",
                        f"Harman: first factor {h['first_factor_share']:.0%} of variance, "
                        f"{h['factors_eigen_gt_1']} eigenvalue(s) above 1", False))

    v = mv.get("collinearity_vif")
    if v and v.get("values"):
        top = max(v["values"].items(), key=lambda kv: kv[1])
        signals.append(("minor" if v["flag"] else "none", f"full-collinearity VIF: highest {top[0]} {top[1]:.2f}",
                        False))

    level = max((s[0] for s in signals), key=LEVELS.index, default="none")
    if level == "none" and not any(vouch for lv, _, vouch in signals if lv == "none"):
        level = "undetermined"
    raised = [r for lv, r, _ in signals if lv == level and lv != "none"]
    summary = {
        "none": "No check found common-method variance of a size worth naming. A pass bounds the bias; "
                "it does not prove its absence.",
        "minor": "Some checks found modest common-method variance: read the corrected estimates beside "
                 "the observed ones.",
        "substantial": "Common-method variance is substantial: same-source associations are inflated. "
                       "Lead with the corrected estimates, and prefer separating sources or times of "
                       "measurement next time.",
        "undetermined": "This survey cannot tell whether shared answering style inflates its associations: no "
                        "check that could detect it was available or could be trusted here. The bounds beside "
                        "each key path show how far the answer could move.",
    }[level]
    if level == "undetermined":
        if mv.get("marker") and not mv.get("measured_method"):
            summary += (" The marker found nothing, but nothing else in the survey can show that the marker "
                        "carries the shared method. A short measured method scale (for example a few "
                        "social-desirability items) or a second source would settle it.")
        elif not mv.get("marker") and not mv.get("measured_method"):
            summary += (" This design has neither a marker nor a measured method scale, so only the weak checks "
                        "could run: add one to the questionnaire to test for method variance properly.")
    return {
        "level": level,
        "summary": summary,
        "reasons": [f"[{lv}] {r}" for lv, r, _ in signals],
        "raised_by": raised,
        "vouching_checks": [r for lv, r, vouch in signals if vouch],
        "tests_holm_adjusted": {k: v for k, v in adj.items() if v is not None},
        "rules": RULES,
    }


def _fmt(v: float | None, digits: int = 2) -> str:
    return "n/a" if v is None else f"{v:.{digits}f}"
