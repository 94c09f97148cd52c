"""What the dataset row keeps of an upload: its draft design, warnings and sheet details.

Computed from the LoadedTable inside the bounded parsing child (service/uploads.py), so the
web process never holds the parsed file.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

from samesource.input.design import draft_design
from samesource.input.drafting import Draft, draft_from_table
from samesource.input.loading import LoadedTable, text_answers
from samesource.input.prepare import numeric_columns

log = logging.getLogger("samesource.service")


@dataclass
class UploadSummary:
    format: str
    rows: int
    columns: list[str]
    numeric_columns: list[str]
    warnings: list[dict]
    draft_design: dict
    details: dict


def text_warnings(table: LoadedTable, mapped: set[str]) -> list[dict]:
    """A ``text_answers`` warning per item-like column holding answer texts; ``mapped``
    columns (the draft's answer_labels cover them) say so."""
    out = []
    for col, info in text_answers(table).items():
        shown = ", ".join(repr(t) for t in info["texts"][:6]) + (", ..." if len(info["texts"]) > 6 else "")
        if col in mapped:
            advice = "the draft design maps them with answer_labels: check the numbers"
        else:
            advice = ("map them to numbers with answer_labels in the design before starting an "
                      "analysis of this item")
        out.append({"code": "text_answers", "column": col, "row": info["row"], "text": info["text"],
                    "texts": info["texts"], "rows": info["rows"], "message": (
                        f"column '{col}' holds answer texts ({shown}; first in {table.row_label} "
                        f"{info['row']}), not numbers; {advice}")})
    return out


def _draft(table: LoadedTable, columns: list[str], numeric: list[str]) -> Draft:
    """The draft from the answers; from the names alone should reading the answers fail
    on something unforeseen (an upload is never refused for its draft)."""
    try:
        return draft_from_table(table)
    except Exception as e:  # noqa: BLE001 - the draft is a convenience, the upload is what counts
        log.warning("draft from the answers failed (%s); drafted from the names", e.__class__.__name__)
        left: list[dict] = []
        return Draft(design=draft_design(columns, numeric=numeric, left_out=left), left_out=left)


def summarize(table: LoadedTable) -> UploadSummary:
    columns = [str(c) for c in table.frame.columns]
    numeric = list(numeric_columns(table))
    draft = _draft(table, columns, numeric)
    mapped = {i for c in draft.design["constructs"].values() for i in c["items"]} \
        if draft.design.get("answer_labels") else set()
    sheets = [dict(d, chosen=d["name"] == table.sheet) for d in table.sheets]
    details = {"sheet": table.sheet, "sheets": sheets, "draft_left_out": draft.left_out,
               "draft_notes": draft.notes, "sheet_columns": table.sheet_columns}
    return UploadSummary(format=table.format, rows=int(len(table.frame)), columns=columns,
                         numeric_columns=numeric,
                         warnings=list(table.warnings) + text_warnings(table, mapped),
                         draft_design=draft.design, details=details)
