"""Tidy tables from a report, for analysts who rework the numbers (CSV and Excel).

:func:`report_tables` turns report.json into one long-format DataFrame per topic; the
shared helpers here (method labels, why an estimate is missing, the method-variance
check rows) are also what the HTML report prints, so both say the same thing.
A missing value is an empty cell (NaN in pandas); nothing is invented.
"""

from __future__ import annotations

import io
import re
from typing import Any

import pandas as pd

from samesource.corrections.paths import LABELS
from samesource.output.report import method_label

METHOD_LABELS = LABELS  # each correction's label (corrections/paths.py CORRECTIONS)

CHECK_LABELS = {
    "method_factor": "Latent method factor",
    "measured_method": "Measured method variable",
    "cfa_marker": "CFA marker technique",
    "marker": "Marker variable",
    "harman": "Harman single-factor test",
    "collinearity_vif": "Full-collinearity VIF",
}

LEVELS = ("none", "minor", "substantial")

SMALL_GROUP_RULE = "groups with fewer respondents than min_group_size are never shown"


def pair(report_pairs: dict | None, a: str, b: str) -> Any:
    """The value stored under "A|B" (design order) for two constructs, either way round."""
    if not report_pairs:
        return None
    return report_pairs.get(f"{a}|{b}", report_pairs.get(f"{b}|{a}"))


def split_pair(key: str) -> tuple[str, str]:
    a, _, b = key.partition("|")
    return a, b


def absent_reason(report: dict, method: str, entry: dict | None) -> str:
    """Why a path estimate is missing: the estimate's own note, else what the design lacks."""
    if entry is not None and entry.get("note"):
        return str(entry["note"])
    mv = report.get("method_variance") or {}
    if method == "marker_adjusted":
        return "the design has no marker construct" if not mv.get("marker") else "the marker adjustment could not be computed"
    if method == "method_factor_adjusted":
        mf = mv.get("method_factor") or {}
        if not mf.get("usable_as_correction"):
            return "no method factor passed its identification checks (see the common-method checks)"
        return "the method-factor model could not be estimated"
    if method == "measured_method_adjusted":
        mm = mv.get("measured_method")
        if not mm:
            return "the design has no method construct"
        return f"the measured-method model did not fit cleanly (status {mm.get('status', 'unknown')})"
    return "not computed for this design"


def meets(value: float | None, threshold: dict | None) -> bool | None:
    """Whether a value satisfies a report threshold {value, direction}; None when either is missing."""
    if value is None or not threshold or threshold.get("value") is None:
        return None
    t, d = threshold["value"], threshold.get("direction", ">=")
    return {">=": value >= t, ">": value > t, "<=": value <= t, "<": value < t}.get(d)


# --------------------------------------------------------------------------- method checks

_REASON = re.compile(r"^\[(none|minor|substantial)\]\s*(.*)$", re.S)


def _check_key(signal: str) -> str | None:
    s = signal.lower()
    for prefix, key in (("method factor", "method_factor"), ("measured method", "measured_method"),
                        ("cfa marker", "cfa_marker"), ("marker", "marker"), ("harman", "harman"),
                        ("full-collinearity", "collinearity_vif")):
        if s.startswith(prefix):
            return key
    return None


def _rule_for(key: str | None, mv: dict) -> str:
    sec = mv.get(key) if key else None
    if isinstance(sec, dict) and sec.get("rule"):
        return str(sec["rule"])
    starts = {"method_factor": "method factor", "measured_method": "method factor",
              "cfa_marker": "cfa marker", "marker": "marker correlation", "harman": "harman",
              "collinearity_vif": "full-collinearity"}.get(key or "")
    rules = (mv.get("verdict") or {}).get("rules") or []
    return next((str(r) for r in rules if starts and str(r).lower().startswith(starts)), "")


