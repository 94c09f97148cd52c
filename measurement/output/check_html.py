"""report.html's parts for the correction check and the planning advice: which estimate to lean
on for this design, the check's numbers per scenario, and the "next time" section.

Reads report.json only (``correction_check``: measurement/corrections/correction_check.py; ``next_time``:
measurement/method_checks/planning.py).
"""

from __future__ import annotations

from samesource.corrections.correction_check import dependable
from samesource.output.report import KeyPath, Report
from samesource.output.report_html import count, h, num, pct, section, signed, table
from samesource.output.tables import method_label

PASS, FAIL = "\u2713", "\u2717"


def lean_on_line(report: Report, p: KeyPath) -> str:
    """One line under a path's title: what the check says to lean on."""
    check = report.record.get("correction_check") or {}
    row = next((r for r in check.get("paths") or []
                if r.get("outcome") == p.outcome and r.get("predictor") == p.predictor), None)
    if row is None:
        return ""
    return (f'<p class="why">Correction check: {_lean_sentence(check, row)} '
            '<a href="#correction-check">The check in detail</a>.</p>')


def _lean_sentence(c: dict, row: dict) -> str:
    """Which estimate to lean on, in words, with the scenarios' titles."""
    titles = {s.get("id"): str(s.get("title") or s.get("id")) for s in c.get("scenarios") or [] if isinstance(s, dict)}
    run = [i for i, s in ((s.get("id"), s) for s in c.get("scenarios") or [] if isinstance(s, dict)) if s.get("run")]
    lean = row.get("lean_on")
    if not lean:
        return f"no estimate held up even in data like these ({h(row.get('lean_on_reason'))})."
    held = set(row.get("lean_on_dependable_in") or [])
    departures = [i for i in run if i != "fitted"]
    failed = [titles[i].lower() for i in departures if i not in held]
    text = (f"lean on {h(method_label(lean))}: dependable in data like these and in "
            f"{len([i for i in departures if i in held])} of {len(departures)} departures")
    return text + (f"; not with {h('; '.join(failed))}." if failed else ".")


def correction_check_section(report: dict) -> str:
    c = report.get("correction_check")
    if not isinstance(c, dict):
        return ""
    title = "How well each correction works on data like these"
    if c.get("status") != "ok":
        return section("correction-check", title, f'<p class="note">Not run: {h(c.get("why_not"))}.</p>')
    n = int(c.get("replicates") or 0)
    pop = c.get("population") or {}
    scen = [s for s in c.get("scenarios") or [] if isinstance(s, dict)]
    run = [s for s in scen if s.get("run")]
    out = [f"<p>Each correction was tried on {count(n)} simulated surveys per scenario, drawn from a model fitted to "
           f"this survey ({h(pop.get('description'))}; shared method {pct(pop.get('method_share'))} of item variance) "
           "and from departures from it that one survey cannot rule out. Every simulated survey has this survey's "
           "number of rows, items, answer categories and missing answers, and was analysed with the same options. "
           "Bias is the average estimate minus the true path, RMSE the typical error, coverage how often the interval "
           "held the truth (about 95% when it is right).</p>"]
    items = []
    for s in scen:
        extra = (f" Not run: {h(s.get('why_not'))}." if not s.get("run") else
                 (f" {count(s.get('failed_replicates'))} simulated surveys could not be analysed (first: "
                  f"{h(s.get('first_failure'))})." if s.get("failed_replicates") else ""))
        verdicts = s.get("verdicts") or {}
        said = ", ".join(f"{h(k)} {count(v)}" for k, v in verdicts.items() if v)
        items.append(f"<li><strong>{h(s.get('title'))}.</strong> {h(s.get('description'))}{extra}"
                     + (f' <span class="sub">The common-method verdict said: {said}.</span>' if said else "") + "</li>")
    out.append("<h3>The scenarios</h3><ol>" + "".join(items) + "</ol>")
    for p in c.get("paths") or []:
        out.append(_path_table(c, p, run, n))
    rules = c.get("rules") or {}
    out.append(f'<p class="sub">{PASS} dependable, {FAIL} not: {h(rules.get("dependable"))}. Which to lean on: '
               f'{h(rules.get("lean_on"))}. Intervals: {h(c.get("intervals"))}. Seed {count(c.get("seed"))}.</p>')
    notes = c.get("notes") or []
    if notes:
        out.append('<ul class="sub">' + "".join(f"<li>{h(x)}</li>" for x in notes) + "</ul>")
    return section("correction-check", title, "".join(out))


def _path_table(check: dict, p: dict, run: list[dict], n: int) -> str:
    ids = [s["id"] for s in run]
    per = p.get("scenarios") or {}
    methods = [m for m in next(iter(per.values()), {}) if any((per[s].get(m) or {}).get("n") for s in ids)]
    rows, classes = [], []
    for m in methods:
        row = [h(method_label(m)) + (' <span class="tag">lean on</span>' if m == p.get("lean_on") else "")]
        for s in ids:
            v = per[s].get(m) or {}
            if not v.get("n"):
                row.append("\u2014")
                continue
            mark = PASS if dependable(v, n) else FAIL
            row.append(f"{mark} {signed(v.get('bias'), 2)} / {pct(v.get('coverage'), 0)}"
                       f'<span class="sub"> rmse {num(v.get("rmse"), 2)}</span>')
        rows.append(row)
        classes.append("preferred" if m == p.get("lean_on") else "")
    head = ["Estimate"] + [h(s["title"]) for s in run]
    sentence = _lean_sentence(check, p)
    sentence = sentence[:1].upper() + sentence[1:]
    return (f'<h3>{h(p.get("predictor"))} \u2192 {h(p.get("outcome"))} (true path {num(p.get("truth"))})</h3>'
            f'<p class="why">{sentence}</p>'
            + table(head, rows, caption=f"Bias / coverage of each estimate of {h(p.get('predictor'))} \u2192 "
                    f"{h(p.get('outcome'))} in each scenario ({count(n)} simulated surveys each)",
                    row_classes=classes, cls="estimates"))


def next_time_section(report: dict) -> str:
    nt = report.get("next_time")
    if not isinstance(nt, dict):
        return ""
    if nt.get("status") != "ok":
        return section("next-time", "Next time", f'<p class="note">No planning advice: {h(nt.get("why_not"))}.</p>')
    out = ['<ul class="advice">' + "".join(f"<li>{h(a)}</li>" for a in nt.get("advice") or []) + "</ul>"]
    rows = [[h(o.get("what")), count(o.get("df")), pct(o.get("power_now"), 0),
             count(o.get("smallest_n")) if o.get("smallest_n") else f"over {count(100_000)}"]
            for o in nt.get("options") or [] if isinstance(o, dict)]
    out.append(table(["Next survey with", "Test df", f"Power at {count(nt.get('rows_now'))} rows",
                      f"Smallest sample for {pct(nt.get('power'), 0)} power"], rows,
                     caption=f"Power to find a shared method of {pct(nt.get('planned_share'))} of item variance "
                             f"(test at the {num(nt.get('alpha'), 2)} level)", numeric=(1, 2, 3)))
    out.append(f'<p class="sub">How: {h(nt.get("method"))}. Planned share: {h(nt.get("basis"))}.</p>')
    return section("next-time", "Next time: testing for a shared answering style", "".join(out))


__all__ = ["correction_check_section", "next_time_section", "lean_on_line"]
