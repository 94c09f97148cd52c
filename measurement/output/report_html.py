"""The client's report: one self-contained HTML5 page made from report.json.

:func:`render_html` takes the report dict and returns the page as a string: inline CSS, inline
SVG figures (:mod:`samesource.output.svg`), nothing fetched from anywhere, printable, readable on a
phone. It leads with the answer (each key path, observed against the preferred corrected
estimate, and the common-method verdict), shows the cautions in full right after it, then
the evidence. Every number printed is a report.json value passed through the formatters
below; a value the report lacks is printed as a dash or "not available" with the reason.
Every string from the report is HTML-escaped: construct and item names come from users.
"""

from __future__ import annotations

import base64
import re
from collections.abc import Iterable, Mapping, Sequence
from functools import lru_cache
from html import escape
from pathlib import Path
from typing import Any

import jinja2
from markupsafe import Markup

from samesource.output import svg
from samesource.output.decision import (
    IMPRECISE_WIDTH,
    STATUS_LABELS,
    STATUS_SYMBOLS,
    Decision,
    decision,
    num,
    too_imprecise,
)
from samesource.output.decision import finite as _finite
from samesource.output.report import (
    NO_FIT,
    NO_SENSITIVITY,
    Construct,
    Estimate,
    Fit,
    ItemStats,
    KeyPath,
    MarkerPair,
    MethodCheck,
    ModelSummary,
    ModelTest,
    Pair,
    Report,
    Sensitivity,
    TeamPath,
    Teams,
    Threshold,
)
from samesource.output.tables import (
    CHECK_LABELS,
    METHOD_LABELS,
    absent_reason,
    meets,
    method_check_rows,
    method_label,
    pair,
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


def est_ci(e: Estimate | None) -> str:
    """The estimate and its interval as the report prints them: "0.293 [0.233, 0.354]"."""
    if e is None or not _finite(e.estimate):
        return DASH
    return num(e.estimate) + (" " + interval(e.ci) if interval(e.ci) != DASH else " (no interval)")


def threshold_text(th: Threshold | None, d: int = 2) -> str:
    if th is None or not _finite(th.value):
        return ""
    direction = th.direction if th.direction is not None else ">="
    return escape(f"{DIRECTION.get(direction, direction)} {num(th.value, d)}")


def mark(ok: bool | None, fail_word: str = "below threshold", ok_word: str = "meets threshold") -> str:
    """A pass/fail symbol with words for screen readers: meaning never by colour alone."""
    if ok is None:
        return ""
    if ok:
        return f' <span class="mark ok" aria-hidden="true">{PASS}</span><span class="sr-only">({ok_word})</span>'
    return f' <span class="mark bad" aria-hidden="true">{FAIL}</span><span class="sr-only">({fail_word})</span>'


def _conf(report: Report) -> str:
    # .get: the options as report.json has them; one an older report lacks reads as None
    c = report.options.get("confidence")
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
    """A figure with its caption and, for each chart in it, downloads as SVG and PNG (no script)."""
    return (f'<figure id="{ident}">{svg_markup}<figcaption>{caption}'
            f'{downloads(svg_markup, ident)}</figcaption></figure>')


def downloads(svg_markup: str, ident: str) -> str:
    """data: links that save each chart as a file: the SVG itself, and a PNG drawn here.

    The page runs no script (its content security policy forbids it), so both files travel in
    the page: the SVG as base64 text, the PNG rasterised at render time (cairosvg, twice the
    chart's size for print).
    """
    charts = re.findall(r"<svg\b.*?</svg>", svg_markup, flags=re.S)
    links = []
    for i, chart in enumerate(charts):
        name = ident if len(charts) == 1 else f"{ident}-{i + 1}"
        standalone = svg.standalone(chart)
        part = f" (panel {i + 1})" if len(charts) > 1 else ""
        links.append(f'<a download="{name}.svg" href="data:image/svg+xml;base64,'
                     f'{base64.b64encode(standalone.encode()).decode()}">SVG{part}</a>')
        png = svg.to_png(standalone)
        if png is not None:
            links.append(f'<a download="{name}.png" href="data:image/png;base64,{base64.b64encode(png).decode()}">'
                         f'PNG{part}</a>')
        else:
            links.append(f"PNG{part} not available (the cairo library is missing where this page was made)")
    if not links:
        return ""
    return '<span class="downloads">Download this chart: ' + SEP.join(links) + "</span>"


def dl(items: Iterable[tuple[str, str]]) -> str:
    return '<dl class="facts">' + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in items) + "</dl>"


def section(ident: str, title: str, body: str, *, major: bool = True, hint: str = "", open_: bool = False) -> str:
    """A named section of detail, collapsed behind its title (``<details>``: no script needed)."""
    cls = ' class="major"' if major else ""
    hint_html = f'<span class="hint">{hint}</span>' if hint else ""
    return (f'<section id="{ident}"{cls} aria-labelledby="{ident}-h"><details{" open" if open_ else ""}>'
            f'<summary><h2 id="{ident}-h">{title}</h2>{hint_html}</summary>{body}</details></section>')


def path_title(p: KeyPath) -> str:
    return arrow_title(p.predictor, p.outcome)


def arrow_title(predictor: Any, outcome: Any) -> str:
    """A path as "predictor → outcome", escaped."""
    return f"{h(predictor)} \u2192 {h(outcome)}"


def _path_plain(p: KeyPath) -> str:
    return f"{p.predictor} \u2192 {p.outcome}"


# --------------------------------------------------------------------------- the answer

def _sensitivity_sentence(s: Sensitivity) -> str:
    be, cz = s.break_even_method_share, s.ci_covers_zero_at
    est, holds = s.estimated_method_share, s.model_holds_up_to
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


def _verdict_box(report: Report) -> str:
    v = report.method_variance.verdict
    if not v.given:
        return ('<div class="verdict level-unknown"><h3 class="verdict-title">Common-method variance: '
                'not assessed</h3><p>The report has no method-variance verdict.</p></div>')
    level = str(v.level or "unknown")
    return (f'<div class="verdict level-{h(level)}"><h3 class="verdict-title">Common-method variance: '
            f'<span class="level-word">{h(level.upper())}</span></h3><p>{h(v.summary)}'
            f' <span class="sub">What raised it, and the rules: <a href="#method-variance">the common-method '
            f'checks</a>.</span></p></div>')


