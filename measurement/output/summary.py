"""A short plain-text summary of a report, for the command line (read from the typed report)."""

from __future__ import annotations

from collections.abc import Mapping

from samesource.output.report import Report


def _num(v, fmt: str = ".2f") -> str:
    return "—" if v is None else format(v, fmt)


STATUS_MARK = {"holds": "ok", "doubtful": "??", "fails": "!!", "untestable": "--"}


def assumption_lines(report: Report | Mapping) -> list[str]:
    """The assumption checks, before any estimate: they say how far the numbers can be read."""
    r = Report.of(report)
    if not r.assumptions:
        return []
    out = ["", "  checks behind the corrections (ok holds, ?? doubtful, !! fails, -- cannot be tested here):"]
    out += [f"  [{STATUS_MARK.get(a.status, a.status)}] {a.id}: {a.message}" for a in r.assumptions]
    return out


def _review_block(r: Report) -> list[str]:
    """"Review before use" at the top when report["review_needed"] (measurement/input/review.py)."""
    if not r.review_needed:
        return []
    lines = ["REVIEW BEFORE USE: this report may mislead until the design is corrected"]
    for reason in r.review_reasons:
        lines += [f"  ! {reason['message']}", f"    fix: {reason['fix']}"]
    return lines + [""]


def review_last_line(report: Report | Mapping) -> str | None:
    """The summary's last line when the report needs review, else None."""
    r = Report.of(report)
    if not r.review_needed:
        return None
    return (f"Review needed before use: {len(r.review_reasons)} reason(s), listed at the top "
            "(report.json: review_reasons).")


def text_summary(report: Report | Mapping) -> str:
    r = Report.of(report)
    d = r.data
    lines = _review_block(r) + [
        f"samesource {r.tool.version}: {d.file}",
        f"  rows read {d.rows}, analysed {d.rows_analyzed} "
        f"({d.missing_handling['description']}), items {d.items}",
        f"  screening flagged {r.screening.n_flagged} row(s) for review",
        *assumption_lines(r),
        "",
        f"  {'construct':<18}{'role':<13}{'alpha':>7}{'omega':>7}{'CR':>7}{'AVE':>7}",
    ]
    for name, c in r.constructs.items():
        lines.append(f"  {name:<18}{c.role:<13}{_num(c.alpha):>7}{_num(c.omega):>7}"
                     f"{_num(c.composite_reliability):>7}{_num(c.ave):>7}")
    mm = r.measurement_model
    if mm:
        f = mm.fit
        lo, hi = f.rmsea_ci or (None, None)
        lines += ["", f"  measurement model ({mm.status}): chi2 {_num(f.chi2)} on {f.df} df, "
                      f"CFI {_num(f.cfi, '.3f')}, TLI {_num(f.tli, '.3f')}, RMSEA {_num(f.rmsea, '.3f')} "
                      f"[{_num(lo, '.3f')}, {_num(hi, '.3f')}], SRMR {_num(f.srmr, '.3f')}"]
    v = r.method_variance.verdict
    if v.level is not None:
        lines += ["", f"  common-method variance: {v.level.upper()}: {v.summary}"]
        lines += [f"    {reason}" for reason in v.reasons]
    if r.paths:
        lines += ["", "  key paths (standardized; preferred estimate marked *):"]
        for p in r.paths:
            lines.append(f"  {p.outcome} <- {p.predictor}")
            for m, e in p.estimates.items():
                if e is None:
                    continue
                lo, hi = e.ci or (None, None)
                mark = "*" if m == p.preferred else " "
                lines.append(f"   {mark}{m:<26}{_num(e.estimate, '.3f'):>7}  "
                             f"[{_num(lo, '.3f')}, {_num(hi, '.3f')}]")
            be = p.sensitivity.break_even_method_share
            lines.append("    method share that would explain it away: "
                         + (f"{be:.0%}" if be is not None else "none within the range tested"))
            b = p.bounds
            if b and b.low is not None:
                lines.append(f"    bounds over plausible method shares {b.plausible_share[0]:.2f}-"
                             f"{b.plausible_share[1]:.2f} ({b.share_source}): "
                             f"[{b.low:.3f}, {b.high:.3f}]; trust {p.trust.level}")
            if p.cannot_pin_down:
                lines.append(f"    {p.cannot_pin_down}")
            if p.sources is not None and p.sources.kind == "cross_source":
                lines.append(f"    {p.sources.note}")
            check = r.correction_check.path(p.outcome, p.predictor) if r.correction_check else None
            if check is not None:
                lines.append(f"    correction check: {check.lean_on_reason}")
    for advice in r.next_time.advice if r.next_time else ():
        lines.append(f"  next time: {advice}")
    if r.warnings:
        lines += ["", f"  {len(r.warnings)} warning(s):"]
        lines += [f"  - {w.message}" for w in r.warnings]
    if review_last_line(r):
        lines += ["", review_last_line(r)]
    return "\n".join(lines)
