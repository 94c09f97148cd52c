"""The client's report: one self-contained HTML5 page made from report.json.

:func:`render_html` takes the report dict and returns the page as a string: inline CSS, inline
SVG figures (:mod:`measurement.svg`), nothing fetched from anywhere, printable, readable on a
phone. It leads with the answer (each key path, observed against the preferred corrected
estimate, and the common-method verdict), shows the cautions in full right after it, then
the evidence. Every number printed is a report.json value passed through the formatters
below; a value the report lacks is printed as a dash or "not available" with the reason.
Every string from the report is HTML-escaped: construct and item names come from users.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from html import escape
from typing import Any

from . import svg
from .tables import (
    CHECK_LABELS,
    absent_reason,
    meets,
    method_check_rows,
    method_label,
    pair,
    visible_groups,
)

DASH = "\u2014"
MINUS = "\u2212"
PASS = "\u2713"
FAIL = "\u2717"
DIRECTION = {">=": "\u2265", "<=": "\u2264", "<": "<", ">": ">"}
SEP = " \u00b7 "
CI_METHOD = {"wald": "analytic (Wald)", "bca": "bootstrap BCa", "percentile": "bootstrap percentile"}


# --------------------------------------------------------------------------- formatting

def h(s: Any) -> str:
    """Escaped text; a missing value becomes a dash, never the word for nothing."""
    if s is None:
        return DASH
    if isinstance(s, bool):
        return "yes" if s else "no"
    if isinstance(s, float):
        return num(s)
    return escape(str(s), quote=True)


def _finite(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def num(v: Any, d: int = 3) -> str:
    """A number with ``d`` decimals and a true minus sign; a dash when there is none."""
    if not _finite(v):
        return DASH
    s = f"{v:.{d}f}"
    if float(s) == 0:
        s = s.lstrip("-")  # no "-0.000"
    return s.replace("-", MINUS)


def signed(v: Any, d: int = 3) -> str:
    s = num(v, d)
    return s if s == DASH or s.startswith(MINUS) or float(s) == 0 else "+" + s


def pct(v: Any, d: int = 1) -> str:
    return DASH if not _finite(v) else num(v * 100, d) + "%"


def pval(p: Any) -> str:
    if not _finite(p):
        return DASH
    return "< 0.001" if p < 0.001 else f"{p:.3f}"


def count(n: Any) -> str:
    if not _finite(n):
        return DASH
    return f"{int(n):,}" if float(n).is_integer() else num(n, 2)


def interval(ci: Any, d: int = 3) -> str:
    if not isinstance(ci, list | tuple) or len(ci) != 2 or not all(_finite(x) for x in ci):
        return DASH
    return f"[{num(ci[0], d)}, {num(ci[1], d)}]"


def est_ci(e: dict | None) -> str:
    """The estimate and its interval as the report prints them: "0.293 [0.233, 0.354]"."""
    if not e or not _finite(e.get("estimate")):
        return DASH
    ci = e.get("ci")
    return num(e["estimate"]) + (" " + interval(ci) if interval(ci) != DASH else " (no interval)")


def threshold_text(th: dict | None, d: int = 2) -> str:
    if not th or not _finite(th.get("value")):
        return ""
    return f"{DIRECTION.get(th.get('direction', '>='), th.get('direction', ''))} {num(th['value'], d)}"


def mark(ok: bool | None, fail_word: str = "below threshold", ok_word: str = "meets threshold") -> str:
    """A pass/fail symbol with words for screen readers: meaning never by colour alone."""
    if ok is None:
        return ""
    if ok:
        return f' <span class="mark ok" aria-hidden="true">{PASS}</span><span class="sr-only">({ok_word})</span>'
    return f' <span class="mark bad" aria-hidden="true">{FAIL}</span><span class="sr-only">({fail_word})</span>'


def _get(d: Any, *keys: str) -> Any:
    for k in keys:
        if not isinstance(d, dict):
            return None
        d = d.get(k)
    return d


def _conf(report: dict) -> str:
    c = _get(report, "options", "confidence")
    return f"{c * 100:.0f}%" if _finite(c) else "95%"


# --------------------------------------------------------------------------- HTML building blocks

def table(head: Sequence[str], rows: Iterable[Sequence[str]], *, caption: str, numeric: Sequence[int] = (),
          row_header: bool = True, row_classes: Sequence[str] | None = None, cls: str = "",
          span_short: bool = False) -> str:
    """A table with a caption and scoped headers; cells are markup (escape before)."""
    numeric = set(numeric)
    th = "".join(f'<th scope="col"{" class=num" if i in numeric else ""}>{c}</th>' for i, c in enumerate(head))
    body = []
    for r_i, row in enumerate(rows):
        cells = []
        short = span_short and len(row) < len(head)
        for i, c in enumerate(row):
            attr = ' class="num"' if i in numeric and not short else ""
            if short and i == len(row) - 1:
                attr += f' colspan="{len(head) - i}"'
            if i == 0 and row_header:
                cells.append(f'<th scope="row"{attr}>{c}</th>')
            else:
                cells.append(f"<td{attr}>{c}</td>")
        rc = f' class="{row_classes[r_i]}"' if row_classes and row_classes[r_i] else ""
        body.append(f"<tr{rc}>{''.join(cells)}</tr>")
    if not body:
        body.append(f'<tr><td colspan="{len(head)}">Nothing to show.</td></tr>')
    c = f' class="{cls}"' if cls else ""
    return (f'<div class="table-wrap"><table{c}><caption>{caption}</caption><thead><tr>{th}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div>')


class Figures:
    """Numbers the figures in page order."""

    def __init__(self) -> None:
        self.n = 0

    def next(self) -> int:
        self.n += 1
        return self.n


def figure(svg_markup: str, caption: str, ident: str) -> str:
    return f'<figure id="{ident}">{svg_markup}<figcaption>{caption}</figcaption></figure>'


def dl(items: Iterable[tuple[str, str]]) -> str:
    return '<dl class="facts">' + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in items) + "</dl>"


def section(ident: str, title: str, body: str, *, major: bool = True) -> str:
    cls = ' class="major"' if major else ""
    return f'<section id="{ident}"{cls} aria-labelledby="{ident}-h"><h2 id="{ident}-h">{title}</h2>{body}</section>'


def path_title(p: dict) -> str:
    return f"{h(p.get('predictor'))} \u2192 {h(p.get('outcome'))}"


def _path_plain(p: dict) -> str:
    return f"{p.get('predictor')} \u2192 {p.get('outcome')}"


# --------------------------------------------------------------------------- the answer

def _answer_for_path(report: dict, p: dict) -> str:
    est = p.get("estimates") or {}
    pref_key = p.get("preferred")
    pref = est.get(pref_key) if pref_key else None
    obs, lat = est.get("observed"), est.get("latent")
    conf = _conf(report)
    o = obs.get("estimate") if obs else None
    la = lat.get("estimate") if lat else None
    pr = pref.get("estimate") if pref else None

    lead = (f'<p class="lead-number">Preferred estimate: <strong class="big">{num(pr)}</strong> '
            f'{interval((pref or {}).get("ci"))} <span class="sub">({h(method_label(pref_key or ""))}; '
            f'{conf} interval, {h(CI_METHOD.get((pref or {}).get("ci_method"), (pref or {}).get("ci_method")))})'
            f'</span></p>') if _finite(pr) else '<p class="lead-number">No estimate could be computed for this path.</p>'

    s: list[str] = []
    if _finite(o):
        s.append(f"Taken at face value the survey gives <strong>{est_ci(obs)}</strong> (observed, scale means).")
    if pref_key in ("observed", None) or not _finite(pr):
        s.append("No corrected estimate could be computed, so neither bias has been removed.")
    elif pref_key == "latent" or not _finite(la):
        if _finite(la) and _finite(o):
            s.append(f"Correcting for unreliability moves it to {num(la)} ({signed(round(la, 3) - round(o, 3))}, "
                     f"latent model).")
        s.append("No shared-method correction passed its checks, so the preferred estimate corrects unreliability "
                 "only: shared method, if present, is still in it, and whether it outweighs unreliability here is "
                 "not known.")
    else:
        # differences of the printed (rounded) numbers, so the sentence adds up as read
        gap_u = round(la, 3) - round(o, 3) if _finite(o) else None
        gap_m = round(pr, 3) - round(la, 3)
        if gap_u is not None:
            s.append(f"Correcting for unreliability alone moves it to {num(la)} ({signed(gap_u)}, latent model); "
                     f"correcting also for shared method moves it to {num(pr)} ({signed(gap_m)}).")
            if abs(gap_m) > abs(gap_u):
                driver = "Shared method dominated: its correction is larger than the unreliability correction"
            else:
                driver = "Unreliability dominated: its correction is larger than the shared-method correction"
            if _finite(o) and pr * o < 0 and abs(o) > 0.005:
                net = "the corrected estimate has the opposite sign of the observed one"
            elif abs(pr) < abs(o):
                net = "the observed estimate overstates the association"
            elif abs(pr) > abs(o):
                net = "the observed estimate understates the association"
            else:
                net = "the two biases about cancel out in the observed estimate"
            s.append(f"{driver}, so {net}.")
        else:
            s.append(f"Correcting for shared method moves the latent estimate {num(la)} to {num(pr)} ({signed(gap_m)}).")
    ci = (pref or {}).get("ci")
    if isinstance(ci, list) and len(ci) == 2 and all(_finite(x) for x in ci):
        s.append("The interval includes zero: the data are also consistent with no association."
                 if ci[0] <= 0 <= ci[1] else "The interval excludes zero.")
    s.append(_sensitivity_sentence(p.get("sensitivity") or {}))
    why = p.get("preferred_reason")
    return (f'<div class="answer-path"><h3>{path_title(p)}</h3>{lead}<p>{" ".join(x for x in s if x)}</p>'
            + (f'<p class="why">Why this estimate leads: {h(why)}.</p>' if why else "") + "</div>")


def _sensitivity_sentence(s: dict) -> str:
    be, cz = s.get("break_even_method_share"), s.get("ci_covers_zero_at")
    est, holds = s.get("estimated_method_share"), s.get("model_holds_up_to")
    est_part = f" The checks estimate a method share of {pct(est)}." if _finite(est) else ""
    if _finite(be):
        z = f" (its interval first reaches zero at {pct(cz)})" if _finite(cz) and cz > 0 else ""
        return (f"A shared-method share of {pct(be)} of every item's variance would explain the latent "
                f"association away{z}.{est_part}")
    limit = f" up to {pct(holds)} (the most the model can hold)" if _finite(holds) else " in the range tested"
    if _finite(cz) and cz == 0:
        return (f"Its latent interval includes zero even with no method variance assumed, and no assumed method "
                f"share{limit} brings the estimate to zero.{est_part}")
    if _finite(cz):
        return (f"No assumed method share{limit} brings the estimate to zero, though its interval reaches zero "
                f"at {pct(cz)}.{est_part}")
    return f"No assumed method share{limit} brings the estimate or its interval to zero.{est_part}"


def _verdict_box(report: dict) -> str:
    v = _get(report, "method_variance", "verdict")
    if not isinstance(v, dict):
        return ('<div class="verdict level-unknown"><h3 class="verdict-title">Common-method variance: '
                'not assessed</h3><p>The report has no method-variance verdict.</p></div>')
    level = str(v.get("level") or "unknown")
    raised = v.get("raised_by") or []
    extra = ("<p>Raised by:</p><ul>" + "".join(f"<li>{h(r)}</li>" for r in raised) + "</ul>") if raised else ""
    return (f'<div class="verdict level-{h(level)}"><h3 class="verdict-title">Common-method variance: '
            f'<span class="level-word">{h(level.upper())}</span></h3><p>{h(v.get("summary"))}</p>{extra}'
            f'<p class="sub">The rules behind the verdict are in <a href="#method-variance">the common-method '
            f'checks</a>.</p></div>')


def answer_section(report: dict) -> str:
    paths = report.get("paths") or []
    intro = ('<p>Two biases pull an association between scales answered by the same people in one '
             'questionnaire in opposite directions: measurement error (unreliability) shrinks it, and shared '
             'method (same person, same moment, same response style) inflates it. Each key path below is shown '
             'as observed and with both corrected. Estimates are standardized coefficients.</p>')
    if paths:
        body = "".join(_answer_for_path(report, p) for p in paths)
    else:
        intro = ""
        body = ('<p class="note">The design declares no key paths, so there are no path estimates; the '
                'reliability, validity and common-method checks follow.</p>')
    return (f'<section id="answer" aria-labelledby="answer-h"><h2 id="answer-h">The answer in brief</h2>{intro}'
            f'{_verdict_box(report)}{body}</section>')


def cautions_section(report: dict, ident: str, title: str) -> str:
    cautions = report.get("cautions") or []
    items = "".join(f"<li>{h(c)}</li>" for c in cautions) or "<li>The report carries no cautions.</li>"
    return (f'<section id="{ident}" class="cautions" aria-labelledby="{ident}-h"><h2 id="{ident}-h">{title}</h2>'
            f"<ol>{items}</ol></section>")


# --------------------------------------------------------------------------- paths and sensitivity

def _forest_rows(report: dict, p: dict) -> list[svg.ForestRow]:
    rows = []
    for m, e in (p.get("estimates") or {}).items():
        label = method_label(m)
        if not e or not _finite(e.get("estimate")):
            rows.append(svg.ForestRow(label, "", unavailable="not available: " + absent_reason(report, m, e)))
            continue
        ci = e.get("ci") if isinstance(e.get("ci"), list) else None
        lo, hi = (ci[0], ci[1]) if ci and len(ci) == 2 and all(_finite(x) for x in ci) else (None, None)
        rows.append(svg.ForestRow(label, est_ci(e), e["estimate"], lo, hi,
                                  preferred=m == p.get("preferred")))
    return rows


def paths_section(report: dict, figs: Figures | None = None) -> str:
    figs = figs or Figures()
    paths = report.get("paths") or []
    if not paths:
        return section("paths", "Key paths under every correction",
                       '<p class="note">The design declares no key paths.</p>')
    conf = _conf(report)
    n_ways = max(len(p.get("estimates") or {}) for p in paths)
    out = [f"<p>Each path is estimated {n_ways} ways, from the plain observed estimate to models that correct "
           f"unreliability and shared method. Points are estimates, lines their {conf} intervals; the "
           f"preferred estimate is the diamond on the highlighted row.</p>"]
    common = _common_notes(paths)
    out.append(_glossary(report, common))
    for i, p in enumerate(paths):
        ident = f"forest-{i + 1}"
        rows = _forest_rows(report, p)
        desc = "; ".join(f"{r.label}: {r.value_text or r.unavailable}" + (" (preferred)" if r.preferred else "")
                         for r in rows)
        chart = svg.forest_plot(rows, ident=f"{ident}-svg", title=f"Every estimate of {_path_plain(p)}", desc=desc)
        cap = (f"<strong>Figure {figs.next()}.</strong> Every estimate of {path_title(p)}. What to look for: how far the "
               f"preferred estimate (diamond, highlighted) sits from the observed one (top row), and whether its "
               f"interval crosses zero (dashed line). Rows marked not available name the reason.")
        out.append(f'<div class="keep"><h3 id="path-{i + 1}">{path_title(p)}</h3>')
        preds = p.get("predictors") or []
        if len(preds) > 1:
            out.append(f'<p class="sub">Estimated in the equation of {h(p.get("outcome"))} with all its predictors: '
                       f'{", ".join(h(x) for x in preds)}.</p>')
        out.append(figure(chart, cap, ident) + "</div>")
        out.append(_estimates_table(report, p, common))
    return section("paths", "Key paths under every correction", "".join(out))


def _common_notes(paths: list[dict]) -> dict[str, str]:
    """The note of each method when it reads the same on every path (it then goes in the glossary)."""
    seen: dict[str, set[str]] = {}
    for p in paths:
        for m, e in (p.get("estimates") or {}).items():
            if e and _finite(e.get("estimate")) and e.get("note"):
                seen.setdefault(m, set()).add(str(e["note"]))
    return {m: next(iter(v)) for m, v in seen.items() if len(v) == 1}


def _estimates_table(report: dict, p: dict, common: dict[str, str]) -> str:
    rows, classes, notes = [], [], []
    ests = p.get("estimates") or {}
    boot = any(isinstance(e, dict) and e.get("bootstrap") for e in ests.values())
    failed = any(_finite(_get(e, "bootstrap", "n_failed")) and e["bootstrap"]["n_failed"] > 0 for e in ests.values())
    for m, e in ests.items():
        pref = m == p.get("preferred")
        label = h(method_label(m)) + (' <span class="tag">preferred</span>' if pref else "")
        if not e or not _finite(e.get("estimate")):
            row = [label, f'<span class="na">not available: {h(absent_reason(report, m, e))}</span>']
        else:
            row = [label, num(e.get("estimate")), interval(e.get("ci")), num(e.get("se")), pval(e.get("p")),
                   h(CI_METHOD.get(e.get("ci_method"), e.get("ci_method")))]
            b = e.get("bootstrap")
            if boot:
                row += [interval((b or {}).get("ci_percentile")), interval((b or {}).get("ci_bca"))]
                if failed:
                    row.append(count((b or {}).get("n_failed")) if b else DASH)
            if e.get("note") and common.get(m) != e.get("note"):
                notes.append(f"<li><strong>{h(method_label(m))}:</strong> {h(e['note'])}</li>")
        rows.append(row)
        classes.append("preferred" if pref else "")
    head = ["Estimate", "Value", "Interval", "SE", "p", "Interval method"]
    if boot:
        head += ["Bootstrap percentile", "Bootstrap BCa"] + (["Failed replicates"] if failed else [])
    width = len(head)
    # an unavailable estimate: its reason spans the numeric columns
    rows = [r if len(r) == width else [r[0], r[1]] for r in rows]
    body = table(head, rows, caption=f"Estimates of {path_title(p)} ({_conf(report)} intervals)",
                 numeric=tuple(i for i in range(1, width) if i != 5), row_classes=classes, cls="estimates",
                 span_short=True)
    n_boot = next((e["bootstrap"].get("n_boot") for e in ests.values() if isinstance(e, dict) and e.get("bootstrap")),
                  None)
    if boot:
        body += (f'<p class="sub">Intervals and SEs from {count(n_boot)} bootstrap replicates'
                 + ("" if failed else ", none of which failed")
                 + '; the Interval column is the one the report uses (BCa, or percentile when BCa cannot be '
                   'computed).</p>')
    if notes:
        body += '<ul class="sub">' + "".join(notes) + "</ul>"
    return body


def _glossary(report: dict, common: dict[str, str]) -> str:
    if not common:
        return ""
    items = "".join(f"<dt>{h(method_label(m))}</dt><dd>{h(n)}</dd>" for m, n in common.items())
    return ('<details class="glossary" open><summary>What each estimate corrects</summary>'
            f'<dl class="facts">{items}</dl></details>')


def sensitivity_section(report: dict, figs: Figures | None = None) -> str:
    figs = figs or Figures()
    paths = report.get("paths") or []
    title = "How much shared method would explain each path away"
    if not paths:
        return section("sensitivity", title, '<p class="note">The design declares no key paths.</p>')
    meanings = {str((p.get("sensitivity") or {}).get("meaning") or "") for p in paths}
    shared = meanings.pop() if len(meanings) == 1 else None
    out = [f"<p>{h(shared)}</p>" if shared else
           "<p>Each curve re-estimates the latent path assuming that a given share of every item's variance "
           "comes from one shared method source, from none to half.</p>"]
    for i, p in enumerate(paths):
        s = p.get("sensitivity") or {}
        curve = [(pt.get("method_share"), pt.get("estimate"), *(_pair_or_none(pt.get("ci"))))
                 for pt in s.get("curve") or [] if isinstance(pt, dict)]
        curve = [c for c in curve if _finite(c[0]) and _finite(c[1])]
        be, cz, est = s.get("break_even_method_share"), s.get("ci_covers_zero_at"), s.get("estimated_method_share")
        holds = s.get("model_holds_up_to")
        markers = []
        if _finite(est):
            markers.append(svg.Marker(est, f"estimated share {pct(est)}", "estimated"))
        if _finite(cz):
            markers.append(svg.Marker(cz, f"interval reaches 0 at {pct(cz)}", "ci_zero"))
        if _finite(be):
            markers.append(svg.Marker(be, f"break-even {pct(be)}", "break_even"))
        ident = f"sensitivity-{i + 1}"
        out.append(f'<div class="keep"><h3 id="sensitivity-path-{i + 1}">{path_title(p)}</h3>')
        facts = [("Break-even method share", pct(be) if _finite(be) else "none within the range the model can hold"),
                 ("Interval first covers zero at", pct(cz) if _finite(cz) else "not within the range tested"),
                 ("Method share the checks estimated", pct(est) if _finite(est) else
                  "not available: no method factor or measured method model was usable"),
                 ("The model holds up to", pct(holds))]
        if not curve:
            out.append('<p class="note">The sensitivity curve could not be computed for this path.</p>' + dl(facts)
                       + "</div>")
            continue
        desc = (f"Estimate from {num(curve[0][1])} at 0% to {num(curve[-1][1])} at {pct(curve[-1][0])}. "
                + "; ".join(f"{k}: {v}" for k, v in facts))
        chart = svg.sensitivity_plot(curve, markers=markers, holds_up_to=holds if _finite(holds) else None,
                                     ident=f"{ident}-svg", title=f"Sensitivity of {_path_plain(p)} to shared method",
                                     desc=desc)
        cap = (f"<strong>Figure {figs.next()}.</strong> {path_title(p)}: the estimate (line) and its "
               f"{_conf(report)} interval (band) for each assumed method share. What to look for: the share the "
               f"checks estimated (solid orange line) well left of the break-even share (dashed line, where the "
               f"estimate reaches zero) means shared method of the size found cannot explain the association away. "
               f"Dotted line: where the interval first covers zero. Grey area: more method variance than the model "
               f"can hold." + (f" {h(s.get('meaning'))}" if s.get("meaning") and s.get("meaning") != shared else ""))
        out.append(figure(chart, cap, ident))
        out.append(dl(facts) + "</div>")
        pts = [[pct(c[0]), num(c[1]), interval([c[2], c[3]])] for c in curve]
        out.append("<details><summary>Every point of the curve</summary>"
                   + table(["Assumed method share", "Estimate", "Interval"], pts,
                           caption=f"Sensitivity curve of {path_title(p)}", numeric=(0, 1, 2), cls="narrow")
                   + "</details>")
    return section("sensitivity", title, "".join(out))


def _pair_or_none(ci: Any) -> tuple[float | None, float | None]:
    if isinstance(ci, list) and len(ci) == 2 and all(_finite(x) for x in ci):
        return ci[0], ci[1]
    return None, None


# --------------------------------------------------------------------------- reliability and loadings

RELIABILITY = (("alpha", "Cronbach's alpha"), ("omega", "Omega"), ("composite_reliability", "Composite reliability"),
               ("ave", "AVE"))


def reliability_section(report: dict, figs: Figures | None = None) -> str:
    figs = figs or Figures()
    constructs = report.get("constructs") or {}
    th = report.get("thresholds") or {}
    if not constructs:
        return section("reliability", "Reliability and validity of each scale",
                       '<p class="note">The report has no construct results.</p>')
    names = list(constructs)
    panels = []
    for key, title in RELIABILITY:
        vals = [c.get(key) if _finite(c.get(key)) else None for c in constructs.values()]
        passes = [meets(v, th.get(key)) for v in vals]
        texts = [(num(v) + (f" {PASS}" if ok else f" {FAIL}" if ok is False else "")) if v is not None else DASH
                 for v, ok in zip(vals, passes, strict=True)]
        intervals = [_pair_or_none(c.get("alpha_ci")) if key == "alpha" else (None, None) for c in constructs.values()]
        intervals = [iv if iv[0] is not None else None for iv in intervals]
        t = th.get(key)
        panels.append(svg.Panel(f"{title} ({threshold_text(t)})" if t else title,
                                t.get("value") if t else None, num(t.get("value"), 2) if t else "",
                                vals, texts, passes, intervals))
    charts = []
    for k, panel in enumerate(panels):
        desc = "; ".join(f"{n}: {tx}" + (" (meets the threshold)" if ok else " (below the threshold)" if ok is False
                                          else "") for n, tx, ok in zip(names, panel.texts, panel.passes, strict=True))
        charts.append(svg.reliability_panel(names, panel, ident=f"reliability-{k + 1}-svg", desc=desc))
    chart = '<div class="panels">' + "".join(charts) + "</div>"
    cap = (f"<strong>Figure {figs.next()}.</strong> Reliability of each scale, one panel per measure. What to look for: "
           "every dot right of the dashed "
           f"threshold line. A filled dot and {PASS} meet the threshold; a hollow triangle and {FAIL} fall below it. "
           "The line through the alpha dot is its interval (Feldt). Thresholds: "
           + "; ".join(f"{t} {threshold_text(th.get(k))}, {h(_get(th, k, 'source'))}" for k, t in RELIABILITY if th.get(k))
           + ".")
    rows = []
    for n, c in constructs.items():
        cells = [h(n), h(c.get("role")), count(len(c.get("items") or [])), count(c.get("n"))]
        for key, _ in RELIABILITY:
            v = c.get(key)
            cell = num(v) + (mark(meets(v, th.get(key)), f"below {threshold_text(th.get(key))}") if _finite(v) else "")
            if key == "alpha" and interval(c.get("alpha_ci")) != DASH:
                cell += f' <span class="sub">{interval(c.get("alpha_ci"))}</span>'
            if key == "omega" and not _finite(v):
                cell = DASH + ' <span class="sub">(not available: needs 3 items)</span>' if len(c.get("items") or []) < 3 \
                    else DASH + ' <span class="sub">(not available)</span>'
            cells.append(cell)
        rows.append(cells)
    short = {"alpha": "Alpha", "omega": "Omega", "composite_reliability": "CR", "ave": "AVE"}
    head = ["Construct", "Role", "Items", "n"] + [
        f'{short[k]}<br><span class="sub">{threshold_text(th.get(k))}</span>' if th.get(k) else short[k]
        for k, _ in RELIABILITY]
    tbl = table(head, rows, caption=f"Reliability per construct (n: complete answers; CR: composite reliability; {PASS} meets the "
                        f"threshold, {FAIL} below it; alpha's interval in brackets)",
                numeric=(2, 3, 4, 5, 6, 7), cls="reliability")
    return section("reliability", "Reliability and validity of each scale",
                   figure(chart, cap, "reliability-figure") + tbl)


def _item_method_loadings(report: dict) -> list[tuple[str, dict]]:
    """Per-item method loadings, if a method section carries them (a mapping item -> number)."""
    mv = report.get("method_variance") or {}
    out = []
    for key, label in (("method_factor", "Method loading: method factor"),
                       ("measured_method", "Method loading: measured method")):
        sec = mv.get(key)
        if not isinstance(sec, dict):
            continue
        for field_name in ("item_loadings", "method_loadings", "loadings"):
            v = sec.get(field_name)
            if isinstance(v, dict) and v and all(_finite(x) or x is None for x in v.values()):
                out.append((label, v))
                break
    return out


def _construct_method_shares(report: dict) -> list[tuple[str, dict]]:
    mv = report.get("method_variance") or {}
    out = []
    mf = mv.get("method_factor")
    if isinstance(mf, dict) and mf.get("method_share_by_construct"):
        out.append((f"Method share: method factor ({mf.get('identified_by') or 'latent'})",
                    mf["method_share_by_construct"]))
    mm = mv.get("measured_method")
    if isinstance(mm, dict) and mm.get("method_share_by_construct"):
        out.append((f"Method share: measured method ({mm.get('method_construct')})", mm["method_share_by_construct"]))
    cm = mv.get("cfa_marker")
    if isinstance(cm, dict) and cm.get("method_share"):
        out.append(("Method share: CFA marker technique", cm["method_share"]))
    return out


def loadings_section(report: dict, figs: Figures | None = None) -> str:
    figs = figs or Figures()
    constructs = report.get("constructs") or {}
    th = report.get("thresholds") or {}
    title = "Item loadings"
    if not constructs:
        return section("loadings", title, '<p class="note">The report has no item results.</p>')
    item_cols = _item_method_loadings(report)
    share_cols = _construct_method_shares(report)
    lt = th.get("loading")
    columns = [svg.HeatColumn("Trait loading (measurement model)", svg.ACCENT, 1.0)]
    columns += [svg.HeatColumn(lab, "#6b3fa0", 1.0) for lab, _ in item_cols]
    columns += [svg.HeatColumn(lab, svg.HIGHLIGHT, 0.3, span_groups=True) for lab, _ in share_cols]
    groups = []
    for name, c in constructs.items():
        items = list(c.get("items") or (c.get("item_stats") or {}).keys())
        stats = c.get("item_stats") or {}
        cells: list[list[tuple[float | None, str]]] = []
        col = []
        for it in items:
            v = _get(stats, it, "loading")
            ok = meets(v, lt) if _finite(v) else None
            col.append((v if _finite(v) else None, num(v) + (f" {FAIL}" if ok is False else "")))
        cells.append(col)
        for _, mapping in item_cols:
            cells.append([(mapping.get(it) if _finite(mapping.get(it)) else None, num(mapping.get(it))) for it in items])
        for _, mapping in share_cols:
            v = mapping.get(name)
            cells.append([(v if _finite(v) else None, pct(v) if _finite(v) else "not estimated")])
        groups.append(svg.HeatGroup(f"{name} ({c.get('role') or 'substantive'})", items, cells))
    desc = "; ".join(f"{g.label}: " + ", ".join(f"{it} {g.cells[0][i][1]}" for i, it in enumerate(g.rows)) for g in groups)
    chart = svg.heat_map(groups, columns, ident="loadings-svg", title="Item loadings and method shares", desc=desc)
    if item_cols:
        method_note = "The method columns give each item's loading on the method factor."
    elif share_cols:
        method_note = ("The report gives method variance per construct, not per item, so the method columns show "
                       "each construct's share of item variance due to method, in one cell spanning its items "
                       "(marker and method scales are not estimated).")
    else:
        method_note = "The report has no method-variance estimate per construct or item, so only trait loadings are shown."
    cap = (f"<strong>Figure {figs.next()}.</strong> Standardized loadings of each item on its construct; darker means larger. "
           f"What to look for: loadings {threshold_text(lt)} ({h(_get(lt, 'source'))}), shown with no mark; {FAIL} marks an item below. "
           f"{method_note} A method share above 10% is substantial by the verdict's rules.")
    rows = []
    for name, c in constructs.items():
        reverse = set(c.get("reverse") or [])
        stats = c.get("item_stats") or {}
        for it in c.get("items") or list(stats):
            s = stats.get(it) or {}
            v = s.get("loading")
            rows.append([h(it), h(name), "yes" if it in reverse else "no",
                         num(v) + (mark(meets(v, lt), f"below {threshold_text(lt)}") if _finite(v) else ""),
                         num(s.get("item_rest_r")), num(s.get("alpha_if_deleted")), num(s.get("mean"), 2),
                         num(s.get("sd"), 2)])
    tbl = table(["Item", "Construct", "Reverse-keyed", f"Loading ({threshold_text(lt)})", "Item-rest r",
                 "Alpha if deleted", "Mean", "SD"], rows,
                caption="Item statistics (means and SDs after reverse keying; all respondents together)",
                numeric=(3, 4, 5, 6, 7))
    return section("loadings", title, figure(chart, cap, "loadings-figure") + tbl)


# --------------------------------------------------------------------------- common-method checks

def _level_cell(level: str | None) -> str:
    if not level:
        return DASH
    sym = {"none": "\u25cb", "minor": "\u25d0", "substantial": "\u25cf"}.get(level, "")
    return f'<span class="lvl lvl-{h(level)}"><span aria-hidden="true">{sym}</span> {h(level)}</span>'


def _check_value(r: dict) -> str:
    v = r.get("value")
    if not _finite(v):
        return DASH
    name = r.get("value_name") or ""
    if name in ("method share", "first-factor share"):
        return f"{h(name)} {pct(v)}"
    if name == "highest VIF":
        return f"{h(name)} {num(v, 2)}"
    return f"{h(name)} {num(v)}"


def method_section(report: dict) -> str:
    mv = report.get("method_variance")
    title = "Common-method checks"
    if not isinstance(mv, dict):
        return section("method-variance", title, '<p class="note">The report has no common-method checks.</p>')
    out = [_verdict_box(report)]
    rows = [[h(r["check"]), h(r["signal"]), _check_value(r), pval(r.get("test_p")), h(r.get("rule")) or DASH,
             _level_cell(r.get("level"))] for r in method_check_rows(report)]
    out.append(table(["Check", "Signal", "Value", "Test p", "Rule", "Level"], rows,
                     caption="Every signal the verdict weighed (○ none, ◐ minor, ● substantial)",
                     numeric=(3,), cls="checks"))
    shown = {r.get("rule") for r in method_check_rows(report)}
    rules = [r for r in _get(mv, "verdict", "rules") or [] if r not in shown]
    if rules:
        out.append("<h3>How the verdict is reached</h3><ul>" + "".join(f"<li>{h(r)}</li>" for r in rules) + "</ul>")
    for key, render in (("method_factor", _mf_detail), ("measured_method", _mm_detail), ("marker", _marker_detail),
                        ("cfa_marker", _cfa_detail), ("harman", _harman_detail), ("collinearity_vif", _vif_detail)):
        sec = mv.get(key)
        if isinstance(sec, dict):
            out.append(f"<h3>{h(CHECK_LABELS[key])}</h3>" + render(report, sec))
        elif key in ("marker", "cfa_marker"):
            out.append(f"<h3>{h(CHECK_LABELS[key])}</h3><p class=\"note\">Not run: the design has no marker "
                       f"construct.</p>")
        elif key == "measured_method":
            out.append(f"<h3>{h(CHECK_LABELS[key])}</h3><p class=\"note\">Not run: the design has no method "
                       f"construct.</p>")
    return section("method-variance", title, "".join(out))


def _fit_summary(fit: dict | None) -> str:
    if not isinstance(fit, dict):
        return DASH
    return (f"chi-square {num(fit.get('chi2'), 2)} on {count(fit.get('df'))} df, CFI {num(fit.get('cfi'))}, "
            f"RMSEA {num(fit.get('rmsea'))}, SRMR {num(fit.get('srmr'))}")


def _models_table(models: dict, caption: str) -> str:
    rows = []
    for k, m in models.items():
        if not isinstance(m, dict):
            continue
        f = m.get("fit") or {}
        rows.append([h(k.replace("_", " ")), h(m.get("description")), h(m.get("status")), num(f.get("chi2"), 2),
                     count(f.get("df")), num(f.get("cfi")), num(f.get("rmsea")), num(f.get("srmr"))])
    return table(["Model", "Description", "Status", "Chi-square", "df", "CFI", "RMSEA", "SRMR"], rows,
                 caption=caption, numeric=(3, 4, 5, 6, 7))


def _tests_table(tests: dict, caption: str) -> str:
    rows = []
    for k, t in tests.items():
        if not isinstance(t, dict):
            continue
        rows.append([h(t.get("question") or k.replace("_", " ")), h(t.get("restricted")), h(t.get("general")),
                     num(t.get("chi2_diff"), 2), count(t.get("df_diff")), pval(t.get("p"))])
    return table(["Test", "Restricted model", "General model", "Chi-square difference", "df", "p"], rows,
                 caption=caption, numeric=(3, 4, 5))


def _warnings_list(ws: Any) -> str:
    ws = [w for w in ws or [] if w]
    return ('<ul class="warn">' + "".join(f"<li>{h(w)}</li>" for w in ws) + "</ul>") if ws else ""


def _share_table(shares: dict, caption: str) -> str:
    return table(["Construct", "Method share of item variance"], [[h(k), pct(v)] for k, v in shares.items()],
                 caption=caption, numeric=(1,), cls="narrow")


def _mf_detail(report: dict, s: dict) -> str:
    out = dl([("Identified by", h(s.get("identified_by"))), ("Method loadings", h(s.get("loadings"))),
              ("Method share of item variance", pct(s.get("method_share"))),
              ("Proper solution", h(s.get("proper"))), ("Identified", h(s.get("identified"))),
              ("Used as a correction", h(s.get("usable_as_correction"))), ("Fit", _fit_summary(s.get("fit")))])
    if s.get("method_share_by_construct"):
        out += _share_table(s["method_share_by_construct"], "Method-factor share of item variance per construct")
    if isinstance(s.get("models"), dict):
        out += _models_table(s["models"], "Method-factor models")
    if isinstance(s.get("tests"), dict):
        out += _tests_table(s["tests"], "Method-factor tests")
    return out + _warnings_list(s.get("warnings"))


def _mm_detail(report: dict, s: dict) -> str:
    out = dl([("Method construct", h(s.get("method_construct"))),
              ("Method share of item variance", pct(s.get("method_share"))), ("Status", h(s.get("status"))),
              ("Proper solution", h(s.get("proper"))), ("Identified", h(s.get("identified"))),
              ("Fit", _fit_summary(s.get("fit")))])
    if s.get("method_share_by_construct"):
        out += _share_table(s["method_share_by_construct"], "Measured-method share of item variance per construct")
    if isinstance(s.get("tests"), dict):
        out += _tests_table(s["tests"], "Measured-method test")
    return out + _warnings_list(s.get("warnings"))


def _marker_detail(report: dict, s: dict) -> str:
    out = dl([("Marker", h(s.get("marker"))),
              ("r_M", f"{num(s.get('r_m'))} ({h(str(s.get('r_m_rule') or '').replace('_', ' '))} correlation, "
                      f"p {pval(s.get('r_m_p'))})"), ("n", count(s.get("n")))])
    if s.get("marker_correlations"):
        out += table(["Scale", "Correlation with the marker"],
                     [[h(k), num(v)] for k, v in s["marker_correlations"].items()],
                     caption="The marker's correlation with each substantive scale", numeric=(1,), cls="narrow")
    pairs = s.get("pairs") or {}
    if pairs:
        out += table(["Pair", "r", "r adjusted", "t", "p"],
                     [[h(k.replace("|", " \u00d7 ")), num(v.get("r")), num(v.get("r_adjusted")), num(v.get("t"), 2),
                       pval(v.get("p"))] for k, v in pairs.items() if isinstance(v, dict)],
                     caption="Scale correlations before and after the marker adjustment", numeric=(1, 2, 3, 4))
    sens = [x for x in s.get("sensitivity") or [] if isinstance(x, dict)]
    if sens and pairs:
        head = ["Pair"] + [f'{h(str(x.get("rule", "")).replace("_", " "))}<br><span class="sub">r_M '
                           f'{num(x.get("r_m"))}</span>' for x in sens]
        out += table(head, [[h(k.replace("|", " \u00d7 "))] + [num(_get(x, "pairs", k, "r_adjusted")) for x in sens]
                            for k in pairs],
                     caption="Adjusted correlations under each choice of r_M (smallest, second smallest, upper "
                             "95% bound)", numeric=tuple(range(1, 1 + len(sens))))
    if s.get("note"):
        out += f'<p class="sub">{h(s["note"])}</p>'
    return out


def _cfa_detail(report: dict, s: dict) -> str:
    out = dl([("Model chosen", h(s.get("chosen"))),
              ("Method share of item variance (overall)", pct(s.get("method_share_overall")))])
    if isinstance(s.get("models"), dict):
        out += _models_table(s["models"], "CFA marker technique: models")
    if isinstance(s.get("tests"), dict):
        out += _tests_table(s["tests"], "CFA marker technique: tests")
    split = s.get("reliability_split") or {}
    if split:
        out += table(["Construct", "Trait", "Method", "Error"],
                     [[h(k), pct(v.get("trait")), pct(v.get("method")), pct(v.get("error"))]
                      for k, v in split.items() if isinstance(v, dict)],
                     caption="Each construct's reliability split into trait, method and error", numeric=(1, 2, 3))
    if s.get("note"):
        out += f'<p class="sub">{h(s["note"])}</p>'
    return out


def _harman_detail(report: dict, s: dict) -> str:
    eig = [num(e, 2) for e in s.get("eigenvalues") or [] if _finite(e)]
    vs = s.get("vs_measurement_model") or {}
    out = dl([("Method", h(s.get("method"))), ("First factor's share of variance", pct(s.get("first_factor_share"))),
              ("Eigenvalues above 1", count(s.get("factors_eigen_gt_1"))),
              ("Largest eigenvalues", ", ".join(eig) if eig else DASH),
              ("One factor for all items", _fit_summary(_get(s, "single_factor_fit", "fit"))),
              ("One factor against the measurement model",
               f"chi-square difference {num(vs.get('chi2_diff'), 2)} on {count(vs.get('df_diff'))} df, "
               f"p {pval(vs.get('p'))}" if vs else DASH),
              ("Rule", h(s.get("rule"))), ("Flagged", h(s.get("flag")))])
    if s.get("note"):
        out += f'<p class="sub">{h(s["note"])}</p>'
    return out


def _vif_detail(report: dict, s: dict) -> str:
    t = s.get("threshold")
    rows = [[h(k), num(v, 2) + (mark(v <= t, f"above {num(t, 1)}", f"at most {num(t, 1)}") if _finite(v) and _finite(t)
                                 else "")] for k, v in (s.get("values") or {}).items()]
    return (table(["Construct", f"VIF (flag above {num(t, 1)})" if _finite(t) else "VIF"], rows,
                  caption="Full-collinearity VIF per construct", numeric=(1,), cls="narrow")
            + f'<p class="sub">{h(s.get("rule"))}</p>')


# --------------------------------------------------------------------------- measurement model

FIT_ROWS = (("cfi", "CFI"), ("tli", "TLI"), ("rmsea", "RMSEA"), ("srmr", "SRMR"))


def fit_section(report: dict) -> str:
    mm = report.get("measurement_model")
    title = "Measurement model: fit and discriminant validity"
    if not isinstance(mm, dict):
        return section("fit", title, '<p class="note">The report has no measurement model.</p>')
    th = report.get("thresholds") or {}
    f = mm.get("fit") or {}
    out = []
    status = mm.get("status")
    if status and status != "ok":
        out.append(f'<p class="alert">The measurement model ended with status <strong>{h(status)}</strong>: read '
                   f'its fit and everything built on it with care.</p>')
    out.append(_warnings_list(mm.get("warnings")))
    rows = [["Chi-square", f"{num(f.get('chi2'), 2)} on {count(f.get('df'))} df, p {pval(f.get('p'))}", DASH, DASH,
             DASH]]
    for key, label in FIT_ROWS:
        v = f.get(key)
        t = th.get(key)
        val = num(v) + (f' <span class="sub">90% interval {interval(f.get("rmsea_ci"))}</span>' if key == "rmsea" else "")
        ok = meets(v, t)
        verdict = DASH if ok is None else (f'<span class="mark ok" aria-hidden="true">{PASS}</span> meets' if ok
                                           else f'<span class="mark bad" aria-hidden="true">{FAIL}</span> does not meet')
        rows.append([label, val, threshold_text(t, 2) if t else DASH, verdict, h(_get(t, "source"))])
    rows.append(["N", count(f.get("n")), DASH, DASH, DASH])
    out.append(dl([("Estimator", h(str(mm.get("estimator") or "").upper() or None)), ("Status", h(status))]))
    out.append(table(["Index", "Value", "Threshold", "Against the threshold", "Source"], rows,
                     caption="Fit of the measurement model (every construct a factor of its own items)",
                     numeric=(1,), cls="fit"))
    names = list((report.get("constructs") or {}).keys())
    out.append("<h3>Factor correlations</h3>")
    out.append(_matrix(names, mm.get("factor_correlations") or {}, "Correlations between the constructs' factors"))
    out.append("<h3>HTMT</h3>")
    strict, liberal = th.get("htmt_strict"), th.get("htmt_liberal")
    out.append(_matrix(names, mm.get("htmt") or {}, "Heterotrait-monotrait ratio (HTMT) for each pair",
                       flag=lambda v: ("" if meets(v, strict) is not False else
                                       (f" {FAIL}{FAIL}" if meets(v, liberal) is False else f" {FAIL}"))))
    out.append(f'<p class="sub">Discriminant validity holds when HTMT is {threshold_text(strict)} (strict) or '
               f'{threshold_text(liberal)} (liberal; {h(_get(strict, "source"))}). {FAIL}: not below the strict '
               f'threshold; {FAIL}{FAIL}: not below the liberal one either.</p>')
    out.append("<h3>Fornell\u2013Larcker criterion</h3>")
    fl = mm.get("fornell_larcker") or {}
    rows = [[h(k.replace("|", " \u00d7 ")), num(v.get("r_squared")), num(v.get("ave_a")), num(v.get("ave_b")),
             (f'<span class="mark ok" aria-hidden="true">{PASS}</span> holds' if v.get("holds") else
              f'<span class="mark bad" aria-hidden="true">{FAIL}</span> does not hold' if v.get("holds") is False
              else DASH)] for k, v in fl.items() if isinstance(v, dict)]
    out.append(table(["Pair", "Squared correlation", "AVE (first)", "AVE (second)", "Criterion"], rows,
                     caption="Fornell\u2013Larcker: each AVE should exceed the pair's squared correlation",
                     numeric=(1, 2, 3)))
    return section("fit", title, "".join(out))


def _matrix(names: list[str], values: dict, caption: str, flag=None) -> str:
    if not values:
        return '<p class="note">Not available.</p>'
    rows = []
    for i, a in enumerate(names[1:], 1):
        cells = [h(a)]
        for b in names[:-1]:
            j = names.index(b)
            if j >= i:
                cells.append("")
                continue
            v = pair(values, b, a)
            cells.append(num(v) + (flag(v) if flag and _finite(v) else ""))
        rows.append(cells)
    return table([""] + [h(n) for n in names[:-1]], rows, caption=caption,
                 numeric=tuple(range(1, len(names))), cls="matrix")


# --------------------------------------------------------------------------- teams (when present)

def teams_section(report: dict) -> str:
    teams = report.get("teams")
    if not isinstance(teams, dict):
        return ""
    k = teams.get("min_group_size")
    out = [dl([("Group column", h(teams.get("group_column"))), ("Groups", count(teams.get("groups"))),
               ("Groups shown", count(teams.get("groups_reported"))),
               ("Groups withheld as too small", count(teams.get("groups_withheld"))),
               ("Respondents without a group", count(teams.get("respondents_without_group"))),
               ("Minimum group size", count(k))]),
           f'<p class="note">Groups with fewer than {count(k)} respondents are never shown; their members still '
           f'count in the pooled results.</p>']
    meaning = teams.get("meaning") if isinstance(teams.get("meaning"), dict) else {}
    cons = teams.get("constructs") or {}
    if cons:
        out.append(table(["Construct", "ICC(1)", "ICC(2)", "Median rwg(j)", "Groups in rwg(j)"],
                         [[h(n), num(v.get("icc1")), num(v.get("icc2")), num(v.get("rwg_j_median")),
                           count(v.get("rwg_j_groups"))] for n, v in cons.items() if isinstance(v, dict)],
                         caption="How much each construct differs between groups, and agreement within them",
                         numeric=(1, 2, 3, 4)))
    if meaning:
        labels = {"icc1": "ICC(1)", "icc2": "ICC(2)", "rwg_j": "rwg(j)"}
        out.append(dl([(h(labels.get(m, m)), h(t)) for m, t in meaning.items()]))
    tp = [p for p in teams.get("paths") or [] if isinstance(p, dict)]
    if tp:
        rows = []
        for p in tp:
            split = p.get("split_source") or {}
            test = p.get("within_between_test") or {}
            between = p.get("between") or {}
            split_txt = num(split.get("estimate")) + (f" {interval(split.get('ci'))}" if split.get("ci") else "")
            if split.get("splits") is not None:
                split_txt += (f' <span class="sub">({count(split.get("splits"))} splits, '
                              f'{count(split.get("teams_used"))} groups)</span>')
            if split.get("note"):
                split_txt += f' <span class="sub">{h(split["note"])}</span>'
            rows.append([path_title(p), num(_get(p, "within", "estimate")),
                         num(between.get("estimate")) + (f' <span class="sub">({count(between.get("teams"))} '
                                                          f'groups)</span>' if between.get("teams") else ""),
                         pval(test.get("p")) + (" (differ)" if test.get("differ") else ""),
                         num(_get(p, "same_source_team", "estimate")), split_txt])
        out.append(table(["Path", "Within groups", "Between groups", "Within vs between, p",
                          "Same-source group means", "Split-group estimate"], rows,
                         caption="Key paths within and between groups (standardized)", numeric=(1, 2, 3, 4),
                         cls="teampaths"))
    notes = [n for n in teams.get("notes") or [] if n]
    if notes:
        out.append('<ul class="sub">' + "".join(f"<li>{h(n)}</li>" for n in notes) + "</ul>")
    groups = visible_groups(teams)
    if groups:
        cols = list(dict.fromkeys(c for g in groups for c in g))
        out.append('<div class="long-table">' + table(
            [h(c) for c in cols], [[_cell(g.get(c)) for c in cols] for g in groups],
            caption=f"Mean scale scores per group ({count(len(groups))} groups of at least {count(k)} respondents)",
            numeric=tuple(range(1, len(cols))), cls="narrow") + "</div>")
    else:
        out.append('<p class="note">No group is large enough to show.</p>')
    return section("teams", "Teams", "".join(out))


def _cell(v: Any) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return count(v)
    if isinstance(v, float):
        return num(v)
    return h(v)


# --------------------------------------------------------------------------- data, screening, warnings

def data_section(report: dict) -> str:
    d = report.get("data") or {}
    mh = d.get("missing_handling") or {}
    rs = d.get("response_scale") or {}
    excl = d.get("excluded_by_reason") or {}
    out = ["<h3>The data</h3>", dl([
        ("File", h(d.get("file"))), ("Format", h(d.get("format"))), ("Encoding", h(d.get("encoding"))),
        ("SHA-256 of the file", f'<code class="hash">{h(d.get("sha256"))}</code>'),
        ("Rows read", count(d.get("rows"))), ("Rows analysed", count(d.get("rows_analyzed"))),
        ("Items", count(d.get("items"))),
        ("Rows excluded", count(d.get("excluded_rows")) + (
            " (" + ", ".join(f"{h(k.replace('_', ' '))}: {count(v)}" for k, v in excl.items()) + ")" if excl else "")),
        ("Response scale", f"{num(rs.get('min'), 0)} to {num(rs.get('max'), 0)} (from the {h(rs.get('source'))})"
         if rs else DASH),
        ("Missing answers", f"{count(d.get('missing_cells'))} cells ({pct(d.get('missing_share'))})")])]
    out.append("<h3>Missing answers</h3>")
    out.append(dl([("Handling", h(mh.get("description") or mh.get("method"))),
                   ("Rows with a missing answer", count(mh.get("rows_with_missing"))),
                   ("Share listwise deletion would drop", pct(mh.get("listwise_drop_share")))]))
    if mh.get("recommendation"):
        out.append(f'<p class="alert">{h(mh["recommendation"])}</p>')

    sc = report.get("screening") or {}
    out.append("<h3>Screening for careless answers</h3>")
    out.append('<p class="note">Flags are for data review only. They are not a judgement on any person, and '
               'screening rules are common practice, not proof of careless answering. Only row numbers are shown '
               '(as a spreadsheet numbers them, header row 1).</p>')
    checks = sc.get("checks") or {}
    if checks:
        out.append(table(["Rule", "What it flags", "Rows flagged"],
                         [[h(k.replace("_", " ")), h(v.get("rule")), count(v.get("flagged"))]
                          for k, v in checks.items() if isinstance(v, dict)],
                         caption="Rows flagged by each screening rule", numeric=(2,)))
    dist = sc.get("distribution") or {}
    if dist:
        out.append(table(["Measure", "Median over respondents"],
                         [[h(k.replace("_", " ")), num(v.get("median"), 2)] for k, v in dist.items() if isinstance(v, dict)],
                         caption="Typical values of the screening measures", numeric=(1,), cls="narrow"))
    flagged = [f for f in sc.get("flagged_rows") or [] if isinstance(f, dict)]
    if flagged and len(flagged) <= 40:
        out.append(table(["Row", "Flagged by"], [[h(f.get("row")), h(", ".join(f.get("reasons") or []))]
                                                for f in flagged],
                         caption=f"Rows flagged for review ({count(len(flagged))})", cls="narrow"))
    elif flagged:
        out.append(f"<p>Rows flagged for review ({count(len(flagged))}): "
                   + "; ".join(f"{h(f.get('row'))} ({h(', '.join(f.get('reasons') or []))})" for f in flagged)
                   + "</p>")
    else:
        out.append("<p>No row was flagged.</p>")
    if sc.get("note"):
        out.append(f'<p class="sub">{h(sc["note"])}</p>')

    out.append("<h3>Warnings</h3>")
    ws = [w for w in report.get("warnings") or [] if isinstance(w, dict)]
    if ws:
        out.append('<ul class="warn">' + "".join(f"<li><code>{h(w.get('code'))}</code> {h(w.get('message'))}</li>"
                                                  for w in ws) + "</ul>")
    else:
        out.append("<p>The analysis raised no warnings.</p>")

    o = report.get("options") or {}
    out.append("<h3>Options</h3>")
    out.append(dl([("Missing answers", h(o.get("missing"))), ("Flagged rows dropped", h(o.get("drop_flagged"))),
                   ("Bootstrap replicates", count(o.get("bootstrap")) if o.get("bootstrap") else "none (analytic intervals)"),
                   ("Seed", count(o.get("seed"))), ("Confidence", pct(o.get("confidence"), 0)),
                   ("Minimum group size", count(o.get("min_group_size"))),
                   ("Time limit per model fit", f"{num(o.get('fit_time_limit'), 0)} s" if _finite(o.get("fit_time_limit")) else DASH)]))
    return section("data", "Data, screening and warnings", "".join(out))


# --------------------------------------------------------------------------- page

CSS = """
:root{--ink:#1f2933;--muted:#4a5866;--line:#d9e2ec;--accent:#1d4e89;--hl:#a2430f;--hl-bg:#fbeadc;
--ok:#1e6b3a;--bad:#a61b1b;--caution-bg:#fff6e0;--caution-line:#9a6200;--panel:#f5f7fa}
*{box-sizing:border-box}
html{-webkit-text-size-adjust:100%}
body{margin:0;color:var(--ink);background:#fff;font-family:system-ui,-apple-system,"Segoe UI",Roboto,
"Helvetica Neue",Arial,sans-serif;font-size:1rem;line-height:1.55}
.wrap{max-width:62rem;margin:0 auto;padding:0 1.25rem 3rem}
a{color:var(--accent)}
.skip{position:absolute;left:-10000px;top:0;background:var(--accent);color:#fff;padding:.6rem 1rem;z-index:5}
.skip:focus{left:.5rem;top:.5rem}
.sr-only{position:absolute;width:1px;height:1px;padding:0;margin:-1px;overflow:hidden;clip:rect(0 0 0 0);
white-space:nowrap;border:0}
header.top{border-bottom:3px solid var(--accent);padding:1.5rem 0 1rem;margin-bottom:1rem}
#answer>h2{border-top:0;margin-top:1.5rem}
.kicker{margin:0;color:var(--muted);font-size:.95rem;letter-spacing:.02em}
h1{font-size:1.9rem;line-height:1.2;margin:.25rem 0 .5rem;overflow-wrap:anywhere}
h2{font-size:1.4rem;line-height:1.25;margin:2.75rem 0 .75rem;padding-top:.75rem;border-top:1px solid var(--line)}
h3{font-size:1.12rem;line-height:1.3;margin:1.75rem 0 .5rem;overflow-wrap:anywhere}
p{margin:.5rem 0 .85rem}
.sub{color:var(--muted);font-size:.93rem}
.note{color:var(--muted);font-style:italic}
.alert{border-left:5px solid var(--bad);background:#fdeeee;padding:.6rem .9rem}
.meta{color:var(--muted);margin:0;font-size:.95rem}
.verdict{border:1px solid var(--line);border-left:8px solid var(--muted);border-radius:6px;padding:.85rem 1.1rem;
margin:.75rem 0 1.25rem;background:var(--panel)}
.verdict-title{font-weight:700;font-size:1.15rem;margin:.2rem 0 .4rem}
.verdict ul{margin:.25rem 0 .5rem 1.25rem;padding:0}
.level-substantial{border-left-color:var(--bad)} .level-substantial .level-word{color:var(--bad)}
.level-minor{border-left-color:var(--caution-line)} .level-minor .level-word{color:#7a4d00}
.level-none{border-left-color:var(--ok)} .level-none .level-word{color:var(--ok)}
.answer-path{border:1px solid var(--line);border-radius:6px;padding:.25rem 1.1rem .5rem;margin:1rem 0}
.answer-path h3{margin-top:.9rem}
.lead-number{font-size:1.05rem;margin:.25rem 0 .5rem}
.big{font-size:1.6rem;color:var(--hl)}
.why{color:var(--muted);font-size:.93rem}
.cautions{background:var(--caution-bg);border:2px solid var(--caution-line);border-left-width:10px;
border-radius:6px;padding:.25rem 1.25rem .75rem;margin:1.5rem 0}
.cautions h2{border-top:0;margin:.75rem 0 .5rem;padding-top:0;color:#5c3a00}
.cautions ol{margin:0;padding-left:1.4rem}
.cautions li{margin:.45rem 0}
nav.toc{background:var(--panel);border-radius:6px;padding:.5rem 1.1rem;margin:1.5rem 0}
nav.toc h2{font-size:1.05rem;border:0;margin:.5rem 0;padding:0}
nav.toc ol{margin:0 0 .5rem;padding-left:1.4rem;columns:2 16rem}
figure{margin:1.25rem 0 1.5rem;padding:0}
figure svg{display:block;width:100%;height:auto}
.panels{display:grid;grid-template-columns:repeat(auto-fill,minmax(17rem,1fr));gap:1rem;max-width:46rem}
figcaption{color:var(--muted);font-size:.93rem;margin-top:.6rem;max-width:46rem}
.table-wrap{overflow-x:auto;-webkit-overflow-scrolling:touch;margin:.75rem 0 1.25rem;max-width:100%}
table{border-collapse:collapse;width:100%;font-size:.93rem;font-variant-numeric:tabular-nums}
caption{text-align:left;font-weight:700;padding:.2rem 0 .45rem;caption-side:top}
th,td{padding:.4rem .6rem;border-bottom:1px solid var(--line);text-align:left;vertical-align:top}
thead th{border-bottom:2px solid var(--ink);font-weight:700;vertical-align:bottom}
tbody th{font-weight:600}
.num{text-align:right;white-space:nowrap}
tr.preferred th,tr.preferred td{background:var(--hl-bg)}
table.checks td:nth-child(2){min-width:14rem} table.checks td:nth-child(5){min-width:16rem;font-size:.88rem}
table.matrix td:empty{background:var(--panel)}
table.teampaths td:last-child{min-width:16rem}
table.matrix,table.narrow{width:auto;min-width:min(100%,24rem)}
.tag{display:inline-block;font-size:.78rem;font-weight:700;color:#fff;background:var(--hl);border-radius:3px;
padding:0 .35rem;margin-left:.25rem;vertical-align:.1em}
.mark{font-weight:700} .mark.ok{color:var(--ok)} .mark.bad{color:var(--bad)}
.lvl{white-space:nowrap;font-weight:600} .lvl-substantial{color:var(--bad)} .lvl-minor{color:#7a4d00}
.lvl-none{color:var(--ok)}
dl.facts{display:grid;grid-template-columns:minmax(10rem,max-content) 1fr;gap:.3rem 1rem;margin:.75rem 0 1rem}
dl.facts dt{color:var(--muted)} dl.facts dd{margin:0;overflow-wrap:anywhere}
code{font-family:ui-monospace,SFMono-Regular,Menlo,Consolas,monospace;font-size:.88em}
.hash{overflow-wrap:anywhere;word-break:break-all}
ul.warn li{margin:.3rem 0}
.long-table .table-wrap{max-height:32rem;overflow:auto}
details{margin:.5rem 0 1.25rem} summary{cursor:pointer;color:var(--accent);font-weight:600}
.na{color:var(--muted);font-style:italic}
.glossary dl.facts{font-size:.93rem}
footer{margin-top:3rem;padding-top:1rem;border-top:1px solid var(--line);color:var(--muted);font-size:.9rem}
@media (max-width:40rem){
 .wrap{padding:0 .8rem 2rem} h1{font-size:1.5rem} h2{font-size:1.25rem}
 dl.facts{grid-template-columns:1fr} dl.facts dd{margin-bottom:.4rem}
 table{font-size:.86rem} th,td{padding:.35rem .45rem} .big{font-size:1.4rem}
}
@media print{
 @page{margin:15mm 14mm}
 html{font-size:10pt} body{font-size:1rem} .wrap{max-width:none;padding:0}
 .skip,nav.toc{display:none}
 section.major{break-before:page}
 h2,h3{break-after:avoid}
 figure,.cautions,.verdict,.answer-path,.keep,tr{break-inside:avoid}
 figure svg{max-width:100%}
 .table-wrap,.long-table .table-wrap{overflow:visible;max-height:none}
 table{font-size:8.5pt}
 a{color:inherit;text-decoration:none}
 details>summary{display:none}
 *{-webkit-print-color-adjust:exact;print-color-adjust:exact}
}
"""


def _toc(report: dict) -> str:
    entries = [("paths", "Key paths under every correction"),
               ("sensitivity", "How much shared method would explain each path away"),
               ("reliability", "Reliability and validity of each scale"), ("loadings", "Item loadings"),
               ("method-variance", "Common-method checks"),
               ("fit", "Measurement model: fit and discriminant validity")]
    if isinstance(report.get("teams"), dict):
        entries.append(("teams", "Teams"))
    entries += [("data", "Data, screening and warnings"), ("cautions-again", "Cautions (repeated)")]
    return ('<nav class="toc" aria-labelledby="toc-h"><h2 id="toc-h">The evidence</h2><ol>'
            + "".join(f'<li><a href="#{i}">{t}</a></li>' for i, t in entries) + "</ol></nav>")


def _header(report: dict) -> str:
    d = report.get("data") or {}
    tool = report.get("tool") or {}
    when = next((report.get(k) for k in ("created_at", "generated_at", "date") if report.get(k)), None)
    facts = [f"{count(d.get('rows'))} rows read, {count(d.get('rows_analyzed'))} analysed",
             f"{count(d.get('items'))} items", f"{len(report.get('constructs') or {})} constructs"]
    if when:
        facts.insert(0, f"produced {h(when)}")
    return (f'<header class="top"><p class="kicker">Survey measurement and common-method report</p>'
            f'<h1>{h(d.get("file") or "Survey data")}</h1><p class="meta">{SEP.join(facts)}</p>'
            f'<p class="meta">Made by {h(tool.get("name") or "samesource")} {h(tool.get("version") or "")}</p></header>')


def render_html(report: dict) -> str:
    """The whole report as one self-contained HTML5 page (a string)."""
    d = report.get("data") or {}
    title = f"Survey measurement report: {d.get('file') or 'survey data'}"
    figs = Figures()
    parts = [
        _header(report),
        '<main id="main">',
        answer_section(report),
        cautions_section(report, "cautions", "Cautions: read these before using any result"),
        _toc(report),
        paths_section(report, figs),
        sensitivity_section(report, figs),
        reliability_section(report, figs),
        loadings_section(report, figs),
        method_section(report),
        fit_section(report),
        teams_section(report),
        data_section(report),
        cautions_section(report, "cautions-again", "Cautions (repeated)"),
        "</main>",
        f'<footer><p>Report schema {h(report.get("schema"))}; made by {h(_get(report, "tool", "name"))} '
        f'{h(_get(report, "tool", "version"))} from {h(d.get("file"))} (SHA-256 '
        f'<code class="hash">{h(d.get("sha256"))}</code>).</p></footer>',
    ]
    return ('<!doctype html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{h(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
            '<a class="skip" href="#main">Skip to the results</a>\n<div class="wrap">\n'
            + "\n".join(p for p in parts if p) + "\n</div>\n</body>\n</html>\n")


__all__ = ["render_html", "num", "pct", "pval", "interval", "est_ci"]