def checks_strip(report: Report) -> str:
    """The assumption checks, before any estimate: status and one plain sentence each; evidence,
    rule and source one click below."""
    checks = report.assumptions
    if not checks:
        return ""
    rows = []
    for a in checks:
        st = str(a.status or "")
        badge = (f'<span class="st st-{h(st)}"><span aria-hidden="true">{h(STATUS_SYMBOLS.get(st, ""))}</span> '
                 f'{h(STATUS_LABELS.get(st, st or "not stated"))}</span>')
        detail = []
        ev = [e for e in a.evidence or () if e]
        if ev:
            detail.append("Evidence: " + "; ".join(h(e) for e in ev) + ".")
        aff = [method_label(str(m)) for m in a.affects or () if m]
        if aff:
            detail.append("Estimates resting on it: " + ", ".join(h(m) for m in aff) + ".")
        else:  # a failed check that no estimate rests on must not read like a flaw in the answer
            detail.append("No key-path estimate rests on this; it concerns "
                          + h(", ".join(CHECK_LABELS.get(c, c) for c in a.checks or ()) or "one method check")
                          + " only.")
        if a.rule:
            detail.append(f"Rule: {h(a.rule)}")
        if a.source:
            detail.append(f"Source: {h(a.source)}")
        if a.remedy:
            detail.append(f"What would settle it: {h(a.remedy)}")
        body = "".join(f"<p>{x}</p>" for x in detail)
        rows.append(f'<li><details><summary>{badge} <span class="msg">{h(a.message or a.id)}</span></summary>'
                    f'<div class="detail">{body or "<p>No further detail.</p>"}</div></details></li>')
    return ('<div class="checks-strip" id="assumptions"><h3>What the answer rests on: the assumption checks</h3>'
            f'<ul>{"".join(rows)}</ul></div>')


def decisions_of(report: Report | Mapping) -> list[Decision]:
    return [decision(p, labels=METHOD_LABELS) for p in Report.of(report).paths]


def cautions_section(report: Report, ident: str, title: str) -> str:
    cautions = report.cautions
    items = "".join(f"<li>{h(c)}</li>" for c in cautions) or "<li>The report carries no cautions.</li>"
    return (f'<section id="{ident}" class="cautions" aria-labelledby="{ident}-h"><h2 id="{ident}-h">{title}</h2>'
            f"<ol>{items}</ol></section>")


# --------------------------------------------------------------------------- paths and sensitivity

def _forest_rows(report: Report, p: KeyPath) -> list[svg.ForestRow]:
    rows = []
    for m, e in p.estimates.items():
        label = method_label(m)
        if e is None or not _finite(e.estimate):
            rows.append(svg.ForestRow(label, "", unavailable="not available: " + absent_reason(report, m, e)))
            continue
        lo, hi = pair_or_none(e.ci)
        rows.append(svg.ForestRow(label, est_ci(e), e.estimate, lo, hi, preferred=m == p.preferred))
    return rows


def paths_section(report: Report, figs: Figures | None = None) -> str:
    from samesource.output.check_html import lean_on_line
    from samesource.output.sources_html import path_sources_line

    figs = figs or Figures()
    paths = report.paths
    if not paths:
        return section("paths", "Key paths under every correction",
                       '<p class="note">The design declares no key paths.</p>')
    conf = _conf(report)
    n_ways = max(len(p.estimates) for p in paths)
    out = [f"<p>Each path is estimated {n_ways} ways, from the plain observed estimate to models that correct "
           f"unreliability and shared method. Points are estimates, lines their {conf} intervals; the "
           f"preferred estimate is the diamond on the highlighted row.</p>"]
    common = _common_notes(paths)
    out.append(_glossary(common))
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
        out.append(path_sources_line(p))
        out.append(lean_on_line(report, p))
        preds = p.predictors or ()
        if len(preds) > 1:
            out.append(f'<p class="sub">Estimated in the equation of {h(p.outcome)} with all its predictors: '
                       f'{", ".join(h(x) for x in preds)}.</p>')
        if p.bounds is not None and p.bounds.basis:
            b = p.bounds
            out.append(f'<p class="sub">Range over the plausible amounts of shared method: {num(b.low)} to '
                       f'{num(b.high)} ({h(b.basis)}).</p>')
        if p.preferred_reason:
            out.append(f'<p class="why">Why {h(method_label(str(p.preferred or "")))} leads: '
                       f'{h(p.preferred_reason)}.</p>')
        out.append(figure(chart, cap, ident) + "</div>")
        out.append(_estimates_table(report, p, common))
    return section("paths", "Key paths under every correction", "".join(out))


def _common_notes(paths: Sequence[KeyPath]) -> dict[str, str]:
    """The note of each method when it reads the same on every path (it then goes in the glossary)."""
    seen: dict[str, set[str]] = {}
    for p in paths:
        for m, e in p.estimates.items():
            if e is not None and _finite(e.estimate) and e.note:
                seen.setdefault(m, set()).add(str(e.note))
    return {m: next(iter(v)) for m, v in seen.items() if len(v) == 1}


def _estimates_table(report: Report, p: KeyPath, common: dict[str, str]) -> str:
    rows, classes, notes = [], [], []
    ests = p.estimates
    boots = [e.bootstrap for e in ests.values() if e is not None and e.bootstrap is not None]
    boot = bool(boots)
    failed = any(_finite(b.n_failed) and b.n_failed > 0 for b in boots)
    for m, e in ests.items():
        pref = m == p.preferred
        label = h(method_label(m)) + (' <span class="tag">preferred</span>' if pref else "")
        if e is None or not _finite(e.estimate):
            row = [label, f'<span class="na">not available: {h(absent_reason(report, m, e))}</span>']
        else:
            row = [label, num(e.estimate), interval(e.ci), num(e.se), pval(e.p),
                   h(CI_METHOD.get(e.ci_method, e.ci_method))]
            b = e.bootstrap
            if boot:
                row += [interval(b.ci_percentile if b else None), interval(b.ci_bca if b else None)]
                if failed:
                    row.append(count(b.n_failed) if b else DASH)
            if e.note and common.get(m) != e.note:
                notes.append(f"<li><strong>{h(method_label(m))}:</strong> {h(e.note)}</li>")
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
    n_boot = boots[0].n_boot if boots else None
    if boot:
        body += (f'<p class="sub">Intervals and SEs from {count(n_boot)} bootstrap replicates'
                 + ("" if failed else ", none of which failed")
                 + '; the Interval column is the one the report uses (BCa, or percentile when BCa cannot be '
                   'computed).</p>')
    if notes:
        body += '<ul class="sub">' + "".join(notes) + "</ul>"
    return body


def _glossary(common: dict[str, str]) -> str:
    if not common:
        return ""
    items = "".join(f"<dt>{h(method_label(m))}</dt><dd>{h(n)}</dd>" for m, n in common.items())
    return ('<details class="glossary" open><summary>What each estimate corrects</summary>'
            f'<dl class="facts">{items}</dl></details>')