def method_check_rows(report: dict) -> list[dict]:
    """One row per signal the verdict weighed: check, signal, value, test p, rule, level, flag."""
    mv = report.get("method_variance") or {}
    verdict = mv.get("verdict") or {}
    rows = []
    for reason in verdict.get("reasons") or []:
        m = _REASON.match(str(reason))
        level, signal = (m.group(1), m.group(2)) if m else (None, str(reason))
        key = _check_key(signal)
        sec = mv.get(key) if key else None
        sec = sec if isinstance(sec, dict) else {}
        value, value_name, p = None, None, None
        if key in ("method_factor", "measured_method"):
            value, value_name = sec.get("method_share"), "method share"
            p = ((sec.get("tests") or {}).get("method_vs_none") or {}).get("p")
        elif key == "cfa_marker":
            tests = sec.get("tests") or {}
            if "correlations change" in signal:
                held = next((v for k, v in tests.items() if k.endswith("_vs_held")), None) or {}
                value, value_name, p = held.get("chi2_diff"), "chi-square difference", held.get("p")
            else:
                value, value_name = sec.get("method_share_overall"), "method share"
                p = (tests.get("baseline_vs_equal") or {}).get("p")
        elif key == "marker":
            value, value_name, p = sec.get("r_m"), "r_M", sec.get("r_m_p")
        elif key == "harman":
            # the rule reads the first factor's share and the eigenvalues, not a test
            value, value_name = sec.get("first_factor_share"), "first-factor share"
        elif key == "collinearity_vif":
            vals = [v for v in (sec.get("values") or {}).values() if v is not None]
            value, value_name = (max(vals) if vals else None), "highest VIF"
        rows.append({"check": CHECK_LABELS.get(key, "check") if key else "check", "check_key": key,
                     "signal": signal, "value_name": value_name, "value": value, "test_p": p,
                     "rule": _rule_for(key, mv), "level": level,
                     "flag": sec.get("flag") if "flag" in sec else None})
    return rows


# --------------------------------------------------------------------------- teams

def visible_groups(teams: dict) -> list[dict]:
    """Group scores with at least min_group_size respondents; smaller groups are never shown."""
    k = teams.get("min_group_size")
    out = []
    for g in teams.get("group_scores") or []:
        n = g.get("n")
        if k is None or n is None or n < k:
            continue  # unknown size or below the minimum: not shown
        out.append(g)
    return out


# --------------------------------------------------------------------------- the tables

