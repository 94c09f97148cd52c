"""The report as a notebook shows it (``Report._repr_html_``): the decision per key path, the
verdict on a shared method, the scales' reliability and every caution, in one scoped box.

The same decision sentences and number format as report.html (:mod:`samesource.output.decision`),
from the same autoescaped templates (:mod:`samesource.output.report_html`).
"""

from __future__ import annotations

from markupsafe import Markup

from samesource.output.decision import num
from samesource.output.report_html import (
    decisions_of,
    environment,
    header_facts,
    review_reasons,
    stylesheet,
)
from samesource.output.tables import report_tables


def render_notebook(report: dict) -> str:
    """An HTML fragment (no page around it) for a notebook cell's output."""
    d = report.get("data") or {}
    verdict = (report.get("method_variance") or {}).get("verdict") or None
    scales = [{"name": name, "role": c.get("role") or "", "items": len(c.get("items") or []),
               "alpha": num(c.get("alpha"), 2), "omega": num(c.get("omega"), 2),
               "cr": num(c.get("composite_reliability"), 2), "ave": num(c.get("ave"), 2)}
              for name, c in (report.get("constructs") or {}).items()]
    return environment().get_template("notebook.html.j2").render(
        css=Markup(stylesheet("notebook.css")), file=d.get("file") or "Survey data",
        facts=header_facts(report), review=review_reasons(report), decisions=decisions_of(report),
        verdict=verdict, scales=scales, cautions=list(report.get("cautions") or []),
        tables=list(report_tables(report)))
