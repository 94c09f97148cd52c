"""Second sources: files of other raters, later waves or records, joined to the main file on ids.

A design's ``sources`` names each file and its id column; a construct with ``"source": NAME``
takes its items from that file. :func:`prepare_with_sources` reads every file with its own
missing codes, answer range and answer texts (:func:`samesource.input.prepare.prepare`), links the
rows on ids and returns one :class:`~samesource.input.prepare.PreparedData` whose rows are the main
file's. The rules (docs/design-file.md, "Second sources"):

* ids are compared as text, without surrounding spaces; a whole number stored as a number
  (1042.0 in a workbook) is the text "1042";
* every id may appear once in a source, and once in the main file: a repeated id is an
  error naming it (a rating joined to two respondents, or two ratings to one, would be a guess);
* a main-file row whose id the source lacks keeps its row, with that source's items missing;
  a source row whose id the main file lacks cannot be joined: both are counted and reported;
* no id in common is an error, naming both columns with example ids.
"""

from __future__ import annotations

import dataclasses
import os
import re
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from samesource.errors import DataError, DesignError
from samesource.input.design import MAIN, Design, check_columns
from samesource.input.loading import LoadedTable
from samesource.input.prepare import PreparedData, _label, _rows_text, _show, prepare, where_read

EXAMPLES = 5  # ids shown in messages and in the report


@dataclass(frozen=True)
class SourceLink:
    """How one source's rows were linked to the main file's: report["data"]["sources"][NAME]."""

    name: str
    kind: str
    file: str
    format: str
    sha256: str
    id_column: str
    main_id_column: str
    constructs: list[str]
    items: int
    rows: int                       # rows of the source file
    matched: int                    # main-file rows joined to a source row
    main_rows: int
    main_without_match: int         # main-file rows (with an id) that the source has no row for
    main_without_id: int            # main-file rows without an id: never joined
    source_without_match: int       # source rows whose id the main file lacks: not used
    source_without_id: int          # source rows without an id: not used
    response_scale: dict
    examples: dict = field(default_factory=dict)
    hint: str | None = None

    def to_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["unmatched_main_rows"] = self.main_without_match + self.main_without_id
        d["unused_source_rows"] = self.source_without_match + self.source_without_id
        return d


def prepare_with_sources(table: LoadedTable, design: Design,
                         tables: Mapping[str, LoadedTable] | None = None) -> PreparedData:
    """The main file's rows with every source's items joined on ids (see the module)."""
    tables = dict(tables or {})
    if not design.sources:
        if tables:
            raise DesignError(f"a source file was given for '{sorted(tables)[0]}', but the design names no "
                              "sources; add \"sources\" to the design and give the constructs of that file "
                              "\"source\"", field="sources")
        return prepare(table, design)
    missing = [n for n in design.sources if n not in tables]
    if missing:
        raise DesignError(f"the design's source '{missing[0]}' has no file: give it with --source "
                          f"{missing[0]}=PATH (over HTTP: \"sources\": {{\"{missing[0]}\": DATASET_ID}})",
                          field=f"sources.{missing[0]}")
    extra = [n for n in tables if n not in design.sources]
    if extra:
        raise DesignError(f"a file was given for source '{extra[0]}', which the design does not name; "
                          f"its sources are {', '.join(design.sources)}", field="sources")

    main = prepare(table, design.main_part())
    main_ids = [_label(v) for v in main.ids.to_numpy(dtype=object)]
    _refuse_repeated(main_ids, table, design.id_column,
                     "each respondent needs one row in the main file so that the sources' rows join to one person")
    frames = [main.items]
    warnings = list(main.warnings)
    links = []
    for name in design.sources:
        link, frame, notes = _join(name, design, tables[name], main_ids, main.items.index)
        frames.append(frame)
        warnings += notes
        links.append(link)
    items = pd.concat(frames, axis=1)[design.items]
    return dataclasses.replace(main, items=items, missing_cells=int(items.isna().to_numpy().sum()),
                               warnings=warnings, links=tuple(links), item_rows=None)


def load_sources(sources: Mapping[str, object] | None) -> dict[str, LoadedTable]:
    """The sources' tables: each value a LoadedTable, a DataFrame, a path, bytes, or a
    ``(data, file name)`` pair (the name used in messages)."""
    from samesource.input.frames import read_data

    out = {}
    for name, value in (sources or {}).items():
        if isinstance(value, tuple):
            out[name] = read_data(value[0], name=value[1])
        else:
            out[name] = read_data(value, name=None if isinstance(value, str | os.PathLike) else f"source {name}")
    return out


def check_source_columns(design: Design, name: str, columns, *, file: str | None = None) -> None:
    """A source's file must hold its constructs' items and its id column (errors name the
    design field of the source)."""
    part = design.source_part(name)
    try:
        check_columns(part, columns, file=file)
    except DesignError as e:
        if e.field == "id_column":
            e.field = f"sources.{name}.id_column"
        raise


