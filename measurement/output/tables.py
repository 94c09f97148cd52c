"""Tidy tables from a report, for analysts who rework the numbers (CSV and Excel).

:func:`report_tables` turns report.json into one long-format DataFrame per topic; the
shared helpers here (method labels, why an estimate is missing, the method-variance
check rows) are also what the HTML report prints, so both say the same thing.
A missing value is an empty cell (NaN in pandas); nothing is invented.
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterable, Mapping
from dataclasses import fields, is_dataclass
from typing import Any

import pandas as pd

from samesource.corrections.paths import LABELS
from samesource.output.report import (
    NO_BENCHMARK,
    NO_CHECK,
    NO_COUNTERPART,
    Estimate,
    FornellLarcker,
    GroupScore,
    ItemStats,
    MethodVariance,
    ModelTest,
    Pair,
    Report,
    Teams,
    Threshold,
    method_label,
)

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


def pair(pairs: Mapping[Pair, Any] | None, a: str, b: str) -> Any:
    """The value stored for two constructs ((A, B) in design order), either way round."""
    if not pairs:
        return None
    # .get: either order, and a pair the report lacks reads as None
    return pairs.get((a, b), pairs.get((b, a)))


def split_pair(key: str) -> tuple[str, str]:
    a, _, b = key.partition("|")
    return a, b


def absent_reason(report: Report | Mapping, method: str, entry: Estimate | None) -> str:
    """Why a path estimate is missing: the estimate's own note, else what the design lacks."""
    if entry is not None and entry.note:
        return str(entry.note)
    mv = Report.of(report).method_variance
    if method == "marker_adjusted":
        return "the design has no marker construct" if not mv.check("marker") else "the marker adjustment could not be computed"
    if method == "method_factor_adjusted":
        mf = mv.check("method_factor")
        if mf is None or not mf.usable_as_correction:
            return "no method factor passed its identification checks (see the common-method checks)"
        return "the method-factor model could not be estimated"
    if method == "measured_method_adjusted":
        mm = mv.check("measured_method")
        if mm is None:
            return "the design has no method construct"
        return f"the measured-method model did not fit cleanly (status {mm.status or 'unknown'})"
    return "not computed for this design"


def meets(value: float | None, threshold: Threshold | None) -> bool | None:
    """Whether a value satisfies a report threshold (value, direction); None when either is missing."""
    if value is None or threshold is None or threshold.value is None:
        return None
    t, d = threshold.value, threshold.direction or ">="
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


def _rule_for(key: str | None, mv: MethodVariance) -> str:
    sec = mv.check(key) if key else None
    if sec is not None and sec.rule:
        return str(sec.rule)
    starts = {"method_factor": "method factor", "measured_method": "method factor",
              "cfa_marker": "cfa marker", "marker": "marker correlation", "harman": "harman",
              "collinearity_vif": "full-collinearity"}.get(key or "")
    rules = mv.verdict.rules or ()
    return next((str(r) for r in rules if starts and str(r).lower().startswith(starts)), "")


def _p(test: ModelTest | None) -> float | None:
    return test.p if test is not None else None


def method_check_rows(report: Report | Mapping) -> list[dict]:
    """One row per signal the verdict weighed: check, signal, value, test p, rule, level, flag."""
    mv = Report.of(report).method_variance
    rows = []
    for reason in mv.verdict.reasons or ():
        m = _REASON.match(str(reason))
        level, signal = (m.group(1), m.group(2)) if m else (None, str(reason))
        key = _check_key(signal)
        sec = (mv.check(key) if key else None) or NO_CHECK
        value, value_name, p = None, None, None
        if key in ("method_factor", "measured_method"):
            value, value_name = sec.method_share, "method share"
            # .get on tests: a test the check did not run reads as None
            p = _p(sec.tests.get("method_vs_none"))
        elif key == "cfa_marker":
            if "correlations change" in signal:
                held = next((t for k, t in sec.tests.items() if k.endswith("_vs_held")), None)
                value, value_name, p = (held.chi2_diff if held else None), "chi-square difference", _p(held)
            else:
                value, value_name = sec.method_share_overall, "method share"
                p = _p(sec.tests.get("baseline_vs_equal"))
        elif key == "marker":
            value, value_name, p = sec.r_m, "r_M", sec.r_m_p
        elif key == "harman":
            # the rule reads the first factor's share and the eigenvalues, not a test
            value, value_name = sec.first_factor_share, "first-factor share"
        elif key == "collinearity_vif":
            vals = [v for v in (sec.values or {}).values() if v is not None]
            value, value_name = (max(vals) if vals else None), "highest VIF"
        rows.append({"check": CHECK_LABELS.get(key, "check") if key else "check", "check_key": key,
                     "signal": signal, "value_name": value_name, "value": value, "test_p": p,
                     "rule": _rule_for(key, mv), "level": level, "flag": sec.flag})
    return rows