def report_tables(report: dict) -> dict[str, pd.DataFrame]:
    """Every table of the report in long (tidy) form; the first is the cautions."""
    t: dict[str, pd.DataFrame] = {}
    t["cautions"] = pd.DataFrame({"number": range(1, len(report.get("cautions") or []) + 1),
                                  "caution": list(report.get("cautions") or [])})
    th = report.get("thresholds") or {}
    constructs = report.get("constructs") or {}

    rows = []
    for name, c in constructs.items():
        ci = c.get("alpha_ci") or [None, None]
        rows.append({"construct": name, "role": c.get("role"), "n_items": len(c.get("items") or []),
                     "n": c.get("n"), "alpha": c.get("alpha"), "alpha_ci_lo": ci[0], "alpha_ci_hi": ci[1],
                     "omega": c.get("omega"), "composite_reliability": c.get("composite_reliability"),
                     "ave": c.get("ave"),
                     "alpha_meets": meets(c.get("alpha"), th.get("alpha")),
                     "omega_meets": meets(c.get("omega"), th.get("omega")),
                     "cr_meets": meets(c.get("composite_reliability"), th.get("composite_reliability")),
                     "ave_meets": meets(c.get("ave"), th.get("ave"))})
    t["constructs"] = _frame(rows, ["construct", "role", "n_items", "n", "alpha", "alpha_ci_lo", "alpha_ci_hi",
                                    "omega", "composite_reliability", "ave", "alpha_meets", "omega_meets",
                                    "cr_meets", "ave_meets"])

    rows = []
    for name, c in constructs.items():
        reverse = set(c.get("reverse") or [])
        stats = c.get("item_stats") or {}
        for item in c.get("items") or list(stats):
            s = stats.get(item) or {}
            rows.append({"construct": name, "item": item, "reverse_keyed": item in reverse,
                         "loading": s.get("loading"), "loading_meets": meets(s.get("loading"), th.get("loading")),
                         "item_rest_r": s.get("item_rest_r"), "alpha_if_deleted": s.get("alpha_if_deleted"),
                         "mean": s.get("mean"), "sd": s.get("sd")})
    t["items"] = _frame(rows, ["construct", "item", "reverse_keyed", "loading", "loading_meets", "item_rest_r",
                               "alpha_if_deleted", "mean", "sd"])

    mm = report.get("measurement_model") or {}
    fit = mm.get("fit") or {}
    rows = []
    for key, label in (("chi2", "chi-square"), ("df", "degrees of freedom"), ("p", "p"), ("cfi", "CFI"),
                       ("tli", "TLI"), ("rmsea", "RMSEA"), ("rmsea_ci_lo", "RMSEA 90% CI lower"),
                       ("rmsea_ci_hi", "RMSEA 90% CI upper"), ("srmr", "SRMR"), ("n", "N")):
        if key.startswith("rmsea_ci"):
            ci = fit.get("rmsea_ci") or [None, None]
            v = ci[0] if key.endswith("lo") else ci[1]
        else:
            v = fit.get(key)
        thr = th.get(key) or {}
        rows.append({"measure": key, "label": label, "value": v, "threshold": thr.get("value"),
                     "direction": thr.get("direction"), "meets": meets(v, thr) if thr else None,
                     "source": thr.get("source")})
    t["fit"] = _frame(rows if fit else [], ["measure", "label", "value", "threshold", "direction", "meets", "source"])

    t["factor_correlations"] = _frame(
        [{"construct_a": a, "construct_b": b, "r": v}
         for (a, b), v in ((split_pair(k), v) for k, v in (mm.get("factor_correlations") or {}).items())],
        ["construct_a", "construct_b", "r"])
    t["htmt"] = _frame(
        [{"construct_a": a, "construct_b": b, "htmt": v,
          "below_strict": meets(v, th.get("htmt_strict")), "below_liberal": meets(v, th.get("htmt_liberal"))}
         for (a, b), v in ((split_pair(k), v) for k, v in (mm.get("htmt") or {}).items())],
        ["construct_a", "construct_b", "htmt", "below_strict", "below_liberal"])
    t["fornell_larcker"] = _frame(
        [{"construct_a": a, "construct_b": b, "r_squared": v.get("r_squared"), "ave_a": v.get("ave_a"),
          "ave_b": v.get("ave_b"), "holds": v.get("holds")}
         for (a, b), v in ((split_pair(k), v or {}) for k, v in (mm.get("fornell_larcker") or {}).items())],
        ["construct_a", "construct_b", "r_squared", "ave_a", "ave_b", "holds"])

    verdict = (report.get("method_variance") or {}).get("verdict") or {}
    t["method_checks"] = _frame(
        [{k: r[k] for k in ("check", "signal", "value_name", "value", "test_p", "rule", "level", "flag")}
         for r in method_check_rows(report)]
        + ([{"check": "verdict", "signal": verdict.get("summary"), "level": verdict.get("level")}] if verdict else []),
        ["check", "signal", "value_name", "value", "test_p", "rule", "level", "flag"])

    paths = report.get("paths") or []
    rows, sens, summ = [], [], []
    for p in paths:
        for method, e in (p.get("estimates") or {}).items():
            ci = (e or {}).get("ci") or [None, None]
            b = (e or {}).get("bootstrap") or {}
            pct = b.get("ci_percentile") or [None, None]
            bca = b.get("ci_bca") or [None, None]
            available = bool(e) and e.get("estimate") is not None
            rows.append({"outcome": p.get("outcome"), "predictor": p.get("predictor"), "method": method,
                         "label": method_label(method), "estimate": (e or {}).get("estimate"),
                         "se": (e or {}).get("se"), "ci_lo": ci[0], "ci_hi": ci[1], "p": (e or {}).get("p"),
                         "ci_method": (e or {}).get("ci_method"), "status": (e or {}).get("status", "absent"),
                         "preferred": method == p.get("preferred"),
                         "note": (e or {}).get("note") if available else absent_reason(report, method, e),
                         "n_boot": b.get("n_boot"), "boot_failed": b.get("n_failed"),
                         "ci_percentile_lo": pct[0], "ci_percentile_hi": pct[1],
                         "ci_bca_lo": bca[0], "ci_bca_hi": bca[1]})
        s = p.get("sensitivity") or {}
        for pt in s.get("curve") or []:
            ci = pt.get("ci") or [None, None]
            sens.append({"outcome": p.get("outcome"), "predictor": p.get("predictor"),
                         "method_share": pt.get("method_share"), "estimate": pt.get("estimate"),
                         "ci_lo": ci[0], "ci_hi": ci[1]})
        summ.append({"outcome": p.get("outcome"), "predictor": p.get("predictor"),
                     "break_even_method_share": s.get("break_even_method_share"),
                     "ci_covers_zero_at": s.get("ci_covers_zero_at"),
                     "estimated_method_share": s.get("estimated_method_share"),
                     "model_holds_up_to": s.get("model_holds_up_to")})
    t["paths"] = _frame(rows, ["outcome", "predictor", "method", "label", "estimate", "se", "ci_lo", "ci_hi", "p",
                               "ci_method", "status", "preferred", "note", "n_boot", "boot_failed",
                               "ci_percentile_lo", "ci_percentile_hi", "ci_bca_lo", "ci_bca_hi"])
    t["sensitivity"] = _frame(sens, ["outcome", "predictor", "method_share", "estimate", "ci_lo", "ci_hi"])
    t["sensitivity_summary"] = _frame(summ, ["outcome", "predictor", "break_even_method_share", "ci_covers_zero_at",
                                             "estimated_method_share", "model_holds_up_to"])

    sc = report.get("screening") or {}
    t["screening"] = _frame([{"row": f.get("row"), "reasons": "; ".join(f.get("reasons") or [])}
                             for f in sc.get("flagged_rows") or []], ["row", "reasons"])
    t["screening_rules"] = _frame([{"check": k, "rule": v.get("rule"), "flagged": v.get("flagged")}
                                   for k, v in (sc.get("checks") or {}).items()], ["check", "rule", "flagged"])
    t["warnings"] = _frame([{"code": w.get("code"), "message": w.get("message")}
                            for w in report.get("warnings") or []], ["code", "message"])

    _source_tables(report, t)

    teams = report.get("teams")
    if isinstance(teams, dict):
        groups = visible_groups(teams)
        names = list(dict.fromkeys(k for g in groups for k in g))
        t["teams"] = _frame([dict(g) for g in groups], names or ["group", "n"])
        t["team_constructs"] = _frame(
            [{"construct": k, **(v or {})} for k, v in (teams.get("constructs") or {}).items()],
            ["construct", "icc1", "icc2", "rwg_j_median"])
        t["team_paths"] = _frame([flatten(tp) for tp in teams.get("paths") or []], ["outcome", "predictor"])
    return t