def sensitivity_section(report: Report, figs: Figures | None = None) -> str:
    figs = figs or Figures()
    paths = report.paths
    title = "How much shared method would explain each path away"
    if not paths:
        return section("sensitivity", title, '<p class="note">The design declares no key paths.</p>')
    meanings = {str((p.sensitivity or NO_SENSITIVITY).meaning or "") for p in paths}
    shared = meanings.pop() if len(meanings) == 1 else None
    out = [f"<p>{h(shared)}</p>" if shared else
           "<p>Each curve re-estimates the latent path assuming that a given share of every item's variance "
           "comes from one shared method source, from none to half.</p>"]
    for i, p in enumerate(paths):
        s = p.sensitivity or NO_SENSITIVITY
        curve = [(pt.method_share, pt.estimate, *(pair_or_none(pt.ci))) for pt in s.curve]
        curve = [c for c in curve if _finite(c[0]) and _finite(c[1])]
        be, cz, est = s.break_even_method_share, s.ci_covers_zero_at, s.estimated_method_share
        holds = s.model_holds_up_to
        markers = []
        if _finite(est):
            markers.append(svg.Marker(est, f"estimated share {pct(est)}", "estimated"))
        if _finite(cz):
            markers.append(svg.Marker(cz, f"interval reaches 0 at {pct(cz)}", "ci_zero"))
        if _finite(be):
            markers.append(svg.Marker(be, f"break-even {pct(be)}", "break_even"))
        ident = f"sensitivity-{i + 1}"
        out.append(f'<div class="keep"><h3 id="sensitivity-path-{i + 1}">{path_title(p)}</h3>'
                   f'<p>{h(_sensitivity_sentence(s))}</p>')
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
        marks = s.marks if isinstance(s.marks, Mapping) else {}
        # .get: both marks are optional (a curve without a published range or an estimated share)
        published = pair_or_none(marks.get("published_range"))
        est_ci = pair_or_none(marks.get("estimated_share_ci"))
        published = published if published[0] is not None else None
        est_ci = est_ci if est_ci[0] is not None else None
        if published:
            facts.append(("Method shares published reviews report", f"{pct(published[0])} to {pct(published[1])}"))
        if est_ci:
            facts.append(("Interval of the estimated share", f"{pct(est_ci[0])} to {pct(est_ci[1])}"))
        chart = svg.sensitivity_plot(curve, markers=markers, holds_up_to=holds if _finite(holds) else None,
                                     ident=f"{ident}-svg", title=f"Sensitivity of {_path_plain(p)} to shared method",
                                     desc=desc, published=published, estimated_ci=est_ci)
        cap = (f"<strong>Figure {figs.next()}.</strong> {path_title(p)}: the estimate (line) and its "
               f"{_conf(report)} interval (band) for each assumed method share. What to look for: the share the "
               f"checks estimated (solid orange line) well left of the break-even share (dashed line, where the "
               f"estimate reaches zero) means shared method of the size found cannot explain the association away. "
               f"Dotted line: where the interval first covers zero. Grey area: more method variance than the model "
               f"can hold." + (" Hatched: the range of method shares published reviews report, for when the survey's own "
                                 "estimate cannot be vouched for; the orange bar on the axis: the estimated share's "
                                 "interval." if published or est_ci else "")
               + (f" {h(s.meaning)}" if s.meaning and s.meaning != shared else ""))
        out.append(figure(chart, cap, ident))
        out.append(dl(facts) + "</div>")
        pts = [[pct(c[0]), num(c[1]), interval([c[2], c[3]])] for c in curve]
        out.append("<details><summary>Every point of the curve</summary>"
                   + table(["Assumed method share", "Estimate", "Interval"], pts,
                           caption=f"Sensitivity curve of {path_title(p)}", numeric=(0, 1, 2), cls="narrow")
                   + "</details>")
    return section("sensitivity", title, "".join(out))


def pair_or_none(ci: Any) -> tuple[float | None, float | None]:
    if isinstance(ci, list | tuple) and len(ci) == 2 and all(_finite(x) for x in ci):
        return ci[0], ci[1]
    return None, None


# --------------------------------------------------------------------------- reliability and loadings

RELIABILITY = (("alpha", "alpha"), ("omega", "omega"), ("composite_reliability", "CR"), ("ave", "AVE"))
ROLE_WORDS = {"marker": "marker scale", "method": "method scale"}


def _closest(name: str, names: list[str], htmt: Mapping[Pair, Any]) -> tuple[str, float] | None:
    found = [(o, pair(htmt, name, o)) for o in names if o != name]
    found = [(o, v) for o, v in found if _finite(v)]
    return max(found, key=lambda t: t[1]) if found else None


def _scale_card(name: str, c: Construct, names: list[str], report: Report) -> str:
    th = report.thresholds
    mm = report.measurement_model
    alpha, ave = c.alpha, c.ave
    # .get on thresholds, here and below: a threshold the report lacks leaves its mark out
    ok_a, ok_ave = meets(alpha, th.get("alpha")), meets(ave, th.get("ave"))
    if ok_a is None:
        consistency = "Consistency could not be computed."
    elif ok_a:
        consistency = "Its answers hang together well enough to be added into one score."
    else:
        consistency = "Its answers do not hang together well enough to be read as one score."
    if ok_ave is False:
        consistency += " Its items carry more error than shared signal."
    close = _closest(name, names, mm.htmt if mm is not None else {})
    if close is None:
        distinct = "How distinct it is from the other scales could not be computed."
    else:
        other, v = close
        strict, liberal = meets(v, th.get("htmt_strict")), meets(v, th.get("htmt_liberal"))
        if strict is not False:
            distinct = f"Clearly distinct from the other scales; the closest is {h(other)}."
        elif liberal is not False:
            distinct = f"Close to {h(other)}: distinct by the liberal threshold only."
        else:
            distinct = f"Too close to {h(other)} to be told apart."
    stats = []
    for key, label in RELIABILITY:
        v = getattr(c, key)
        t = th.get(key)
        val = num(v) + (" " + interval(c.alpha_ci) if key == "alpha" and interval(c.alpha_ci) != DASH else "")
        if key == "omega" and not _finite(v):
            val += " (needs 3 items)" if len(c.items) < 3 else " (not available)"
        ok = meets(v, t) if _finite(v) else None
        stats.append(f"{label} {val}" + (f" ({threshold_text(t)})" if t else "")
                     + mark(ok, f"below {threshold_text(t)}"))
    if close is not None:
        stats.append(f"highest HTMT {num(close[1])} with {h(close[0])} ({threshold_text(th.get('htmt_strict'))})")
    stats.append(f"{count(len(c.items))} items, n {count(c.n)}")
    weak = ok_a is False or (close is not None and meets(close[1], th.get("htmt_liberal")) is False)
    role = ROLE_WORDS.get(str(c.role or ""), "")
    return (f'<div class="card{" weak" if weak else ""}" data-scale="{h(name)}"><h3>{h(name)}'
            + (f' <span class="sub">({h(role)})</span>' if role else "") + "</h3>"
            f"<p>{consistency}</p><p>{distinct}</p><p class=\"stats\">{SEP.join(stats)}</p></div>")


