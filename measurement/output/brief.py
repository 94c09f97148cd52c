"""The one-page brief: brief.html, made from report.json for the person who acts on it.

One printable A4/Letter page: the decision per key path with its trust light, the "review
before use" block when the analysis asks for it, the verdict on shared method, the three
cautions that matter most in full (the rest are named as being in report.html), the date and
the data fingerprint. The same decision sentences as report.html (:mod:`samesource.output.decision`),
from the same templates (:mod:`samesource.output.report_html`).
"""

from __future__ import annotations

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


def render_brief(report: dict, *, when: str | None = None) -> str:
    """brief.html as a string; ``when``: the date the analysis was made, printed at the top."""
    d = report.get("data") or {}
    cautions = [str(c) for c in report.get("cautions") or [] if c]
    v = (report.get("method_variance") or {}).get("verdict")
    verdict = {"level": str(v.get("level") or "not assessed"), "summary": str(v.get("summary") or "")} \
        if isinstance(v, dict) else None
    tool = report.get("tool") or {}
    return environment().get_template("brief.html.j2").render(
        title=f"Survey results in brief: {d.get('file') or 'survey data'}", css=stylesheet("brief.css"),
        file=d.get("file") or "Survey data", facts=header_facts(report, when), review=review_reasons(report),
        decisions=decisions_of(report), verdict=verdict, cautions=cautions[:BRIEF_CAUTIONS],
        more_cautions=max(len(cautions) - BRIEF_CAUTIONS, 0), sha256=d.get("sha256") or "\u2014",
        footer=f"Made by {tool.get('name') or 'samesource'} {tool.get('version') or ''}; every number is "
               f"from report.json; the evidence is in report.html.") + "\n"


__all__ = ["render_brief"]