def _source_tables(report: dict, t: dict[str, pd.DataFrame]) -> None:
    """The second sources' joins, the cross-source comparisons and the correction check, when
    the report has them (measurement/input/sources.py, source_paths.py, correction_check.py)."""
    sources = (report.get("data") or {}).get("sources")
    if sources:
        t["sources"] = _frame([{k: v for k, v in flatten(s).items() if not k.startswith("examples")}
                               for s in sources.values()], ["name", "file", "rows", "matched"])
    rows = []
    for p in report.get("paths") or []:
        c = p.get("cross_source_check")
        if not c:
            continue
        b = c.get("benchmark") or {}
        for m, e in (c.get("by_estimate") or {}).items():
            rows.append({"outcome": p["outcome"], "predictor": p["predictor"],
                         "counterpart_outcome": c["counterpart"]["outcome"],
                         "counterpart_predictor": c["counterpart"]["predictor"], "method": m,
                         "estimate": e.get("estimate"), "benchmark_method": b.get("method"),
                         "benchmark": b.get("estimate"), "difference": e.get("difference"),
                         "within_benchmark_ci": e.get("within_benchmark_ci"), "closest": m == c.get("closest")})
    if rows:
        t["cross_source"] = _frame(rows, list(rows[0]))
    check = report.get("correction_check") or {}
    rows = [{"outcome": p["outcome"], "predictor": p["predictor"], "truth": p["truth"], "scenario": sid, "method": m,
             **e, "lean_on": m == p.get("lean_on")}
            for p in check.get("paths") or [] for sid, per in (p.get("scenarios") or {}).items()
            for m, e in per.items()]
    if rows:
        t["correction_check"] = _frame(rows, list(rows[0]))