def reliability_section(report: Report, figs: Figures | None = None) -> str:
    constructs = report.constructs
    th = report.thresholds
    title = "How well each scale measures"
    if not constructs:
        return section("reliability", title, '<p class="note">The report has no construct results.</p>')
    names = list(constructs)
    cards = "".join(_scale_card(n, c, names, report) for n, c in constructs.items())
    sources = "; ".join(f"{label} {threshold_text(th[k])}: {h(th[k].source)}"
                        for k, label in RELIABILITY + (("htmt_strict", "HTMT"),) if th.get(k))
    body = ('<p>One card per scale: whether its answers hang together (consistency) and whether it measures '
            'something the other scales do not (distinctness). The statistics and their thresholds are in small '
            f'print: {PASS} meets the threshold, {FAIL} falls below it.</p>'
            f'<div class="cards">{cards}</div>'
            f'<p class="sub">alpha: Cronbach\'s alpha with its interval (Feldt); omega: McDonald\'s omega; CR: '
            f'composite reliability; AVE: average variance extracted; HTMT: heterotrait-monotrait ratio. '
            f'Thresholds: {sources}.</p>')
    return section("reliability", title, body, hint="consistency and distinctness, one card per scale")


def _item_method_loadings(report: Report) -> list[tuple[str, Mapping]]:
    """Per-item method loadings, if a method check gives them (a mapping item -> number)."""
    out = []
    for key, label in (("method_factor", "Method loading: method factor"),
                       ("measured_method", "Method loading: measured method")):
        sec = report.method_variance.check(key)
        v = sec.item_loadings if sec is not None else None
        if isinstance(v, Mapping) and v and all(_finite(x) or x is None for x in v.values()):
            out.append((label, v))
    return out


def _construct_method_shares(report: Report) -> list[tuple[str, Mapping]]:
    mv = report.method_variance
    out = []
    mf = mv.check("method_factor")
    if mf is not None and mf.method_share_by_construct:
        out.append((f"Method share: method factor ({mf.identified_by or 'latent'})", mf.method_share_by_construct))
    mm = mv.check("measured_method")
    if mm is not None and mm.method_share_by_construct:
        out.append((f"Method share: measured method ({mm.method_construct})", mm.method_share_by_construct))
    cm = mv.check("cfa_marker")
    if cm is not None and cm.method_share:
        out.append(("Method share: CFA marker technique", cm.method_share))
    return out


def loadings_section(report: Report, figs: Figures | None = None) -> str:
    figs = figs or Figures()
    constructs = report.constructs
    th = report.thresholds
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
        items = list(c.items or c.item_stats)
        cells: list[list[tuple[float | None, str]]] = []
        col = []
        for it in items:
            v = c.item_stats[it].loading if it in c.item_stats else None
            ok = meets(v, lt) if _finite(v) else None
            col.append((v if _finite(v) else None, num(v) + (f" {FAIL}" if ok is False else "")))
        cells.append(col)
        for _, mapping in item_cols:
            # .get: an item or scale the method check has no number for shows a dash
            cells.append([(mapping.get(it) if _finite(mapping.get(it)) else None, num(mapping.get(it))) for it in items])
        for _, mapping in share_cols:
            v = mapping.get(name) if isinstance(mapping, Mapping) else None
            cells.append([(v if _finite(v) else None, pct(v) if _finite(v) else "not estimated")])
        groups.append(svg.HeatGroup(f"{name} ({c.role or 'substantive'})", items, cells))
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
           f"What to look for: loadings {threshold_text(lt)} ({h(lt.source if lt else None)}), shown with no mark; {FAIL} marks an item below. "
           f"{method_note} A method share above 10% is substantial by the verdict's rules.")
    rows = []
    no_stats = ItemStats(None, None, None, None, None)
    for name, c in constructs.items():
        reverse = set(c.reverse)
        for it in c.items or list(c.item_stats):
            # .get: an item without statistics shows dashes
            st = c.item_stats.get(it) or no_stats
            v = st.loading
            rows.append([h(it), h(name), "yes" if it in reverse else "no",
                         num(v) + (mark(meets(v, lt), f"below {threshold_text(lt)}") if _finite(v) else ""),
                         num(st.item_rest_r), num(st.alpha_if_deleted), num(st.mean, 2), num(st.sd, 2)])
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
    v = r["value"]
    if not _finite(v):
        return DASH
    name = r["value_name"] or ""
    if name in ("method share", "first-factor share"):
        return f"{h(name)} {pct(v)}"
    if name == "highest VIF":
        return f"{h(name)} {num(v, 2)}"
    return f"{h(name)} {num(v)}"


def method_section(report: Report) -> str:
    mv = report.method_variance
    title = "Common-method checks"
    if not mv.given:
        return section("method-variance", title, '<p class="note">The report has no common-method checks.</p>')
    out = [_verdict_box(report)]
    checked = method_check_rows(report)
    rows = [[h(r["check"]), h(r["signal"]), _check_value(r), pval(r["test_p"]), h(r["rule"]) or DASH,
             _level_cell(r["level"])] for r in checked]
    out.append(table(["Check", "Signal", "Value", "Test p", "Rule", "Level"], rows,
                     caption="Every signal the verdict weighed (○ none, ◐ minor, ● substantial)",
                     numeric=(3,), cls="checks"))
    shown = {r["rule"] for r in checked}
    rules = [r for r in report.method_variance.verdict.rules or () if r not in shown]
    if rules:
        out.append("<h3>How the verdict is reached</h3><ul>" + "".join(f"<li>{h(r)}</li>" for r in rules) + "</ul>")
    for key, render in (("method_factor", _mf_detail), ("measured_method", _mm_detail), ("marker", _marker_detail),
                        ("cfa_marker", _cfa_detail), ("harman", _harman_detail), ("collinearity_vif", _vif_detail)):
        sec = mv.check(key)
        if sec is not None:
            out.append(f"<h3>{h(CHECK_LABELS[key])}</h3>" + render(sec))
        elif key in ("marker", "cfa_marker"):
            out.append(f"<h3>{h(CHECK_LABELS[key])}</h3><p class=\"note\">Not run: the design has no marker "
                       f"construct.</p>")
        elif key == "measured_method":
            out.append(f"<h3>{h(CHECK_LABELS[key])}</h3><p class=\"note\">Not run: the design has no method "
                       f"construct.</p>")
    return section("method-variance", title, "".join(out))


