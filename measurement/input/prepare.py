"""Turning a loaded table into numeric item data, as the study design describes it.

:func:`prepare` takes the design's item columns, reads every cell as a number (blank and
missing-code cells become NaN), checks the answers against the response scale, refuses
items that cannot be analysed (constant or empty), and recodes reverse-keyed items. Every
refusal names the file, the row as the user sees it, and the column.
"""

from __future__ import annotations

import datetime as _dt
import numbers
import re
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from samesource.errors import DataError, DesignError
from samesource.input.design import Design, answer_key, check_columns, did_you_mean
from samesource.input.loading import (  # missing words: read as blank, with a warning
    MISSING_WORDS,
    LoadedTable,
    text_cells,
)
from samesource.input.rows import FrameRows, ItemRows

_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_COMMA_NUMBER = re.compile(r"[+-]?\d*,\d+")


@dataclass
class PreparedData:
    """Item answers ready for analysis, and what was done to get them."""

    items: pd.DataFrame  # float64, design.items in design order, index = user row numbers
    ids: pd.Series | None
    groups: pd.Series | None  # group labels as strings (NaN where missing)
    scale_min: float
    scale_max: float
    scale_source: str  # "design" or "data"
    n_rows: int
    missing_cells: int
    warnings: list[dict]  # {"code", "message"}: the loader's and this step's
    table: LoadedTable  # where the data came from (format, encoding, ...)
    links: tuple = ()  # sources.SourceLink per second source joined on ids (measurement/input/sources.py)
    # The answers a block of rows at a time (measurement/input/rows.py); FrameRows over
    # ``items`` unless given (a file read beyond memory gives CodedRows).
    item_rows: ItemRows | None = field(default=None, repr=False)

    @property
    def rows(self) -> ItemRows:
        """The items' answers as ItemRows: how a stage that reads rows is to read them."""
        if self.item_rows is None:
            self.item_rows = FrameRows(self.items)
        return self.item_rows


def _num(v: float) -> str:
    v = float(v)
    if v.is_integer() and abs(v) < 1e15:
        return str(int(v))
    return repr(v)


def _show(v: Any) -> str:
    s = str(v)
    return repr(s if len(s) <= 40 else s[:37] + "...")


def _rows_text(label: str, rows: list[int], limit: int = 5, total: int | None = None) -> str:
    """"row 7", "rows 7 and 9", "rows 7, 9, 12, 15, 20, ..."; ``total`` the number of rows when
    ``rows`` holds only the first of them."""
    total = len(rows) if total is None else total
    shown = [str(r) for r in rows[:limit]]
    more = ", ..." if total > limit else ""
    if total == 1:
        return f"{label} {shown[0]}"
    if total <= limit:
        return f"{label}s " + ", ".join(shown[:-1]) + f" and {shown[-1]}"
    return f"{label}s " + ", ".join(shown) + more


def _read_column(s: pd.Series, labels: dict[str, float | None] | None = None
                 ) -> tuple[np.ndarray, np.ndarray, Counter]:
    """Numbers of one item column, a mask of cells that are not numbers, missing words.

    ``labels`` (keys from :func:`~samesource.input.design.answer_key`) turn answer texts into
    numbers; a text labelled None is a missing answer (counted with the missing words)."""
    n = len(s)
    words: Counter = Counter()
    if pd.api.types.is_bool_dtype(s.dtype):
        vals = np.full(n, np.nan)
        return vals, s.notna().to_numpy(bool), words
    if pd.api.types.is_numeric_dtype(s.dtype):
        vals = s.to_numpy(dtype=float, na_value=np.nan)
        return vals, np.isinf(vals), words
    if pd.api.types.is_datetime64_any_dtype(s.dtype) or isinstance(s.dtype, pd.PeriodDtype):
        return np.full(n, np.nan), s.notna().to_numpy(bool), words

    cells = s.to_numpy(dtype=object)
    if pd.api.types.infer_dtype(cells, skipna=True) in ("string", "empty"):
        # Text cells (and missing ones): each distinct text read once, the answers spread back.
        codes, uniques = pd.factorize(cells)
        counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
        u_vals = np.full(len(uniques) + 1, np.nan)  # the last entry: missing cells (code -1)
        u_bad = np.zeros(len(uniques) + 1, dtype=bool)
        for k, v in enumerate(uniques):
            u_vals[k], u_bad[k], word = _read_cell(v, labels)
            if word is not None:
                words[word] += int(counts[k])
        return u_vals[codes], u_bad[codes], words
    vals = np.full(n, np.nan)
    bad = np.zeros(n, dtype=bool)
    for i, v in enumerate(cells):
        vals[i], bad[i], word = _read_cell(v, labels)
        if word is not None:
            words[word] += 1
    return vals, bad, words