def flatten(d: dict, prefix: str = "") -> dict:
    """Nested dicts and [lo, hi] pairs as flat columns ("within_estimate", "within_ci_lo")."""
    out: dict = {}
    for k, v in d.items():
        name = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(flatten(v, f"{name}_"))
        elif isinstance(v, list | tuple) and len(v) == 2 and all(x is None or isinstance(x, int | float) for x in v):
            out[f"{name}_lo"], out[f"{name}_hi"] = v
        elif isinstance(v, list | tuple):
            out[name] = "; ".join(str(x) for x in v)
        else:
            out[name] = v
    return out


def _frame(rows: list[dict], columns: list[str]) -> pd.DataFrame:
    """A DataFrame with a fixed column order, also when there are no rows (same shape every time)."""
    extra = [k for r in rows for k in r if k not in columns]
    return pd.DataFrame(rows, columns=columns + list(dict.fromkeys(extra)))


# A text cell starting with one of these is run as a formula when a spreadsheet opens the CSV
# (OWASP, "CSV Injection"); construct, item and team names come from users' files.
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _text_safe(value: Any) -> Any:
    """Text that a spreadsheet would read as a formula, behind a leading apostrophe; numbers as they are."""
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value


def tables_csv(tables: dict[str, pd.DataFrame]) -> dict[str, str]:
    """File name -> CSV text (UTF-8, header row, no index).

    Text cells and headers that would start a spreadsheet formula get a leading apostrophe;
    numeric columns are untouched (a negative estimate stays a number).
    """
    out = {}
    for name, df in tables.items():
        safe = df.rename(columns=_text_safe)
        for col in safe.columns:
            if not (pd.api.types.is_numeric_dtype(safe[col]) or pd.api.types.is_bool_dtype(safe[col])):
                safe[col] = safe[col].map(_text_safe)
        out[f"{_safe_name(name)}.csv"] = safe.to_csv(index=False, lineterminator="\n")
    return out


def tables_xlsx(tables: dict[str, pd.DataFrame]) -> bytes:
    """One sheet per table, "cautions" first; names cut to Excel's 31 characters."""
    order = ["cautions"] + [n for n in tables if n != "cautions"]
    buf = io.BytesIO()
    used: set[str] = set()
    with pd.ExcelWriter(buf, engine="openpyxl") as writer:
        for name in order:
            df = tables.get(name)
            if df is None:
                df = pd.DataFrame({"caution": []})
            sheet = _sheet_name(name, used)
            df.to_excel(writer, sheet_name=sheet, index=False)
            ws = writer.sheets[sheet]
            for row in ws.iter_rows():
                for cell in row:
                    # Text from users (construct and item names) must stay text: a leading "="
                    # would otherwise become a live spreadsheet formula.
                    if cell.data_type == "f":
                        cell.data_type = "s"
            for col in ws.columns:
                width = max((len(str(c.value)) for c in col if c.value is not None), default=8)
                ws.column_dimensions[col[0].column_letter].width = min(max(width + 2, 8), 80)
    return buf.getvalue()


def _safe_name(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name) or "table"


def _sheet_name(name: str, used: set[str]) -> str:
    base = re.sub(r"[\[\]:*?/\\]", "_", name)[:31] or "sheet"
    out, i = base, 2
    while out.lower() in used:
        suffix = f"_{i}"
        out, i = base[: 31 - len(suffix)] + suffix, i + 1
    used.add(out.lower())
    return out


__all__ = ["METHOD_LABELS", "absent_reason", "meets", "method_check_rows", "method_label", "pair",
           "report_tables", "tables_csv", "tables_xlsx", "visible_groups"]