def _fit_summary(fit: Fit | None) -> str:
    if fit is None:
        return DASH
    return (f"chi-square {num(fit.chi2, 2)} on {count(fit.df)} df, CFI {num(fit.cfi)}, "
            f"RMSEA {num(fit.rmsea)}, SRMR {num(fit.srmr)}")


# The method-factor models by what they assume (descriptive names of ours; the sequence of
# models is that of Williams, Hartman & Cavazotte 2010 and Podsakoff et al. 2003).
MODEL_NAMES = {"measurement": "measurement model", "without_method": "no shared method",
               "baseline": "no shared method", "equal": "equal shared method", "free": "free shared method",
               "equal_held": "equal shared method, correlations held", "free_held": "free shared method, correlations held"}


def model_name(key: str | None) -> str | None:
    return MODEL_NAMES.get(key, key.replace("_", " ")) if key else None


def _models_table(models: Mapping[str, ModelSummary | None], caption: str) -> str:
    rows = []
    for k, m in models.items():
        if m is None:
            continue
        f = m.fit or NO_FIT
        rows.append([h(model_name(k)), h(m.description), h(m.status), num(f.chi2, 2),
                     count(f.df), num(f.cfi), num(f.rmsea), num(f.srmr)])
    return table(["Model", "Description", "Status", "Chi-square", "df", "CFI", "RMSEA", "SRMR"], rows,
                 caption=caption, numeric=(3, 4, 5, 6, 7))


def _tests_table(tests: Mapping[str, ModelTest | None], caption: str) -> str:
    rows = []
    for k, t in tests.items():
        if t is None:
            continue
        rows.append([h(t.question or k.replace("_", " ")), h(model_name(t.restricted)),
                     h(model_name(t.general)), num(t.chi2_diff, 2), count(t.df_diff), pval(t.p)])
    return table(["Test", "Restricted model", "General model", "Chi-square difference", "df", "p"], rows,
                 caption=caption, numeric=(3, 4, 5))


def _warnings_list(ws: Any) -> str:
    ws = [w for w in ws or [] if w]
    return ('<ul class="warn">' + "".join(f"<li>{h(w)}</li>" for w in ws) + "</ul>") if ws else ""


def _share_table(shares: Mapping, caption: str) -> str:
    return table(["Construct", "Method share of item variance"], [[h(k), pct(v)] for k, v in shares.items()],
                 caption=caption, numeric=(1,), cls="narrow")


def _mf_detail(s: MethodCheck) -> str:
    out = dl([("Identified by", h(s.identified_by)), ("Method loadings", h(s.loadings)),
              ("Method share of item variance", pct(s.method_share)),
              ("Proper solution", h(s.proper)), ("Identified", h(s.identified)),
              ("Used as a correction", h(s.usable_as_correction)), ("Fit", _fit_summary(s.fit))])
    if s.method_share_by_construct:
        out += _share_table(s.method_share_by_construct, "Method-factor share of item variance per construct")
    if s.models:
        out += _models_table(s.models, "Method-factor models")
    if s.tests:
        out += _tests_table(s.tests, "Method-factor tests")
    return out + _warnings_list(s.warnings)


def _mm_detail(s: MethodCheck) -> str:
    out = dl([("Method construct", h(s.method_construct)),
              ("Method share of item variance", pct(s.method_share)), ("Status", h(s.status)),
              ("Proper solution", h(s.proper)), ("Identified", h(s.identified)),
              ("Fit", _fit_summary(s.fit))])
    if s.method_share_by_construct:
        out += _share_table(s.method_share_by_construct, "Measured-method share of item variance per construct")
    if s.tests:
        out += _tests_table(s.tests, "Measured-method test")
    return out + _warnings_list(s.warnings)


def _marker_detail(s: MethodCheck) -> str:
    out = dl([("Marker", h(s.marker)),
              ("r_M", f"{num(s.r_m)} ({h(str(s.r_m_rule or '').replace('_', ' '))} correlation, "
                      f"p {pval(s.r_m_p)})"), ("n", count(s.n))])
    if s.marker_correlations:
        out += table(["Scale", "Correlation with the marker"],
                     [[h(k), num(v)] for k, v in s.marker_correlations.items()],
                     caption="The marker's correlation with each substantive scale", numeric=(1,), cls="narrow")
    pairs = s.pairs or {}
    if pairs:
        out += table(["Pair", "r", "r adjusted", "t", "p"],
                     [[_pair_name(k), num(v.r), num(v.r_adjusted), num(v.t, 2), pval(v.p)]
                      for k, v in pairs.items() if v is not None],
                     caption="Scale correlations before and after the marker adjustment", numeric=(1, 2, 3, 4))
    sens = s.sensitivity or ()
    if sens and pairs:
        head = ["Pair"] + [f'{h(str(x.rule or "").replace("_", " "))}<br><span class="sub">r_M '
                           f'{num(x.r_m)}</span>' for x in sens]
        # .get: a choice of r_M that lacks a pair shows a dash there
        out += table(head, [[_pair_name(k)] + [num(_r_adjusted(x.pairs.get(k))) for x in sens] for k in pairs],
                     caption="Adjusted correlations under each choice of r_M (smallest, second smallest, upper "
                             "95% bound)", numeric=tuple(range(1, 1 + len(sens))))
    if s.note:
        out += f'<p class="sub">{h(s.note)}</p>'
    return out


def _pair_name(pair_: Pair) -> str:
    """Two scales as "A × B" (a design's names never hold "|", report.json's separator)."""
    return h(" \u00d7 ".join(pair_))


def _r_adjusted(v: MarkerPair | None) -> float | None:
    return v.r_adjusted if v is not None else None


def _cfa_detail(s: MethodCheck) -> str:
    out = dl([("Model chosen", h(model_name(s.chosen))),
              ("Method share of item variance (overall)", pct(s.method_share_overall))])
    if s.models:
        out += _models_table(s.models, "CFA marker technique: models")
    if s.tests:
        out += _tests_table(s.tests, "CFA marker technique: tests")
    split = s.reliability_split if isinstance(s.reliability_split, Mapping) else {}
    if split:
        out += table(["Construct", "Trait", "Method", "Error"],
                     # .get: the split as report.json has it; a part it lacks shows a dash
                     [[h(k), pct(v.get("trait")), pct(v.get("method")), pct(v.get("error"))]
                      for k, v in split.items() if isinstance(v, Mapping)],
                     caption="Each construct's reliability split into trait, method and error", numeric=(1, 2, 3))
    if s.note:
        out += f'<p class="sub">{h(s.note)}</p>'
    return out