def _join(name: str, design: Design, src: LoadedTable, main_ids: list[str | None],
          main_index: pd.Index) -> tuple[SourceLink, pd.DataFrame, list[dict]]:
    spec = design.sources[name]
    part = design.source_part(name)
    try:
        prepared = prepare(src, part)
    except DesignError as e:
        e.field = {"id_column": f"sources.{name}.id_column",
                   "response_scale": f"sources.{name}.response_scale"}.get(e.field or "", e.field)
        raise
    ids = [_label(v) for v in prepared.ids.to_numpy(dtype=object)]
    _refuse_repeated(ids, src, spec.id_column,
                     f"each respondent can have one row in source '{name}'; combine or drop the repeated rows")
    position = {v: i for i, v in enumerate(ids) if v is not None}
    main_known = {v for v in main_ids if v is not None}
    take = np.array([position.get(v, -1) if v is not None else -1 for v in main_ids], dtype=np.int64)
    matched = int((take >= 0).sum())
    without_id = sum(v is None for v in main_ids)
    main_unmatched = [v for v in main_ids if v is not None and v not in position]
    source_unmatched = [v for v in ids if v is not None and v not in main_known]
    hint = _near_misses(main_unmatched, source_unmatched)
    where = where_read(src)
    if matched == 0:
        raise DataError(
            f"no id in column '{spec.id_column}' matches an id in the main file's column "
            f"'{design.id_column}' (this file: {_examples(ids)}; the main file: {_examples(main_ids)})"
            + (f"; {hint}" if hint else "") + ". Check that both columns hold the same ids",
            file=where, column=spec.id_column, code="no_matching_ids")

    values = prepared.items.to_numpy(dtype=float)
    joined = np.full((len(main_ids), values.shape[1]), np.nan)
    joined[take >= 0] = values[take[take >= 0]]
    frame = pd.DataFrame(joined, index=main_index, columns=prepared.items.columns)

    label = os.path.basename(src.source)  # the report names files without their folders
    notes = [{"code": w["code"], "message": f"source '{name}' ({label}): {w['message']}"}
             for w in prepared.warnings]
    unmatched = len(main_unmatched) + without_id
    if unmatched:
        notes.append({"code": "source_unmatched_rows", "message": (
            f"{unmatched} of {len(main_ids)} rows of the main file have no row in source '{name}' "
            f"({label})" + (f", {without_id} of them without an id" if without_id else "")
            + (f"; for example {_examples(main_unmatched)}" if main_unmatched else "")
            + f": their {name} items are missing (listwise deletion leaves these rows out of every "
              "model; full-information ML keeps them with those items missing)"
            + (f"; {hint}" if hint else ""))})
    unused = len(source_unmatched) + sum(v is None for v in ids)
    if unused:
        notes.append({"code": "source_unused_rows", "message": (
            f"{unused} of {len(ids)} rows of source '{name}' ({label}) have "
            + (f"an id the main file does not have (for example {_examples(source_unmatched)})"
               if source_unmatched else "no id") + ": they cannot be joined and are not used")})
    link = SourceLink(
        name=name, kind=spec.kind, file=label, format=src.format, sha256=src.sha256,
        id_column=spec.id_column, main_id_column=design.id_column or "",
        constructs=[c for c in design.constructs if design.source_of(c) == name],
        items=values.shape[1], rows=len(ids), matched=matched, main_rows=len(main_ids),
        main_without_match=len(main_unmatched), main_without_id=without_id,
        source_without_match=len(source_unmatched), source_without_id=sum(v is None for v in ids),
        response_scale={"min": prepared.scale_min, "max": prepared.scale_max, "source": prepared.scale_source},
        examples={"main_without_match": main_unmatched[:EXAMPLES],
                  "source_without_match": source_unmatched[:EXAMPLES]},
        hint=hint)
    return link, frame, notes


def _refuse_repeated(ids: list[str | None], table: LoadedTable, column: str | None, why: str) -> None:
    counts = Counter(v for v in ids if v is not None)
    repeated = [v for v, c in counts.items() if c > 1]
    if not repeated:
        return
    first = repeated[0]
    rows = [int(r) for r, v in zip(table.row_numbers, ids, strict=True) if v == first]
    more = (f"; {len(repeated) - 1} other id(s) repeat too: "
            + ", ".join(_show(v) for v in repeated[1:EXAMPLES + 1])
            + (", ..." if len(repeated) > EXAMPLES + 1 else "")) if len(repeated) > 1 else ""
    raise DataError(f"the id {_show(first)} appears in {_rows_text(table.row_label, rows)}{more}: {why}",
                    file=where_read(table), row=rows[1], column=column, code="duplicate_ids")


def _examples(ids: list[str | None]) -> str:
    shown = [_show(v) for v in ids if v is not None][:EXAMPLES]
    return ", ".join(shown) if shown else "no ids"


def _near_misses(main_unmatched: list[str], source_unmatched: list[str]) -> str | None:
    """A hint when ids that did not match would match written alike (case, leading zeros)."""
    if not main_unmatched or not source_unmatched:
        return None

    def loose(v: str) -> str:  # without case, spaces and the leading zeros of each number in it
        return re.sub(r"(?<!\d)0+(?=\d)", "", v.casefold().replace(" ", ""))

    pool = {loose(v): v for v in source_unmatched}
    pairs = [(m, pool[loose(m)]) for m in main_unmatched if loose(m) in pool]
    if not pairs:
        return None
    a, b = pairs[0]
    return (f"{len(pairs)} of the unmatched ids differ only in case, spaces or leading zeros (main file "
            f"{_show(a)}, source {_show(b)}): write them alike in both files")


def source_of_items(design: Design) -> dict[str, str]:
    """Every item's source (MAIN for the main file)."""
    return {it: c.source for c in design.constructs.values() for it in c.items}


__all__ = ["SourceLink", "prepare_with_sources", "check_source_columns", "source_of_items", "MAIN"]