def _read_cell(v: Any, labels: dict[str, float | None] | None) -> tuple[float, bool, str | None]:
    """One cell by the item rules: (number or NaN, whether it is bad, the missing word it is)."""
    nan = float("nan")
    if v is None:
        return nan, False, None
    if isinstance(v, bool | np.bool_):
        return nan, True, None
    if isinstance(v, numbers.Real):
        f = float(v)
        if f != f:
            return nan, False, None
        if np.isinf(f):
            return nan, True, None
        return f, False, None
    if isinstance(v, str):
        t = v.strip()
        if not t:
            return nan, False, None
        if _NUMBER.fullmatch(t):
            f = float(t)
            if np.isinf(f):
                return nan, True, None
            return f, False, None
        if labels and answer_key(t) in labels:
            number = labels[answer_key(t)]
            if number is None:
                return nan, False, t
            return number, False, None
        if t.lower() in MISSING_WORDS:
            return nan, False, t
        return nan, True, None
    if v is pd.NaT or (not isinstance(v, _dt.date | _dt.time | _dt.timedelta) and _scalar_na(v)):
        return nan, False, None
    return nan, True, None  # dates, times and anything else a reader may hand over


def _scalar_na(v: Any) -> bool:
    try:
        return bool(pd.isna(v))
    except (TypeError, ValueError):
        return False


def _what_is_wrong(v: Any) -> str:
    if isinstance(v, bool | np.bool_):
        return "is a TRUE/FALSE value, not a number"
    if isinstance(v, _dt.date | _dt.time | _dt.timedelta | pd.Timestamp | np.datetime64):
        return "is a date or time, not a number"
    if isinstance(v, numbers.Real):
        return "is not a finite number"
    if isinstance(v, str):
        t = v.strip()
        if t.startswith("="):
            return ("is a formula with no saved result (open and save the workbook in a "
                    "spreadsheet program so that its results are stored)")
        if _COMMA_NUMBER.fullmatch(t):
            return "is written with a decimal comma; write it with a decimal point"
        if _NUMBER.fullmatch(t):
            return "is not a finite number"
    return "is not a number"


def _advice_text(v: Any) -> str | None:
    """The cell's text when it is an answer text (not a number, decimal-comma number or
    formula), the kind :func:`_text_advice` proposes answer_labels for."""
    if not isinstance(v, str):
        return None
    t = v.strip()
    if _NUMBER.fullmatch(t) or _COMMA_NUMBER.fullmatch(t) or t.startswith("="):
        return None
    return t


@dataclass
class BadCells:
    """What a message about one column's bad cells needs from them, gathered a chunk of rows at
    a time (the in-memory reader passes the whole column as one chunk): their count, the first
    cell, the first rows, the distinct answer texts and (out of scale) the count of each value."""

    count: int = 0
    first_value: Any = None
    rows: list[int] = field(default_factory=list)      # the first ROWS_KEPT rows, in order
    texts: list[str] = field(default_factory=list)     # distinct answer texts, the first TEXTS_KEPT
    values: Counter = field(default_factory=Counter)   # out of scale: _num(value) -> count

    ROWS_KEPT = 6    # the first cell and the five others a message lists
    TEXTS_KEPT = 9   # eight shown, and whether there are more

    def add(self, rows: np.ndarray, cells: np.ndarray, *, scale: bool = False) -> None:
        """The bad cells of a chunk: their user row numbers and values, in row order."""
        if not len(rows):
            return
        if self.count == 0:
            self.first_value = cells[0]
        self.count += len(rows)
        room = self.ROWS_KEPT - len(self.rows)
        if room > 0:
            self.rows += [int(r) for r in rows[:room]]
        if scale:
            self.values.update(_num(x) for x in cells)
            return
        if len(self.texts) < self.TEXTS_KEPT:
            for v in cells:
                t = _advice_text(v)
                if t is not None and t not in self.texts:
                    self.texts.append(t)
                    if len(self.texts) == self.TEXTS_KEPT:
                        break

    @classmethod
    def of(cls, rows: np.ndarray, values: np.ndarray, bad: np.ndarray, *, scale: bool = False) -> BadCells:
        out = cls()
        idx = np.flatnonzero(bad)
        out.add(np.asarray(rows)[idx], np.asarray(values)[idx], scale=scale)
        return out