def _harman_detail(s: MethodCheck) -> str:
    eig = [num(e, 2) for e in s.eigenvalues or () if _finite(e)]
    vs = s.vs_measurement_model
    out = dl([("Method", h(s.method)), ("First factor's share of variance", pct(s.first_factor_share)),
              ("Eigenvalues above 1", count(s.factors_eigen_gt_1)),
              ("Largest eigenvalues", ", ".join(eig) if eig else DASH),
              ("One factor for all items", _fit_summary(s.single_factor_fit)),
              ("One factor against the measurement model",
               f"chi-square difference {num(vs.chi2_diff, 2)} on {count(vs.df_diff)} df, "
               f"p {pval(vs.p)}" if vs else DASH),
              ("Rule", h(s.rule)), ("Flagged", h(s.flag))])
    if s.note:
        out += f'<p class="sub">{h(s.note)}</p>'
    return out


def _vif_detail(s: MethodCheck) -> str:
    t = s.threshold
    rows = [[h(k), num(v, 2) + (mark(v <= t, f"above {num(t, 1)}", f"at most {num(t, 1)}") if _finite(v) and _finite(t)
                                 else "")] for k, v in (s.values or {}).items()]
    return (table(["Construct", f"VIF (flag above {num(t, 1)})" if _finite(t) else "VIF"], rows,
                  caption="Full-collinearity VIF per construct", numeric=(1,), cls="narrow")
            + f'<p class="sub">{h(s.rule)}</p>')


# --------------------------------------------------------------------------- measurement model

FIT_ROWS = (("cfi", "CFI"), ("tli", "TLI"), ("rmsea", "RMSEA"), ("srmr", "SRMR"))
COUNT_WORDS = {0: "none", 1: "one", 2: "two", 3: "three", 4: "all four"}


def fit_sentence(fit: Fit | None, th: Mapping[str, Threshold]) -> str:
    """The fit in one sentence: how many of the four usual indices meet their thresholds."""
    # .get: an index without a threshold is not judged
    judged = [(label, meets(getattr(fit, k) if fit else None, th.get(k))) for k, label in FIT_ROWS]
    judged = [(label, ok) for label, ok in judged if ok is not None]
    if not judged:
        return "How well the measurement model fits could not be judged."
    good = [label for label, ok in judged if ok]
    bad = [label for label, ok in judged if not ok]
    n = len(judged)
    if not bad:
        return f"The measurement model fits well by {'all four' if n == 4 else COUNT_WORDS.get(n, n)} usual checks."
    if not good:
        return f"The measurement model fits poorly: it misses every one of the {n} usual checks."
    return (f"The measurement model fits well by {COUNT_WORDS.get(len(good), len(good))} of the {n} usual checks; "
            f"{', '.join(bad)} falls short.")


def fit_section(report: Report) -> str:
    mm = report.measurement_model
    title = "Measurement model: fit and overlap between scales"
    if mm is None:
        return section("fit", title, '<p class="note">The report has no measurement model.</p>')
    th = report.thresholds
    f = mm.fit or NO_FIT
    out = []
    status = mm.status
    if status and status != "ok":
        out.append(f'<p class="alert">The measurement model ended with status <strong>{h(status)}</strong>: read '
                   f'its fit and everything built on it with care.</p>')
    out.append(_warnings_list(mm.warnings))
    out.append(f'<p class="fit-sentence">{h(fit_sentence(mm.fit, th))}</p>')
    rows = []
    for key, label in FIT_ROWS:
        v = getattr(f, key)
        t = th.get(key)
        val = num(v) + (f' <span class="sub">90% interval {interval(f.rmsea_ci)}</span>' if key == "rmsea" else "")
        ok = meets(v, t)
        verdict = DASH if ok is None else (f'<span class="mark ok" aria-hidden="true">{PASS}</span> meets' if ok
                                           else f'<span class="mark bad" aria-hidden="true">{FAIL}</span> does not meet')
        rows.append([label, val, threshold_text(t, 2) if t else DASH, verdict, h(t.source if t else None)])
    rows.append(["Chi-square", f"{num(f.chi2, 2)} on {count(f.df)} df, p {pval(f.p)}", DASH, DASH, DASH])
    rows.append(["N", count(f.n), DASH, DASH, DASH])
    out.append(table(["Index", "Value", "Threshold", "Against the threshold", "Source"], rows,
                     caption=f"Fit of the measurement model (every scale a factor of its own items; estimator "
                             f"{h(str(mm.estimator or '').upper() or None)}, status {h(status)})",
                     numeric=(1,), cls="fit"))
    out.append(_overlap_list(report))
    return section("fit", title, "".join(out), hint="fit in one sentence; the scale pairs closest to overlapping")


def _overlap_list(report: Report) -> str:
    """Discriminant validity as a ranked list: the scale pairs closest to overlapping first."""
    mm = report.measurement_model
    th = report.thresholds
    ranked = sorted(((k, v) for k, v in (mm.htmt.items() if mm else ()) if _finite(v)), key=lambda kv: -kv[1])
    if not ranked:
        return '<h3>Overlap between scales</h3><p class="note">Not available.</p>'
    strict, liberal = th.get("htmt_strict"), th.get("htmt_liberal")
    items = []
    for (a, b), v in ranked:
        if meets(v, strict) is not False:
            word = "distinct"
        elif meets(v, liberal) is not False:
            word = f"{FAIL} distinct by the liberal threshold only"
        else:
            word = f"{FAIL}{FAIL} too close to tell apart"
        extra = []
        if _finite(pair(mm.htmt2, a, b)):
            extra.append(f"HTMT2 {num(pair(mm.htmt2, a, b))}")
        if _finite(pair(mm.factor_correlations, a, b)):
            extra.append(f"factor correlation {num(pair(mm.factor_correlations, a, b))}")
        flv = pair(mm.fornell_larcker, a, b)
        if flv is not None and flv.holds is False:
            extra.append(f"{FAIL} Fornell\u2013Larcker does not hold")
        items.append(f"<li><strong>{h(a)} and {h(b)}</strong>: HTMT {num(v)}, {word}"
                     + (f' <span class="sub">({"; ".join(extra)})</span>' if extra else "") + "</li>")
    top, rest = items[:5], items[5:]
    variant = mm.htmt_variant
    out = ("<h3>Overlap between scales</h3><p>The pairs of scales closest to measuring the same thing, closest "
           f"first. A pair is distinct when its HTMT is {threshold_text(strict)} (strict) or "
           f"{threshold_text(liberal)} (liberal; {h(strict.source if strict else None)})."
           + (f" HTMT variant: {h(variant)}." if variant else "") + "</p>"
           f'<ol class="pairs">{"".join(top)}</ol>')
    if rest:
        out += (f"<details><summary>The other {count(len(rest))} pairs</summary>"
                f'<ol class="pairs" start="6">{"".join(rest)}</ol></details>')
    out += ('<p class="sub">The full matrices (HTMT, factor correlations, Fornell\u2013Larcker) are in the tables: '
            '<a href="tables.xlsx">tables.xlsx</a>.</p>')
    return out