# --------------------------------------------------------------------------- teams

def visible_groups(teams: Teams) -> tuple[GroupScore, ...]:
    """Group scores with at least min_group_size respondents; smaller groups are never shown."""
    return teams.visible_groups


# --------------------------------------------------------------------------- the tables

def _lo_hi(pair_: Any) -> tuple[Any, Any]:
    return (pair_[0], pair_[1]) if pair_ else (None, None)


def report_tables(report: Report | Mapping) -> dict[str, pd.DataFrame]:
    """Every table of the report in long (tidy) form; the first is the cautions."""
    r = Report.of(report)
    t: dict[str, pd.DataFrame] = {}
    t["cautions"] = pd.DataFrame({"number": range(1, len(r.cautions) + 1), "caution": list(r.cautions)})
    th = r.thresholds

    rows = []
    for name, c in r.constructs.items():
        lo, hi = _lo_hi(c.alpha_ci)
        rows.append({"construct": name, "role": c.role, "n_items": len(c.items or ()),
                     "n": c.n, "alpha": c.alpha, "alpha_ci_lo": lo, "alpha_ci_hi": hi,
                     "omega": c.omega, "composite_reliability": c.composite_reliability,
                     "ave": c.ave,
                     # .get on thresholds, here and below: a threshold the report lacks leaves its column empty
                     "alpha_meets": meets(c.alpha, th.get("alpha")),
                     "omega_meets": meets(c.omega, th.get("omega")),
                     "cr_meets": meets(c.composite_reliability, th.get("composite_reliability")),
                     "ave_meets": meets(c.ave, th.get("ave"))})
    t["constructs"] = _frame(rows, ["construct", "role", "n_items", "n", "alpha", "alpha_ci_lo", "alpha_ci_hi",
                                    "omega", "composite_reliability", "ave", "alpha_meets", "omega_meets",
                                    "cr_meets", "ave_meets"])

    rows = []
    for name, c in r.constructs.items():
        reverse = set(c.reverse or ())
        for item in c.items or tuple(c.item_stats):
            # .get: an item without statistics gives empty cells
            s = c.item_stats.get(item) or ItemStats(None, None, None, None, None)
            rows.append({"construct": name, "item": item, "reverse_keyed": item in reverse,
                         "loading": s.loading, "loading_meets": meets(s.loading, th.get("loading")),
                         "item_rest_r": s.item_rest_r, "alpha_if_deleted": s.alpha_if_deleted,
                         "mean": s.mean, "sd": s.sd})
    t["items"] = _frame(rows, ["construct", "item", "reverse_keyed", "loading", "loading_meets", "item_rest_r",
                               "alpha_if_deleted", "mean", "sd"])

    mm = r.measurement_model
    fit = mm.fit if mm is not None else None
    rows = []
    for key, label in (("chi2", "chi-square"), ("df", "degrees of freedom"), ("p", "p"), ("cfi", "CFI"),
                       ("tli", "TLI"), ("rmsea", "RMSEA"), ("rmsea_ci_lo", "RMSEA 90% CI lower"),
                       ("rmsea_ci_hi", "RMSEA 90% CI upper"), ("srmr", "SRMR"), ("n", "N")):
        if fit is None:
            break
        if key.startswith("rmsea_ci"):
            lo, hi = _lo_hi(fit.rmsea_ci)
            v = lo if key.endswith("lo") else hi
        else:
            v = getattr(fit, key)
        thr = th.get(key)
        rows.append({"measure": key, "label": label, "value": v, "threshold": thr.value if thr else None,
                     "direction": thr.direction if thr else None, "meets": meets(v, thr) if thr else None,
                     "source": thr.source if thr else None})
    t["fit"] = _frame(rows, ["measure", "label", "value", "threshold", "direction", "meets", "source"])

    t["factor_correlations"] = _frame(
        [{"construct_a": a, "construct_b": b, "r": v}
         for (a, b), v in (mm.factor_correlations.items() if mm else ())],
        ["construct_a", "construct_b", "r"])
    t["htmt"] = _frame(
        [{"construct_a": a, "construct_b": b, "htmt": v,
          "below_strict": meets(v, th.get("htmt_strict")), "below_liberal": meets(v, th.get("htmt_liberal"))}
         for (a, b), v in (mm.htmt.items() if mm else ())],
        ["construct_a", "construct_b", "htmt", "below_strict", "below_liberal"])
    no_fl = FornellLarcker(None, None, None, None)
    t["fornell_larcker"] = _frame(
        [{"construct_a": a, "construct_b": b, "r_squared": v.r_squared, "ave_a": v.ave_a,
          "ave_b": v.ave_b, "holds": v.holds}
         for (a, b), v in ((k, v or no_fl) for k, v in (mm.fornell_larcker.items() if mm else ()))],
        ["construct_a", "construct_b", "r_squared", "ave_a", "ave_b", "holds"])

    verdict = r.method_variance.verdict
    has_verdict = verdict.given
    t["method_checks"] = _frame(
        [{k: row[k] for k in ("check", "signal", "value_name", "value", "test_p", "rule", "level", "flag")}
         for row in method_check_rows(r)]
        + ([{"check": "verdict", "signal": verdict.summary, "level": verdict.level}] if has_verdict else []),
        ["check", "signal", "value_name", "value", "test_p", "rule", "level", "flag"])

    rows, sens, summ = [], [], []
    for p in r.paths:
        for method, e in p.estimates.items():
            lo, hi = _lo_hi(e.ci if e else None)
            b = e.bootstrap if e else None
            pct_lo, pct_hi = _lo_hi(b.ci_percentile if b else None)
            bca_lo, bca_hi = _lo_hi(b.ci_bca if b else None)
            available = e is not None and e.estimate is not None
            rows.append({"outcome": p.outcome, "predictor": p.predictor, "method": method,
                         "label": method_label(method), "estimate": e.estimate if e else None,
                         "se": e.se if e else None, "ci_lo": lo, "ci_hi": hi, "p": e.p if e else None,
                         "ci_method": e.ci_method if e else None, "status": e.status if e else "absent",
                         "preferred": method == p.preferred,
                         "note": e.note if available else absent_reason(r, method, e),
                         "n_boot": b.n_boot if b else None, "boot_failed": b.n_failed if b else None,
                         "ci_percentile_lo": pct_lo, "ci_percentile_hi": pct_hi,
                         "ci_bca_lo": bca_lo, "ci_bca_hi": bca_hi})
        s = p.sensitivity
        for pt in s.curve if s else ():
            lo, hi = _lo_hi(pt.ci)
            sens.append({"outcome": p.outcome, "predictor": p.predictor,
                         "method_share": pt.method_share, "estimate": pt.estimate,
                         "ci_lo": lo, "ci_hi": hi})
        summ.append({"outcome": p.outcome, "predictor": p.predictor,
                     "break_even_method_share": s.break_even_method_share if s else None,
                     "ci_covers_zero_at": s.ci_covers_zero_at if s else None,
                     "estimated_method_share": s.estimated_method_share if s else None,
                     "model_holds_up_to": s.model_holds_up_to if s else None})
    t["paths"] = _frame(rows, ["outcome", "predictor", "method", "label", "estimate", "se", "ci_lo", "ci_hi", "p",
                               "ci_method", "status", "preferred", "note", "n_boot", "boot_failed",
                               "ci_percentile_lo", "ci_percentile_hi", "ci_bca_lo", "ci_bca_hi"])
    t["sensitivity"] = _frame(sens, ["outcome", "predictor", "method_share", "estimate", "ci_lo", "ci_hi"])
    t["sensitivity_summary"] = _frame(summ, ["outcome", "predictor", "break_even_method_share", "ci_covers_zero_at",
                                             "estimated_method_share", "model_holds_up_to"])

    sc = r.screening
    t["screening"] = _frame([{"row": f.row, "reasons": "; ".join(f.reasons or ())} for f in sc.flagged_rows],
                            ["row", "reasons"])
    t["screening_rules"] = _frame([{"check": k, "rule": v.rule, "flagged": v.flagged} for k, v in sc.checks.items()],
                                  ["check", "rule", "flagged"])
    t["warnings"] = _frame([{"code": w.code, "message": w.message} for w in r.warnings], ["code", "message"])

    _source_tables(r, t)

    teams = r.teams
    if teams is not None:
        rows = [g.row() for g in teams.visible_groups]
        t["teams"] = _frame(rows, list(dict.fromkeys(k for row in rows for k in row)) or ["group", "n"])
        t["team_constructs"] = _frame(
            [{"construct": k, **(flatten(v) if v else {})} for k, v in teams.constructs.items()],
            ["construct", "icc1", "icc2", "rwg_j_median"])
        t["team_paths"] = _frame([flatten(tp) for tp in teams.paths], ["outcome", "predictor"])
    return t


