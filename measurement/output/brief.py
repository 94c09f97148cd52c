"""The one-page brief: brief.html, made from report.json for the person who acts on it.

One printable A4/Letter page: the decision per key path with its trust light, the "review
before use" block when the analysis asks for it, the verdict on shared method, the three
cautions that matter most in full (the rest are named as being in report.html), the date and
the data fingerprint. The same decision sentences as report.html (:mod:`samesource.output.decision`),
from the same templates (:mod:`samesource.output.report_html`).
"""

from __future__ import annotations

from collections.abc import Mapping

from samesource.output.report import Report
from samesource.output.report_html import (
    decisions_of,
    environment,
    header_facts,
    review_reasons,
    stylesheet,
)

# The cautions every report carries come in order of weight (samesource.output.cautions): decisions
# about individuals, what statistical remedies can do, causality. The brief carries those three.
BRIEF_CAUTIONS = 3


def render_brief(report: Report | Mapping, *, when: str | None = None) -> str:
    """brief.html as a string; ``when``: the date the analysis was made, printed at the top."""
    r = Report.of(report)
    d = r.data
    cautions = [str(c) for c in r.cautions if c]
    v = r.method_variance.verdict
    verdict = {"level": str(v.level or "not assessed"), "summary": str(v.summary or "")} if v.given else None
    return environment().get_template("brief.html.j2").render(
        title=f"Survey results in brief: {d.file or 'survey data'}", css=stylesheet("brief.css"),
        file=d.file or "Survey data", facts=header_facts(r, when), review=review_reasons(r),
        decisions=decisions_of(r), verdict=verdict, cautions=cautions[:BRIEF_CAUTIONS],
        more_cautions=max(len(cautions) - BRIEF_CAUTIONS, 0), sha256=d.sha256 or "\u2014",
        footer=f"Made by {r.tool.name or 'samesource'} {r.tool.version or ''}; every number is "
               f"from report.json; the evidence is in report.html.") + "\n"


__all__ = ["render_brief"]