# --------------------------------------------------------------------------- teams (when present)

def teams_section(report: Report) -> str:
    teams = report.teams
    if teams is None:
        return ""
    k = teams.min_group_size
    out = [dl([("Group column", h(teams.group_column)), ("Groups", count(teams.groups)),
               ("Groups shown", count(teams.groups_reported)),
               ("Groups withheld as too small", count(teams.groups_withheld)),
               ("Respondents without a group", count(teams.respondents_without_group)),
               ("Minimum group size", count(k))]),
           f'<p class="note">Groups with fewer than {count(k)} respondents are never shown; their members still '
           f'count in the pooled results.</p>']
    meaning = teams.meaning if isinstance(teams.meaning, Mapping) else {}
    cons = teams.constructs
    if cons:
        out.append(table(["Construct", "ICC(1)", "ICC(2)", "Median rwg(j)", "Groups in rwg(j)"],
                         [[h(n), num(v.icc1), num(v.icc2), num(v.rwg_j_median), count(v.rwg_j_groups)]
                          for n, v in cons.items() if v is not None],
                         caption="How much each construct differs between groups, and agreement within them",
                         numeric=(1, 2, 3, 4)))
    if meaning:
        labels = {"icc1": "ICC(1)", "icc2": "ICC(2)", "rwg_j": "rwg(j)"}
        out.append(dl([(h(labels.get(m, m)), h(t)) for m, t in meaning.items()]))
    tp = teams.paths
    if tp:
        rows = []
        for p in tp:
            split, test, between = p.split_source, p.within_between_test, p.between
            if too_imprecise(split.ci):
                split_txt = (f'<span class="imprecise">too imprecise to read</span> <span class="sub">'
                             f'({num(split.estimate)} {interval(split.ci)}: the interval is wider '
                             f'than half the {MINUS}1 to 1 range)</span>')
            elif not _finite(split.estimate):
                split_txt = f'<span class="na">not available: {h(split.note or "the split-group estimate could not be computed")}</span>'
            else:
                split_txt = num(split.estimate) + (f" {interval(split.ci)}" if split.ci else "")
            if split.teams_used is not None:  # splits: None = every split, averaged exactly
                how = "every split" if split.splits is None else f"{count(split.splits)} splits"
                split_txt += f' <span class="sub">({how}, {count(split.teams_used)} groups)</span>'
            if split.note and _finite(split.estimate):
                split_txt += f' <span class="sub">{h(split.note)}</span>'
            rows.append([arrow_title(p.predictor, p.outcome), num(p.within.estimate),
                         num(between.estimate) + (f' <span class="sub">({count(between.teams)} '
                                                  f'groups)</span>' if between.teams else ""),
                         pval(test.p) + (" (differ)" if test.differ else ""),
                         _same_source_cell(teams, p), split_txt])
        out.append(table(["Path", "Within groups", "Between groups", "Within vs between, p",
                          "Same-source group means", "Split-group estimate"], rows,
                         caption="Key paths within and between groups (standardized; a split-group interval wider than "
                                 f"{num(IMPRECISE_WIDTH, 1)} is too imprecise to read)", numeric=(1, 2, 3),
                         cls="teampaths"))
    notes = [n for n in teams.notes if n]
    if notes:
        out.append('<ul class="sub">' + "".join(f"<li>{h(n)}</li>" for n in notes) + "</ul>")
    groups = teams.visible_groups
    if groups:
        rows = [g.row() for g in groups]
        cols = list(dict.fromkeys(c for row in rows for c in row))
        # .get: a group without a scale's mean shows a dash there
        out.append('<div class="long-table">' + table(
            [h(c) for c in cols], [[_cell(row.get(c)) for c in cols] for row in rows],
            caption=f"Mean scale scores per group ({count(len(groups))} groups of at least {count(k)} respondents)",
            numeric=tuple(range(1, len(cols))), cls="narrow") + "</div>")
    else:
        out.append('<p class="note">No group is large enough to show.</p>')
    return section("teams", "Teams", "".join(out))


def _same_source_cell(teams: Teams, p: TeamPath) -> str:
    """The same-source team estimate, or why there is none (derived from the report's ICC(2) values)."""
    v = p.same_source_team.estimate
    if _finite(v):
        return num(v)
    icc2 = {n: c.icc2 for n, c in teams.constructs.items() if c is not None}
    # .get: a path's construct without team statistics gives no reason of its own
    low = [f"{n} ({num(icc2[n])})" for n in dict.fromkeys((p.outcome, p.predictor))
           if _finite(icc2.get(n)) and icc2[n] <= 0]
    if low:
        reason = ("the team means of " + ", ".join(low) + " are not reliable (ICC(2) at or below zero), so "
                  "they cannot be corrected for their unreliability")
    else:
        reason = ("corrected for the low reliability of team means (ICC(2)), the team-level correlations "
                  "exceed what correlations can be, so no estimate is defined")
    return f'<span class="na">not available: {h(reason)}</span>'


def _cell(v: Any) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return count(v)
    if isinstance(v, float):
        return num(v)
    return h(v)


# --------------------------------------------------------------------------- data, screening, warnings