def _source_tables(report: Report, t: dict[str, pd.DataFrame]) -> None:
    """The second sources' joins, the cross-source comparisons and the correction check, when
    the report has them (measurement/input/sources.py, source_paths.py, correction_check.py)."""
    sources = report.data.sources
    if sources:
        t["sources"] = _frame([{k: v for k, v in flatten(s).items() if not k.startswith("examples")}
                               for s in sources.values() if s is not None], ["name", "file", "rows", "matched"])
    rows = []
    for p in report.paths:
        c = p.cross_source_check
        if c is None:
            continue
        b, cp = c.benchmark or NO_BENCHMARK, c.counterpart or NO_COUNTERPART
        for m, e in c.by_estimate.items():
            rows.append({"outcome": p.outcome, "predictor": p.predictor,
                         "counterpart_outcome": cp.outcome, "counterpart_predictor": cp.predictor, "method": m,
                         "estimate": e.estimate, "benchmark_method": b.method,
                         "benchmark": b.estimate, "difference": e.difference,
                         "within_benchmark_ci": e.within_benchmark_ci, "closest": m == c.closest})
    if rows:
        t["cross_source"] = _frame(rows, list(rows[0]))
    check = report.correction_check
    rows = [{"outcome": p.outcome, "predictor": p.predictor, "truth": p.truth, "scenario": sid, "method": m,
             **(e or {}), "lean_on": m == p.lean_on}
            for p in (check.paths if check else ()) for sid, per in p.scenarios.items() for m, e in per.items()]
    if rows:
        t["correction_check"] = _frame(rows, list(rows[0]))