def _text_advice(cells: BadCells, labels: dict[str, float | None]) -> str | None:
    """For a column whose bad cells are answer texts: how to map them with answer_labels."""
    distinct = cells.texts
    if not distinct:
        return None
    shown = ", ".join(_show(t) for t in distinct[:8]) + (", ..." if len(distinct) > 8 else "")
    if labels:
        hint = did_you_mean(answer_key(distinct[0]), list(labels))
        return (f"The design's answer_labels do not map {shown}{hint}: add them to answer_labels "
                "(a text meaning no answer may map to null, or to a number listed in missing_codes)")
    return (f"The answers in this column are texts ({shown}): map them to numbers with "
            "answer_labels in the design, for example {\"Strongly disagree\": 1, ..., "
            "\"Strongly agree\": 5} (samesource draft-design proposes it for scales it "
            "recognises); a text meaning no answer may map to null, or to a number listed in "
            "missing_codes")


def _non_numeric_error(table: LoadedTable, col: str, s: pd.Series, bad: np.ndarray,
                       others: list[str], labels: dict[str, float | None] | None = None
                       ) -> DataError:
    cells = BadCells.of(table.row_numbers, s.to_numpy(dtype=object), bad)
    cells.first_value = s.iloc[int(np.flatnonzero(bad)[0])]  # as the column gives it (numpy scalars)
    return non_numeric_error(table.source, table.row_label, col, cells, others, labels)


def non_numeric_error(source: str, label: str, col: str, cells: BadCells, others: list[str],
                      labels: dict[str, float | None] | None = None) -> DataError:
    """The message for a column's cells that are not numbers (``cells``: :class:`BadCells`)."""
    value = cells.first_value
    rest = cells.rows[1:]
    if cells.count > 1:
        more = (f" {cells.count - 1} other cell(s) in this column are not numbers either "
                f"({_rows_text(label, rest, total=cells.count - 1)}).")
    else:
        more = " It is the only such cell in this column."
    if others:
        more += " Other items with cells that are not numbers: " + ", ".join(others[:5]) + (
            ", ..." if len(others) > 5 else "") + "."
    advice = _text_advice(cells, labels or {})
    if advice:
        return DataError(f"the value {_show(value)} {_what_is_wrong(value)}.{more} {advice}",
                         file=source, row=cells.rows[0], column=col, code="text_answers")
    return DataError(
        f"the value {_show(value)} {_what_is_wrong(value)}.{more} Item answers "
        "must be numbers: fix the value, or, if it stands for a missing answer, leave the "
        "cell blank or use a numeric code and list that code in the design's missing_codes",
        file=source, row=cells.rows[0], column=col)


def _scale_error(table: LoadedTable, col: str, vals: np.ndarray, out: np.ndarray,
                 lo: float, hi: float, others: list[str]) -> DataError:
    cells = BadCells.of(table.row_numbers, vals, out, scale=True)
    return scale_error(table.source, col, cells, lo, hi, others)


def scale_error(source: str, col: str, cells: BadCells, lo: float, hi: float,
                others: list[str]) -> DataError:
    """The message for a column's answers outside the response scale."""
    v = float(cells.first_value)
    listed = ", ".join(f"{k} ({c}x)" for k, c in cells.values.most_common(6))
    msg = (f"the value {_num(v)} is outside the response scale {_num(lo)} to "
           f"{_num(hi)} given in the design. ")
    if cells.count > 1:
        msg += f"This column has {cells.count} values outside the scale: {listed}. "
    if others:
        msg += "Other items with values outside it: " + ", ".join(others[:5]) + (
            ", ..." if len(others) > 5 else "") + ". "
    if v.is_integer():
        msg += (f"If {_num(v)} is a code for a missing answer, add it to missing_codes in the "
                "design; otherwise correct the value, or the design's response_scale")
    else:
        msg += "Correct the value, or the design's response_scale"
    return DataError(msg, file=source, row=cells.rows[0], column=col)


def _label(v: Any) -> str | None:
    """A group or id value as text; None when missing."""
    if v is None or _scalar_na(v):
        return None
    if isinstance(v, float | np.floating) and float(v).is_integer():
        return str(int(v))
    if isinstance(v, bool | np.bool_):
        return "TRUE" if v else "FALSE"
    t = str(v).strip()
    return t or None