def data_section(report: Report) -> str:
    from samesource.output.sources_html import sources_block

    d = report.data
    mh = d.missing_handling if isinstance(d.missing_handling, Mapping) else {}
    rs = d.response_scale
    excl = d.excluded_by_reason if isinstance(d.excluded_by_reason, Mapping) else {}
    out = ["<h3>The data</h3>", dl([
        ("File", h(d.file)), ("Format", h(d.format)), ("Encoding", h(d.encoding)),
        ("SHA-256 of the file", f'<code class="hash">{h(d.sha256)}</code>'),
        ("Rows read", count(d.rows)), ("Rows analysed", count(d.rows_analyzed)),
        ("Items", count(d.items)),
        ("Rows excluded", count(d.excluded_rows) + (
            " (" + ", ".join(f"{h(k.replace('_', ' '))}: {count(v)}" for k, v in excl.items()) + ")" if excl else "")),
        ("Response scale", f"{num(rs.min, 0)} to {num(rs.max, 0)} (from the {h(rs.source)})" if rs else DASH),
        ("Missing answers", f"{count(d.missing_cells)} cells ({pct(d.missing_share)})")])]
    out.append(sources_block(report))
    out.append("<h3>Missing answers</h3>")
    # .get: missing_handling as report.json has it; a part an older report lacks shows a dash
    out.append(dl([("Handling", h(mh.get("description") or mh.get("method"))),
                   ("Rows with a missing answer", count(mh.get("rows_with_missing"))),
                   ("Share listwise deletion would drop", pct(mh.get("listwise_drop_share")))]))
    if mh.get("recommendation"):
        out.append(f'<p class="alert">{h(mh["recommendation"])}</p>')

    sc = report.screening
    out.append("<h3>Screening for careless answers</h3>")
    out.append('<p class="note">Flags are for data review only. They are not a judgement on any person, and '
               'screening rules are common practice, not proof of careless answering. Only row numbers are shown '
               '(as a spreadsheet numbers them, header row 1).</p>')
    if sc.checks:
        out.append(table(["Rule", "What it flags", "Rows flagged"],
                         [[h(k.replace("_", " ")), h(v.rule), count(v.flagged)] for k, v in sc.checks.items()],
                         caption="Rows flagged by each screening rule", numeric=(2,)))
    dist = sc.distribution if isinstance(sc.distribution, Mapping) else {}
    if dist:
        out.append(table(["Measure", "Median over respondents"],
                         # .get: as report.json has it; a measure without a median shows a dash
                         [[h(k.replace("_", " ")), num(v.get("median"), 2)] for k, v in dist.items()
                          if isinstance(v, Mapping)],
                         caption="Typical values of the screening measures", numeric=(1,), cls="narrow"))
    flagged = sc.flagged_rows
    if flagged and len(flagged) <= 40:
        out.append(table(["Row", "Flagged by"], [[h(f.row), h(", ".join(f.reasons or ()))] for f in flagged],
                         caption=f"Rows flagged for review ({count(len(flagged))})", cls="narrow"))
    elif flagged:
        out.append(f"<p>Rows flagged for review ({count(len(flagged))}): "
                   + "; ".join(f"{h(f.row)} ({h(', '.join(f.reasons or ()))})" for f in flagged)
                   + "</p>")
    else:
        out.append("<p>No row was flagged.</p>")
    if sc.note:
        out.append(f'<p class="sub">{h(sc.note)}</p>')

    out.append("<h3>Warnings</h3>")
    if report.warnings:
        out.append('<ul class="warn">' + "".join(f"<li><code>{h(w.code)}</code> {h(w.message)}</li>"
                                                  for w in report.warnings) + "</ul>")
    else:
        out.append("<p>The analysis raised no warnings.</p>")

    o = report.options
    out.append("<h3>Options</h3>")
    # .get: the options as report.json has them; one an older report lacks shows a dash
    out.append(dl([("Missing answers", h(o.get("missing"))), ("Flagged rows dropped", h(o.get("drop_flagged"))),
                   ("Bootstrap replicates", count(o.get("bootstrap")) if o.get("bootstrap") else "none (analytic intervals)"),
                   ("Seed", count(o.get("seed"))), ("Confidence", pct(o.get("confidence"), 0)),
                   ("Correction check", f"{count(o.get('check_corrections'))} simulated surveys per scenario"
                    if o.get("check_corrections") else "not run"),
                   ("Minimum group size", count(o.get("min_group_size"))),
                   ("Time limit per model fit", f"{num(o.get('fit_time_limit'), 0)} s" if _finite(o.get("fit_time_limit")) else DASH)]))
    return section("data", "Data, screening and warnings", "".join(out))


# --------------------------------------------------------------------------- page



TEMPLATES = Path(__file__).with_name("templates")


@lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """The templates of the report and the brief, autoescaped (names and items come from users)."""
    return jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATES), autoescape=True,
                              undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)


@lru_cache(maxsize=4)
def stylesheet(name: str) -> Markup:
    """A stylesheet of ours, inlined into the page at render time."""
    return Markup((TEMPLATES / name).read_text(encoding="utf-8"))


def _toc(entries: Iterable[tuple[str, str]]) -> str:
    """The table of contents: (id, title) of each section the page shows (output/sections.py)."""
    return ('<nav class="toc" aria-labelledby="toc-h"><h2 id="toc-h">The detail behind the answer '
            '<span class="sub">(each section opens when clicked)</span></h2><ol>'
            + "".join(f'<li><a href="#{i}">{t}</a></li>' for i, t in entries)
            + '</ol><p class="sub">Every table as a spreadsheet: <a href="tables.xlsx">tables.xlsx</a>; the one-page '
              'brief: <a href="brief.html">brief.html</a>.</p></nav>')


def header_facts(report: Report | Mapping, when: str | None = None) -> list[str]:
    r = Report.of(report)
    d = r.data
    when = when or r.date
    facts = [f"{count(d.rows)} rows read, {count(d.rows_analyzed)} analysed",
             f"{count(d.items)} items", f"{len(r.constructs)} scales",
             f"made by {r.tool.name or 'samesource'} {r.tool.version or ''}".strip()]
    if when:
        facts.insert(0, f"produced {when}")
    return facts


def review_reasons(report: Report | Mapping) -> list[dict]:
    """The "review before use" reasons, when the report asks for review (missing fields tolerated)."""
    view = Report.of(report)
    if not view.review_needed:
        return []
    out = []
    for r in view.review_reasons or ():
        if isinstance(r, Mapping):
            # .get: a reason as report.json has it (review.py); any part may be missing
            out.append({"message": str(r.get("message") or r.get("code") or "review needed"),
                        "names": [str(i) for i in r.get("items") or []], "fix": str(r.get("fix") or "")})
    return out or [{"message": "The analysis asks for a review before its results are used.", "names": [], "fix": ""}]


def render_html(report: Report | Mapping, *, when: str | None = None) -> str:
    """The whole report as one self-contained HTML5 page (a string); ``when``: the date it was made."""
    view = Report.of(report)
    d = view.data
    figs = Figures()
    from samesource.output.sections import render_sections  # it imports this module's sections

    sections = render_sections(view, figs)
    footer = (f'Report schema {h(view.schema)}; made by {h(view.tool.name)} '
              f'{h(view.tool.version)} from {h(d.file)} (SHA-256 '
              f'<code class="hash">{h(d.sha256)}</code>).')
    return environment().get_template("report.html.j2").render(
        title=f"Survey report: {d.file or 'survey data'}", css=stylesheet("report.css"),
        file=d.file or "Survey data", facts=header_facts(view, when), review=review_reasons(view),
        checks=Markup(checks_strip(view)), decisions=decisions_of(view), verdict=Markup(_verdict_box(view)),
        cautions=Markup(cautions_section(view, "cautions", "Cautions: read these before using any result")),
        toc=Markup(_toc((s.id, s.title) for s, _ in sections)), sections=[Markup(x) for _, x in sections],
        footer=Markup(footer)) + "\n"


__all__ = ["render_html", "environment", "stylesheet", "header_facts", "review_reasons", "num", "pct", "pval", "interval", "est_ci"]
