"""The report as a notebook shows it (``Report._repr_html_``): the decision per key path, the
verdict on a shared method, the scales' reliability and every caution, in one scoped box.

The same decision sentences and number format as report.html (:mod:`samesource.output.decision`),
from the same autoescaped templates (:mod:`samesource.output.report_html`).
"""

from __future__ import annotations

from collections.abc import Mapping

from markupsafe import Markup

from samesource.output.decision import num
from samesource.output.report import Report
from samesource.output.report_html import (
    decisions_of,
    environment,
    header_facts,
    review_reasons,
    stylesheet,
)
from samesource.output.tables import report_tables


def render_notebook(report: Report | Mapping) -> str:
    """An HTML fragment (no page around it) for a notebook cell's output."""
    r = Report.of(report)
    verdict = r.method_variance.verdict
    scales = [{"name": name, "role": c.role or "", "items": len(c.items),
               "alpha": num(c.alpha, 2), "omega": num(c.omega, 2),
               "cr": num(c.composite_reliability, 2), "ave": num(c.ave, 2)}
              for name, c in r.constructs.items()]
    return environment().get_template("notebook.html.j2").render(
        css=Markup(stylesheet("notebook.css")), file=r.data.file or "Survey data",
        facts=header_facts(r), review=review_reasons(r), decisions=decisions_of(r),
        verdict=verdict if verdict.given else None, scales=scales, cautions=list(r.cautions),
        tables=list(report_tables(r)))