def prepare(table: LoadedTable, design: Design) -> PreparedData:
    """Numeric item data for ``design`` from ``table``; bad cells raise :class:`DataError`."""
    check_columns(design, [str(c) for c in table.frame.columns], file=where_read(table),
                  other_sheets={k: v for k, v in table.sheet_columns.items() if k != table.sheet})
    frame = table.frame
    items = design.items
    n = len(frame)
    index = pd.Index(np.asarray(table.row_numbers, dtype=np.int64), name=table.row_label)
    notes: list[dict] = [dict(w) for w in table.warnings]

    matrix = np.empty((n, len(items)), dtype=float, order="F")  # filled and kept column by column
    bad_cols: list[tuple[str, np.ndarray]] = []
    words: Counter = Counter()
    for j, col in enumerate(items):
        vals, bad, w = _read_column(frame[col], design.labels_for(col))
        matrix[:, j] = vals
        words.update(w)
        if bad.any():
            bad_cols.append((col, bad))
    if bad_cols:
        col, bad = bad_cols[0]
        raise _non_numeric_error(table, col, frame[col], bad, [c for c, _ in bad_cols[1:]],
                                 design.labels_for(col))
    if words:
        notes.append(missing_words_note(words))

    if design.missing_codes:
        matrix[np.isin(matrix, np.asarray(design.missing_codes, dtype=float))] = np.nan

    # Each column's answers counted and their lowest and highest found once (NaN skipped),
    # for the range check, the items that cannot be analysed and the missing cells.
    gaps = np.array([np.count_nonzero(np.isnan(matrix[:, j])) for j in range(len(items))], dtype=np.int64)
    lows = np.array([np.fmin.reduce(matrix[:, j]) if gaps[j] < n else np.inf for j in range(len(items))])
    highs = np.array([np.fmax.reduce(matrix[:, j]) if gaps[j] < n else -np.inf for j in range(len(items))])
    if design.scale_min is not None and design.scale_max is not None:
        lo, hi = float(design.scale_min), float(design.scale_max)
        cols = [j for j in range(len(items)) if lows[j] < lo or highs[j] > hi]
        if cols:
            j = cols[0]
            with np.errstate(invalid="ignore"):
                outside = (matrix[:, j] < lo) | (matrix[:, j] > hi)
            raise _scale_error(table, items[j], matrix[:, j], outside, lo, hi,
                               [items[k] for k in cols[1:]])
        source = "design"
    else:
        _refuse_values_apart(table, items, matrix)
        lo = hi = float("nan")
        source = "data"

    for j, col in enumerate(items):
        err = item_answers_error(col, int(n - gaps[j]), float(lows[j]), float(highs[j]), n,
                                 table.source, table.row_label)
        if err is not None:
            raise err

    reverse = [i for c in design.constructs.values() for i in c.reverse]
    if source == "data":
        lo, hi = float(lows.min()), float(highs.max())  # every item has answers (checked above)
        rev = (f" Reverse-keyed items ({', '.join(reverse)}) were recoded with it as "
               f"{_num(lo + hi)} - x." if reverse else "")
        notes.append({"code": "scale_inferred", "message": (
            f"the design gives no response_scale, so the scale was taken from the data as "
            f"{_num(lo)} to {_num(hi)} (the lowest and highest answers over all items).{rev} "
            "Add response_scale to the design if the scale is wider than the answers given")})
    for item in reverse:
        j = items.index(item)
        matrix[:, j] = lo + hi - matrix[:, j]

    empty_rows = (np.flatnonzero(np.isnan(matrix).all(axis=1)) if items and gaps.min() > 0
                  else np.array([], dtype=np.intp))
    if len(empty_rows):
        rows = [int(table.row_numbers[i]) for i in empty_rows[:BadCells.ROWS_KEPT]]
        notes.append(rows_without_answers_note(table.row_label, rows, len(empty_rows)))

    ids = groups = None
    if design.id_column:
        ids = pd.Series(frame[design.id_column].to_numpy(dtype=object), index=index,
                        name=design.id_column, dtype=object)
        _check_ids(frame[design.id_column], table, design.id_column, notes)
    if design.group_column:
        labels, none = _labels(frame[design.group_column])
        groups = pd.Series(np.where(none, np.nan, labels), index=index, name=design.group_column,
                           dtype=object)
        missing = int(none.sum())
        if missing:
            rows = [int(r) for r in np.asarray(table.row_numbers)[none][:BadCells.ROWS_KEPT]]
            notes.append(missing_groups_note(table.row_label, design.group_column, rows, missing))

    items_frame = pd.DataFrame(matrix, columns=pd.Index(items, dtype=object), index=index,
                               dtype="float64", copy=False)
    return PreparedData(items=items_frame, ids=ids, groups=groups, scale_min=lo, scale_max=hi,
                        scale_source=source, n_rows=n,
                        missing_cells=int(gaps.sum()), warnings=notes, table=table)


