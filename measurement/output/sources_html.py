"""report.html's parts for second sources: how the files were joined, which paths are free
of same-rater bias, and each same-source path beside its cross-source counterpart.

Reads the typed report (``data.sources``, ``paths[].sources``, ``paths[].cross_source_check``;
measurement/input/sources.py and measurement/corrections/source_paths.py).
"""

from __future__ import annotations

from samesource.output import svg
from samesource.output.report import NO_BENCHMARK, NO_COUNTERPART, KeyPath, Report, ResponseScale
from samesource.output.report_html import (
    Figures,
    count,
    figure,
    h,
    interval,
    num,
    pair_or_none,
    path_title,
    section,
    signed,
    table,
)
from samesource.output.tables import method_label

KIND_LABELS = {"other_rater": "another rater", "later_wave": "a later wave", "records": "records"}
NO_SCALE = ResponseScale(None, None, None)


def sources_block(report: Report) -> str:
    """The data section's table of second sources: rows, matches, rows left unmatched."""
    srcs = report.data.sources
    if not srcs:
        return ""
    rows = []
    for name, s in srcs.items():
        if s is None:
            continue
        rs = s.response_scale or NO_SCALE
        rows.append([h(name), h(KIND_LABELS.get(s.kind, s.kind)), h(s.file),
                     f"<code>{h(s.id_column)}</code>", count(s.rows), count(s.matched),
                     count(s.unmatched_main_rows), count(s.unused_source_rows),
                     f"{num(rs.min, 0)} to {num(rs.max, 0)}"])
    out = ["<h3>Second sources</h3>",
           '<p class="note">Each source\'s rows are joined to the main file\'s rows on ids. A main-file row the '
           "source has no row for keeps its place with that source's items missing; a source row whose id the "
           "main file lacks cannot be joined. Both are counted here, and the warnings give example ids.</p>",
           table(["Source", "Kind", "File", "Id column", "Rows", "Joined", "Main rows without a match",
                  "Source rows not used", "Answer range"], rows,
                 caption="How each second source was joined to the main file", numeric=(4, 5, 6, 7))]
    return "".join(out)


def path_sources_line(p: KeyPath) -> str:
    """One line under a path's title: same-source or cross-source, in words."""
    s = p.sources
    if s is None:
        return ""
    cls = "cross-source" if s.free_of_same_rater_bias else "same-source"
    return f'<p class="sub {cls}">{h(s.note)}</p>'


def cross_source_section(report: Report, figs: Figures | None = None) -> str:
    """Each same-source path beside its cross-source counterpart: a table and a figure."""
    figs = figs or Figures()
    paths = [p for p in report.paths if p.cross_source_check is not None]
    if not paths:
        return ""
    out = ["<p>A path answered by the same people at both ends can be inflated or hidden by their shared "
           "answering style; the same path measured across sources cannot. Where the design measures a "
           "construct in a second source too, each correction of the same-source path is set beside the "
           "cross-source estimate: the closer a correction comes, the better it worked on these data.</p>"]
    for i, p in enumerate(paths):
        c = p.cross_source_check
        b, cp = c.benchmark or NO_BENCHMARK, c.counterpart or NO_COUNTERPART
        bench_ci = pair_or_none(b.ci)
        rows, classes, forest = [], [], []
        for m, e in c.by_estimate.items():
            within = e.within_benchmark_ci
            rows.append([h(method_label(m)) + (' <span class="tag">closest</span>' if m == c.closest else ""),
                         num(e.estimate), interval(e.ci), signed(e.difference),
                         "yes" if within else ("no" if within is not None else "\u2014")])
            classes.append("preferred" if m == c.closest else "")
            forest.append(svg.ForestRow(method_label(m), f"{num(e.estimate)}, gap {signed(e.difference)}",
                                        e.estimate, *pair_or_none(e.ci),
                                        preferred=m == c.closest, highlight_word="closest"))
        cross = f"{h(cp.predictor)} \u2192 {h(cp.outcome)}"
        out.append(f'<div class="keep"><h3 id="cross-{i + 1}">{path_title(p)} beside {cross}</h3>')
        out.append(f'<p>Benchmark: the cross-source path {cross}, {h(method_label(str(b.method)))} estimate '
                   f'{num(b.estimate)} {interval(bench_ci)}.</p>')
        ref = None
        if b.estimate is not None:
            ref = svg.Reference(f"cross-source estimate of {cp.predictor} \u2192 {cp.outcome} "
                                "and its interval", b.estimate, *bench_ci)
        desc = "; ".join(f"{r.label}: {r.value_text}" for r in forest)
        chart = svg.forest_plot(forest, ident=f"cross-{i + 1}-svg", reference=ref, desc=desc,
                                title=f"Each correction of {p.predictor} \u2192 {p.outcome} "
                                      "against the cross-source estimate")
        cap = (f"<strong>Figure {figs.next()}.</strong> Each estimate of {path_title(p)} (points, with intervals) "
               f"against the cross-source estimate of {cross} (green line, its interval shaded). The "
               "gap is each estimate minus the cross-source estimate; the closest is highlighted.")
        out.append(figure(chart, cap, f"cross-{i + 1}"))
        out.append(table(["Estimate", "Value", "Interval", "Gap to the cross-source estimate",
                          "Inside its interval"], rows, row_classes=classes, numeric=(1, 2, 3),
                         caption=f"How close each correction of {path_title(p)} came to {cross}"))
        out.append(f'<p class="sub">{h(c.note)}</p></div>')
    return section("cross-source", "Same-source paths beside their cross-source counterparts", "".join(out))


__all__ = ["sources_block", "path_sources_line", "cross_source_section"]
