"""report.html's parts for the correction check and the planning advice: which estimate to lean
on for this design, the check's numbers per scenario, and the "next time" section.

Reads the typed report (``correction_check``: measurement/corrections/correction_check.py; ``next_time``:
measurement/method_checks/planning.py).
"""

from __future__ import annotations

from collections.abc import Mapping

from samesource.corrections.correction_check import dependable
from samesource.output.report import CheckPath, CheckScenario, CorrectionCheck, KeyPath, Report
from samesource.output.report_html import count, h, num, pct, section, signed, table
from samesource.output.tables import method_label

PASS, FAIL = "\u2713", "\u2717"


def lean_on_line(report: Report, p: KeyPath) -> str:
    """One line under a path's title: what the check says to lean on."""
    check = report.correction_check
    row = check.path(p.outcome, p.predictor) if check else None
    if row is None:
        return ""
    return (f'<p class="why">Correction check: {_lean_sentence(check, row)} '
            '<a href="#correction-check">The check in detail</a>.</p>')


def _lean_sentence(c: CorrectionCheck, row: CheckPath) -> str:
    """Which estimate to lean on, in words, with the scenarios' titles."""
    titles = {s.id: str(s.title or s.id) for s in c.scenarios}
    run = [s.id for s in c.scenarios if s.run]
    lean = row.lean_on
    if not lean:
        return f"no estimate held up even in data like these ({h(row.lean_on_reason)})."
    held = set(row.lean_on_dependable_in or ())
    departures = [i for i in run if i != "fitted"]
    failed = [titles[i].lower() for i in departures if i not in held]
    text = (f"lean on {h(method_label(lean))}: dependable in data like these and in "
            f"{len([i for i in departures if i in held])} of {len(departures)} departures")
    return text + (f"; not with {h('; '.join(failed))}." if failed else ".")


def correction_check_section(report: Report) -> str:
    c = report.correction_check
    if c is None:
        return ""
    title = "How well each correction works on data like these"
    if c.status != "ok":
        return section("correction-check", title, f'<p class="note">Not run: {h(c.why_not)}.</p>')
    n = int(c.replicates or 0)
    # .get on population, rules and the per-scenario numbers: as report.json has them
    # (correction_check.dependable reads the numbers); a part it lacks shows a dash
    pop = c.population if isinstance(c.population, Mapping) else {}
    run = [s for s in c.scenarios if s.run]
    out = [f"<p>Each correction was tried on {count(n)} simulated surveys per scenario, drawn from a model fitted to "
           f"this survey ({h(pop.get('description'))}; shared method {pct(pop.get('method_share'))} of item variance) "
           "and from departures from it that one survey cannot rule out. Every simulated survey has this survey's "
           "number of rows, items, answer categories and missing answers, and was analysed with the same options. "
           "Bias is the average estimate minus the true path, RMSE the typical error, coverage how often the interval "
           "held the truth (about 95% when it is right).</p>"]
    items = []
    for s in c.scenarios:
        extra = (f" Not run: {h(s.why_not)}." if not s.run else
                 (f" {count(s.failed_replicates)} simulated surveys could not be analysed (first: "
                  f"{h(s.first_failure)})." if s.failed_replicates else ""))
        verdicts = s.verdicts if isinstance(s.verdicts, Mapping) else {}
        said = ", ".join(f"{h(k)} {count(v)}" for k, v in verdicts.items() if v)
        items.append(f"<li><strong>{h(s.title)}.</strong> {h(s.description)}{extra}"
                     + (f' <span class="sub">The common-method verdict said: {said}.</span>' if said else "") + "</li>")
    out.append("<h3>The scenarios</h3><ol>" + "".join(items) + "</ol>")
    for p in c.paths:
        out.append(_path_table(c, p, run, n))
    rules = c.rules if isinstance(c.rules, Mapping) else {}
    out.append(f'<p class="sub">{PASS} dependable, {FAIL} not: {h(rules.get("dependable"))}. Which to lean on: '
               f'{h(rules.get("lean_on"))}. Intervals: {h(c.intervals)}. Seed {count(c.seed)}.</p>')
    if c.notes:
        out.append('<ul class="sub">' + "".join(f"<li>{h(x)}</li>" for x in c.notes) + "</ul>")
    return section("correction-check", title, "".join(out))


def _path_table(check: CorrectionCheck, p: CheckPath, run: list[CheckScenario], n: int) -> str:
    ids = [s.id for s in run]
    per = p.scenarios
    methods = [m for m in next(iter(per.values()), {}) if any((per[s].get(m) or {}).get("n") for s in ids)]
    rows, classes = [], []
    for m in methods:
        row = [h(method_label(m)) + (' <span class="tag">lean on</span>' if m == p.lean_on else "")]
        for s in ids:
            v = per[s].get(m) or {}
            if not v.get("n"):
                row.append("\u2014")
                continue
            mark = PASS if dependable(v, n) else FAIL
            row.append(f"{mark} {signed(v.get('bias'), 2)} / {pct(v.get('coverage'), 0)}"
                       f'<span class="sub"> rmse {num(v.get("rmse"), 2)}</span>')
        rows.append(row)
        classes.append("preferred" if m == p.lean_on else "")
    head = ["Estimate"] + [h(s.title) for s in run]
    sentence = _lean_sentence(check, p)
    sentence = sentence[:1].upper() + sentence[1:]
    return (f'<h3>{h(p.predictor)} \u2192 {h(p.outcome)} (true path {num(p.truth)})</h3>'
            f'<p class="why">{sentence}</p>'
            + table(head, rows, caption=f"Bias / coverage of each estimate of {h(p.predictor)} \u2192 "
                    f"{h(p.outcome)} in each scenario ({count(n)} simulated surveys each)",
                    row_classes=classes, cls="estimates"))


def next_time_section(report: Report) -> str:
    nt = report.next_time
    if nt is None:
        return ""
    if nt.status != "ok":
        return section("next-time", "Next time", f'<p class="note">No planning advice: {h(nt.why_not)}.</p>')
    out = ['<ul class="advice">' + "".join(f"<li>{h(a)}</li>" for a in nt.advice) + "</ul>"]
    rows = [[h(o.what), count(o.df), pct(o.power_now, 0),
             count(o.smallest_n) if o.smallest_n else f"over {count(100_000)}"]
            for o in nt.options]
    out.append(table(["Next survey with", "Test df", f"Power at {count(nt.rows_now)} rows",
                      f"Smallest sample for {pct(nt.power, 0)} power"], rows,
                     caption=f"Power to find a shared method of {pct(nt.planned_share)} of item variance "
                             f"(test at the {num(nt.alpha, 2)} level)", numeric=(1, 2, 3)))
    out.append(f'<p class="sub">How: {h(nt.method)}. Planned share: {h(nt.basis)}.</p>')
    return section("next-time", "Next time: testing for a shared answering style", "".join(out))


__all__ = ["correction_check_section", "next_time_section", "lean_on_line"]