def missing_words_note(words: Counter) -> dict:
    """The note on item cells holding missing words (text -> count)."""
    listed = ", ".join(f"'{k}' ({c}x)" for k, c in words.most_common())
    return {"code": "text_missing_markers", "message": (
        f"item cells holding {listed} were read as missing answers")}


def rows_without_answers_note(label: str, rows: list[int], total: int) -> dict:
    """The note on rows with no answer to any item (``rows``: the first of them, ``total`` in all)."""
    return {"code": "rows_without_answers", "message": (
        f"{total} {label}(s) have no answer to any item ({_rows_text(label, rows, total=total)}); "
        "they are kept, and handled with the other missing data")}


def missing_groups_note(label: str, col: str, rows: list[int], total: int) -> dict:
    """The note on rows with no group (``rows``: the first of them, ``total`` in all)."""
    return {"code": "missing_groups", "message": (
        f"{total} {label}(s) have no value in the group column '{col}' "
        f"({_rows_text(label, rows, total=total)}); they cannot be placed in a group")}


def item_answers_error(col: str, count: int, lowest: float, highest: float, rows: int, source: str,
                       label: str) -> DataError | None:
    """An item that cannot be analysed, from its answers' count and range: none, or one answer
    throughout (None when it can)."""
    if count == 0:
        return DataError(
            f"item '{col}' has no answers (every cell is blank or a missing code); drop it "
            "from the design, or check that this is the right column", file=source, column=col)
    if lowest == highest:
        some = " that has an answer" if count < rows else ""
        return DataError(
            f"item '{col}' has the same answer ({_num(lowest)}) in every "
            f"{label}{some}, so it carries no information; drop it from the "
            "design", file=source, column=col)
    return None


def where_read(table: LoadedTable) -> str:
    """The file, and for a workbook the sheet read: "survey.xlsx (sheet 'Responses')"."""
    return f"{table.source} (sheet '{table.sheet}')" if table.sheet else table.source


def standing_apart(values: np.ndarray) -> tuple[list[float], tuple[float, float] | None]:
    """Answer values that stand apart from the rest, as codes for "no answer" do, and the
    range of the others (None when there are no answers).

    Rules (common practice, see docs/design-file.md): beside answers of 1 or more, or more
    than 2 below the lowest answer of 0 or more, negative values stand apart (-1, -9, -99;
    not the -3 to 3 of a scale with a middle of 0); going up from the lowest answer, a value
    more than 2 above the next lower one starts the values apart (9 beside 1 to 5); a value
    written with nines alone (9, 99, 999) stands apart when the value one below it never
    occurs (9 beside 1 to 7, not 9 on a 1 to 9 scale). Whole-number answers only, and at most
    15 different answers besides those set apart: decimals or a wide range (a slider from 0
    to 100) mean a scale of another kind, and nothing is set apart.
    """
    v = np.asarray(values, dtype=float)
    v = v[~np.isnan(v)]
    if v.size == 0:
        return [], None
    distinct = sorted(set(v.tolist()))
    if not all(float(x).is_integer() for x in distinct):
        return [], (distinct[0], distinct[-1])
    apart: list[float] = []
    core = distinct
    low = [x for x in distinct if x < 0]
    high = [x for x in distinct if x >= 0]
    if low and high and (high[0] >= 1 or high[0] - low[-1] > 2):
        apart += low
        core = high
    wide = [x for x in core if not (x >= 9 and set(str(int(x))) == {"9"})]
    if len(wide) > 15:  # a wide scale (a slider): gaps are no sign of codes
        return sorted(apart), (core[0], core[-1])
    kept = [core[0]]
    for x in core[1:]:
        if x - kept[-1] > 2:
            apart += [y for y in core if y >= x]
            break
        kept.append(x)
    present = set(kept)
    nines = [x for x in kept if x >= 9 and set(str(int(x))) == {"9"} and x - 1 not in present]
    if nines and len(kept) > len(nines) + 1:
        apart += nines
        kept = [x for x in kept if x not in nines]
    return sorted(set(apart)), (kept[0], kept[-1])


