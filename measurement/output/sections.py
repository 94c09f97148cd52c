"""report.html's sections of detail, each one object: its id (the anchor), its title in the
table of contents, how it is rendered, and the tables (tables/NAME.csv, Report.to_frame)
that hold its numbers. The page shows them in this order, and the table of contents lists
those that rendered. Adding a section: DEVELOPERS.md.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from samesource.output import check_html, report_html, sources_html
from samesource.output.report import Report
from samesource.output.report_html import Figures

# (the typed report, the page's figures) -> the section's HTML, "" when it does not apply
Render = Callable[[Report, Figures], str]


@dataclass(frozen=True)
class ReportSection:
    """One section of report.html's detail."""

    id: str                   # the section's anchor (<section id=...>), stable: links point at it
    title: str                # its line in the table of contents
    render: Render
    tables: tuple[str, ...]   # the tables holding its numbers (names of report_tables)


def _cautions_again(report: Report, figs: Figures) -> str:
    inner = (report_html.cautions_section(report, "cautions-list", "Every caution, in full")
             .replace('<h2 id="cautions-list-h">', '<h3 id="cautions-list-h">').replace("</h2>", "</h3>", 1))
    return report_html.section("cautions-again", "Cautions (repeated)", inner)


SECTIONS: tuple[ReportSection, ...] = (
    ReportSection("paths", "Every estimate of each path", report_html.paths_section, ("paths",)),
    ReportSection("cross-source", "Same-source paths beside their cross-source counterparts",
                  sources_html.cross_source_section, ("cross_source",)),
    ReportSection("correction-check", "How well each correction works on data like these",
                  lambda report, figs: check_html.correction_check_section(report), ("correction_check",)),
    ReportSection("sensitivity", "How much shared method would explain each path away",
                  report_html.sensitivity_section, ("sensitivity", "sensitivity_summary")),
    ReportSection("reliability", "How well each scale measures", report_html.reliability_section,
                  ("constructs",)),
    ReportSection("loadings", "Item loadings", report_html.loadings_section, ("items",)),
    ReportSection("method-variance", "Common-method checks",
                  lambda report, figs: report_html.method_section(report), ("method_checks",)),
    ReportSection("fit", "Measurement model: fit and overlap between scales",
                  lambda report, figs: report_html.fit_section(report),
                  ("fit", "factor_correlations", "htmt", "fornell_larcker")),
    ReportSection("teams", "Teams", lambda report, figs: report_html.teams_section(report),
                  ("teams", "team_constructs", "team_paths")),
    ReportSection("next-time", "Next time: testing for a shared answering style",
                  lambda report, figs: check_html.next_time_section(report), ()),
    ReportSection("data", "Data, screening and warnings",
                  lambda report, figs: report_html.data_section(report),
                  ("sources", "screening", "screening_rules", "warnings")),
    ReportSection("cautions-again", "Cautions (repeated)", _cautions_again, ("cautions",)),
)


def render_sections(report: Report, figs: Figures) -> list[tuple[ReportSection, str]]:
    """Every section that applies to this report, with its HTML, in page order."""
    out = []
    for s in SECTIONS:
        html = s.render(report, figs)
        if html:
            out.append((s, html))
    return out


__all__ = ["ReportSection", "SECTIONS", "render_sections"]