def flatten(d: Any, prefix: str = "") -> dict:
    """A typed result (or a mapping) as flat columns, one per field in field order: nested
    results and mappings as prefixed columns, [lo, hi] pairs as two ("within_estimate",
    "split_source_ci_lo"), other lists joined with "; "."""
    out: dict = {}
    intervals = _interval_fields(d)
    for k, v in _fields_of(d):
        name = f"{prefix}{k}"
        if v is None and k in intervals:  # no interval: still its two columns, so every row has the same ones
            out[f"{name}_lo"] = out[f"{name}_hi"] = None
        elif isinstance(v, Mapping) or is_dataclass(v):
            out.update(flatten(v, f"{name}_"))
        elif isinstance(v, list | tuple) and len(v) == 2 and all(x is None or isinstance(x, int | float) for x in v):
            out[f"{name}_lo"], out[f"{name}_hi"] = v
        elif isinstance(v, list | tuple):
            out[name] = "; ".join(str(x) for x in v)
        else:
            out[name] = v
    return out


def _interval_fields(d: Any) -> set[str]:
    """A typed result's fields that hold a [lo, hi] pair or None (annotated ``tuple[float ...``)."""
    if not is_dataclass(d):
        return set()
    return {f.name for f in fields(d) if str(f.type).startswith("tuple[float")}


def _fields_of(d: Any) -> Iterable[tuple[str, Any]]:
    if isinstance(d, Mapping):
        return d.items()
    return ((f.name, getattr(d, f.name)) for f in fields(d))


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