def _refuse_values_apart(table: LoadedTable, items: list[str], matrix: np.ndarray) -> None:
    """With no response_scale, codes such as 99 would become the top of the scale: refuse."""
    apart, core = standing_apart(matrix.ravel())
    if not apart or core is None:
        return
    counts = []
    for code in apart[:6]:
        cols = [items[j] for j in range(len(items)) if (matrix[:, j] == code).any()]
        n = int((matrix == code).sum())
        counts.append(f"{_num(code)} ({n}x, in {', '.join(cols[:3])}{', ...' if len(cols) > 3 else ''})")
    codes = ", ".join(_num(c) for c in apart)
    raise DesignError(
        f"the design gives no response_scale, and the answers hold values that stand apart from "
        f"the others ({_num(core[0])} to {_num(core[1])}): {'; '.join(counts)}. Taken as answers they "
        f"would stretch the scale to {_num(min(apart + [core[0]]))} to {_num(max(apart + [core[1]]))}. "
        f"If they are codes for no answer, add \"missing_codes\": [{codes}] to the design, and give "
        f"the answer range, such as \"response_scale\": {{\"min\": {_num(core[0])}, \"max\": "
        f"{_num(core[1])}}}", field="response_scale", file=table.source, code="values_apart")


def _labels(s: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_label` of every cell (object array, None where missing) and the missing mask;
    each distinct value labelled once where values of one kind cannot be confused (True and 1
    are one key to a hash table, but not one label)."""
    cells = s.to_numpy(dtype=object)
    if pd.api.types.infer_dtype(cells, skipna=True) in ("string", "empty"):
        if text_cells(cells).spaced:
            stripped = pd.Series(cells, dtype=object).str.strip().to_numpy(dtype=object, copy=True)
        else:  # nothing to strip (ids, most often)
            stripped = cells.copy()
        none = pd.isna(stripped) | np.equal(stripped, "")
        stripped[none] = None
        return stripped, none
    if pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s.dtype) or \
            pd.api.types.infer_dtype(cells, skipna=True) in ("string", "empty", "integer", "floating"):
        codes, uniques = pd.factorize(cells)
        mapped = np.array([_label(u) for u in uniques] + [None], dtype=object)
        labels = mapped[codes]
    else:
        labels = np.array([_label(v) for v in cells] + [None], dtype=object)[:-1]
    return labels, np.equal(labels, None)


def _check_ids(ids: pd.Series, table: LoadedTable, col: str, notes: list[dict]) -> None:
    if ids.dtype.kind in "iu":  # whole numbers: distinct numbers are distinct labels, none missing
        keys, none = ids.to_numpy(), np.zeros(len(ids), dtype=bool)
    else:
        keys, none = _labels(ids)
    codes, uniques = pd.factorize(keys[~none])  # in order of first appearance
    counts = np.bincount(codes, minlength=len(uniques))
    repeated = np.flatnonzero(counts > 1)
    first = _label(uniques[repeated[0]]) if len(repeated) else None
    where = ([int(r) for r in np.asarray(table.row_numbers)[~none][codes == repeated[0]]]
             if len(repeated) else [])
    notes += id_notes(table.row_label, col, int(none.sum()), len(repeated), int(counts[repeated].sum()),
                      first, where)


def id_notes(label: str, col: str, missing: int, repeated: int, repeated_rows: int, first: Any,
             where: list[int]) -> list[dict]:
    """The notes on the id column: ``missing`` rows without an id; ``repeated`` id values given
    more than once, in ``repeated_rows`` rows in all, the first of them (in order of first
    appearance) ``first`` (its label), given in rows ``where``."""
    notes = []
    if missing:
        notes.append({"code": "missing_ids", "message": (
            f"{missing} {label}(s) have no value in the id column '{col}'")})
    if repeated:
        notes.append({"code": "duplicate_ids", "message": (
            f"{repeated} id value(s) in column '{col}' appear more than once ({repeated_rows} "
            f"{label}s in all; for example {_show(first)} in "
            f"{_rows_text(label, where)}); check for respondents entered twice")})
    return notes


def numeric_columns(table: LoadedTable) -> list[str]:
    """Columns whose filled cells all read as numbers (by the item rules), in file order.

    For drafting a design: these are the columns that could be items.
    """
    out = []
    for col in table.frame.columns:
        vals, bad, _ = _read_column(table.frame[col])
        if not bad.any() and not np.isnan(vals).all():
            out.append(str(col))
    return out
