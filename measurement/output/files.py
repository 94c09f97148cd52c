"""What an analysis writes: report.json, report.html, brief.html and the tables, as files.

:func:`report_files` renders them (no I/O); :func:`write_files` is the one place that writes
them into a folder, used by the command line and by :meth:`samesource.Report.save` alike.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path

from samesource.output.brief import render_brief
from samesource.output.report import Report
from samesource.output.report_html import render_html
from samesource.output.tables import report_tables, tables_csv, tables_xlsx

TABLES_FOLDER = "tables"


def made_at() -> str:
    """The date and time printed on report.html and brief.html."""
    return datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")


def report_files(report: Report | Mapping, *, when: str | None = None) -> dict[str, bytes]:
    """Relative file name -> content: report.json, report.html, brief.html, tables/NAME.csv
    (one per table of :func:`~samesource.output.tables.report_tables`) and tables.xlsx."""
    when = when or made_at()
    r = Report.of(report)
    files = {"report.json": r.to_json().encode("utf-8"),
             "report.html": render_html(r, when=when).encode("utf-8"),
             "brief.html": render_brief(r, when=when).encode("utf-8")}
    tables = report_tables(r)
    for name, text in tables_csv(tables).items():
        files[f"{TABLES_FOLDER}/{name}"] = text.encode("utf-8")
    files["tables.xlsx"] = tables_xlsx(tables)
    return files


def write_files(files: Mapping[str, bytes], folder: str | Path) -> Path:
    """Write ``files`` (relative name -> bytes) under ``folder``, creating what is missing.
    Raises OSError as the file system does; the caller says where."""
    out = Path(folder)
    for name, content in files.items():
        target = out / name
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(content)
    return out
