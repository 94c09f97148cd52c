"""A short plain-text summary of a report, for the command line."""

from __future__ import annotations


def _num(v, fmt: str = ".2f") -> str:
    return "—" if v is None else format(v, fmt)


STATUS_MARK = {"holds": "ok", "doubtful": "??", "fails": "!!", "untestable": "--"}


def assumption_lines(report: dict) -> list[str]:
    """The assumption checks, before any estimate: they say how far the numbers can be read."""
    if not report.get("assumptions"):
        return []
    out = ["", "  checks behind the corrections (ok holds, ?? doubtful, !! fails, -- cannot be tested here):"]
    out += [f"  [{STATUS_MARK.get(a['status'], a['status'])}] {a['id']}: {a['message']}"
            for a in report["assumptions"]]
    return out


def _review_block(report: dict) -> list[str]:
    """"Review before use" at the top when report["review_needed"] (measurement/input/review.py)."""
    if not report.get("review_needed"):
        return []
    lines = ["REVIEW BEFORE USE: this report may mislead until the design is corrected"]
    for r in report.get("review_reasons") or []:
        lines += [f"  ! {r['message']}", f"    fix: {r['fix']}"]
    return lines + [""]


def review_last_line(report: dict) -> str | None:
    """The summary's last line when the report needs review, else None."""
    if not report.get("review_needed"):
        return None
    n = len(report.get("review_reasons") or [])
    return f"Review needed before use: {n} reason(s), listed at the top (report.json: review_reasons)."


def text_summary(report: dict) -> str:
    d = report["data"]
    lines = _review_block(report) + [
        f"samesource {report['tool']['version']}: {d['file']}",
        f"  rows read {d['rows']}, analysed {d['rows_analyzed']} "
        f"({d['missing_handling']['description']}), items {d['items']}",
        f"  screening flagged {report['screening']['n_flagged']} row(s) for review",
        *assumption_lines(report),
        "",
        f"  {'construct':<18}{'role':<13}{'alpha':>7}{'omega':>7}{'CR':>7}{'AVE':>7}",
    ]
    for name, c in report["constructs"].items():
        lines.append(f"  {name:<18}{c['role']:<13}{_num(c['alpha']):>7}{_num(c['omega']):>7}"
                     f"{_num(c['composite_reliability']):>7}{_num(c['ave']):>7}")
    mm = report.get("measurement_model")
    if mm:
        f = mm["fit"]
        ci = f.get("rmsea_ci") or [None, None]
        lines += ["", f"  measurement model ({mm['status']}): chi2 {_num(f['chi2'])} on {f['df']} df, "
                      f"CFI {_num(f['cfi'], '.3f')}, TLI {_num(f['tli'], '.3f')}, RMSEA {_num(f['rmsea'], '.3f')} "
                      f"[{_num(ci[0], '.3f')}, {_num(ci[1], '.3f')}], SRMR {_num(f['srmr'], '.3f')}"]
    mv = report.get("method_variance")
    if mv:
        v = mv["verdict"]
        lines += ["", f"  common-method variance: {v['level'].upper()}: {v['summary']}"]
        lines += [f"    {r}" for r in v["reasons"]]
    paths = report.get("paths") or []
    if paths:
        lines += ["", "  key paths (standardized; preferred estimate marked *):"]
        for p in paths:
            lines.append(f"  {p['outcome']} <- {p['predictor']}")
            for m, e in p["estimates"].items():
                if e is None:
                    continue
                ci = e.get("ci") or [None, None]
                mark = "*" if m == p["preferred"] else " "
                lines.append(f"   {mark}{m:<26}{_num(e['estimate'], '.3f'):>7}  "
                             f"[{_num(ci[0], '.3f')}, {_num(ci[1], '.3f')}]")
            be = p["sensitivity"].get("break_even_method_share")
            lines.append("    method share that would explain it away: "
                         + (f"{be:.0%}" if be is not None else "none within the range tested"))
            b = p.get("bounds")
            if b and b.get("low") is not None:
                lines.append(f"    bounds over plausible method shares {b['plausible_share'][0]:.2f}-"
                             f"{b['plausible_share'][1]:.2f} ({b['share_source']}): "
                             f"[{b['low']:.3f}, {b['high']:.3f}]; trust {p['trust']['level']}")
            if p.get("cannot_pin_down"):
                lines.append(f"    {p['cannot_pin_down']}")
            if (p.get("sources") or {}).get("kind") == "cross_source":
                lines.append(f"    {p['sources']['note']}")
            check = next((c for c in (report.get("correction_check") or {}).get("paths") or []
                          if (c["outcome"], c["predictor"]) == (p["outcome"], p["predictor"])), None)
            if check is not None:
                lines.append(f"    correction check: {check['lean_on_reason']}")
    for advice in (report.get("next_time") or {}).get("advice") or []:
        lines.append(f"  next time: {advice}")
    if report.get("warnings"):
        lines += ["", f"  {len(report['warnings'])} warning(s):"]
        lines += [f"  - {w['message']}" for w in report["warnings"]]
    if review_last_line(report):
        lines += ["", review_last_line(report)]
    return "\n".join(lines)
