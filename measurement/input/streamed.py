"""A plain numeric CSV file read a block of lines at a time, for files larger than memory.

:func:`prepare_streamed` reads it once into the
:class:`~samesource.input.prepare.PreparedData` that ``prepare(load_table(path), design)``
gives, with the answers kept as one byte per cell (:class:`~samesource.input.rows.CodedRows`)
and nothing else per row but the row numbers, ids and groups (compactly); the listwise moments
and FIML's per-pattern sums are formed from the kept rows on first use (``sums``). :func:`stream_items`
accumulates those sums alone, keeping no row.

Each block goes through the column-wise reader's own parser (``loading._read_plain``) and
each cell through the item rules of :mod:`samesource.input.prepare` (``_read_column``:
answer labels, missing words), missing codes, the response-scale check and reverse keying,
so the numbers are those of ``prepare(load_table(path), design)``. A bad cell's message is
made from the :class:`~samesource.input.prepare.BadCells` of its column gathered over the
whole pass (count, first rows, answer texts, other columns), so it is the in-memory one word
for word, whatever block the cell is in; the notes (blank rows skipped, missing words, rows
without answers, missing and repeated ids, missing groups) come from the same builders.
Blank lines are skipped and noted as the in-memory reader does; ids and groups are read as
text, and ids kept as numbers exactly where the in-memory reader makes them numbers (every
one written as a whole number's own digits, and no blank row, which makes it read every cell
as text).

Boundary (docs/performance.md, "Beyond memory"): plain files only, as the column-wise reader
reads them (UTF-8, comma-delimited, at least two columns, no quotes, tabs or bare carriage
returns, every line that is not blank with the header's number of fields), with a design
that gives the response scale and no second sources; for :func:`prepare_streamed`, answers
that are whole numbers on a scale of at most 255 points starting at a whole number. Anything
else raises :class:`NotStreamable` (read it in memory, where every case has its message).

What still reads ``PreparedData.items`` (built from the rows on first use, 8 bytes a cell):
pipeline.py (the screen's input, ``_raw_answers``, the data section's counts),
``missing.plan_missing`` and ``correction_check``, until they read ``rows``; the pipeline does
not call this module yet.
"""

from __future__ import annotations

import codecs
import hashlib
import os
import warnings
from collections import Counter
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from samesource.engine.chunked_moments import MomentSums, PatternAccumulator, PatternSums
from samesource.engine.fiml import PatternData
from samesource.engine.fitting import Moments
from samesource.input.design import Design, check_columns
from samesource.input.loading import (
    LoadedTable,
    _note_blank_rows,
    _plain_cells,
    _read_plain,
    detect_format,
    sniff_delimiter,
)
from samesource.input.prepare import (
    BadCells,
    PreparedData,
    _read_column,
    id_notes,
    item_answers_error,
    missing_groups_note,
    missing_words_note,
    non_numeric_error,
    rows_without_answers_note,
    scale_error,
)
from samesource.input.rows import MISSING_CODE, CodedRows, codable, encode_block

# Bytes of the file per block: a block's text, its parsed cells and its answers (float64)
# stay well under 100 MB at 60 items.
BLOCK_BYTES = 1 << 24


class NotStreamable(Exception):
    """The file or design is outside what :func:`stream_items` reads (the reason as text):
    read it in memory, where every case has its message."""


@dataclass(frozen=True, eq=False)
class StreamedItems:
    """What the models need from the item answers (reverse-keyed, missing codes blank), with
    no row kept: ``listwise`` the complete rows' sums, ``patterns`` FIML's per-pattern sums."""

    source: str
    items: tuple[str, ...]
    n_rows: int
    missing_cells: int
    rows_without_answers: int
    scale_min: float
    scale_max: float
    listwise: MomentSums
    patterns: tuple[PatternSums, ...]
    missing_words: Counter

    def moments(self, items: Sequence[str]) -> Moments:
        """Listwise moments of these items (as ``MissingPlan.data_for`` under listwise deletion)."""
        idx = np.array([self.items.index(i) for i in items], dtype=np.intp)
        s = self.listwise
        return Moments(names=tuple(items), cov=s.cross[np.ix_(idx, idx)] / s.n, n=s.n, mean=s.mean[idx])

    def fiml_data(self) -> PatternData:
        """FIML's input for any subset of the items (as ``MissingPlan.data_for`` under FIML)."""
        return PatternData(names=self.items, patterns=self.patterns)


def _blocks(fh, first_line: int, digest) -> Iterator[tuple[int, bytes]]:
    """(user row number of the block's first line, the block's whole lines, each ending in \\n);
    every byte read also goes into ``digest`` (the file's sha256, as the in-memory reader has it)."""
    row = first_line
    rest = b""
    while True:
        data = fh.read(BLOCK_BYTES)
        if not data:
            tail = rest.rstrip(b"\r\n")  # blank lines after the last row are no rows
            if tail:
                yield row, tail + b"\n"
            return
        digest.update(data)
        data = rest + data
        cut = data.rfind(b"\n")
        if cut < 0:
            rest = data
            continue
        block, rest = data[:cut + 1], data[cut + 1:]
        yield row, block
        row += block.count(b"\n")


# Bytes str.strip() removes (ASCII), and the comma: a line of only these is a blank row.
_BLANK_BYTES = np.zeros(256, dtype=bool)
_BLANK_BYTES[[9, 10, 11, 12, 13, 28, 29, 30, 31, 32, 44]] = True


def _lines(block: bytes, width: int, row0: int) -> tuple[bytes, np.ndarray, np.ndarray, bool]:
    """The column-wise reader's conditions for a plain file, on one block; the block without
    its blank lines (every field blank: the in-memory reader skips them), the user row number
    of each line kept and of each blank line, and whether a blank line was not empty."""
    if b'"' in block or b"\t" in block or block.count(b"\r") != block.count(b"\r\n"):
        raise NotStreamable("a quote, tab or bare carriage return: the record reader's rules apply")
    ascii_only = block.isascii()
    if not ascii_only:
        try:
            block.decode("utf-8")
        except UnicodeDecodeError:
            raise NotStreamable("not UTF-8 throughout") from None
    arr = np.frombuffer(block, dtype=np.uint8)
    ends = np.flatnonzero(arr == 10)
    starts = np.concatenate(([0], ends[:-1] + 1))
    commas = np.add.reduceat(arr == 44, starts, dtype=np.int64)
    filled = np.logical_or.reduceat(~_BLANK_BYTES[arr], starts)
    filled[ends == starts] = False   # an empty line (reduceat gives the next byte's value there)
    if not ascii_only:  # fields of other white space (a no-break space) are blank too
        low = np.logical_or.reduceat(~_BLANK_BYTES[arr] & (arr < 128), starts)
        for i in np.flatnonzero(filled & ~low & (ends != starts)):
            if not block[starts[i]:ends[i]].decode("utf-8").replace(",", "").strip():
                filled[i] = False
    blank = ~filled
    if np.any(commas[~blank] != width - 1):
        raise NotStreamable("a line with more or fewer fields than the header")
    rows = row0 + np.arange(len(ends), dtype=np.int64)
    fields = False
    if blank.any():
        fields = bool(np.any((ends - starts)[blank] > np.where(arr[np.maximum(ends - 1, 0)] == 13, 1, 0)[blank]))
        block = arr[np.repeat(~blank, ends - starts + 1)].tobytes()
    return block, rows[~blank], rows[blank], fields


def _open(path: str, source: str, design: Design) -> tuple[object, list[str], int, str]:
    """The file opened past its header: (file, column names, header bytes, encoding)."""
    if design.scale_min is None or design.scale_max is None:
        raise NotStreamable("no response_scale in the design (inferred from all answers in memory)")
    if getattr(design, "sources", None):
        raise NotStreamable("second sources are joined in memory")
    fh = open(path, "rb")
    try:
        head = fh.read(1 << 16)
        if detect_format(head, source) != "csv":
            raise NotStreamable("not a CSV file")
        text_head = head.decode("utf-8", errors="replace")
        if sniff_delimiter(text_head, "csv")[0] != ",":
            raise NotStreamable("not comma-delimited")
        fh.seek(0)
        line = fh.readline()
        header = line.rstrip(b"\r\n").decode("utf-8")
        names = [h.lstrip(" ").strip() for h in header.split(",")]
        names[0] = names[0].lstrip("\ufeff")
        if len(names) < 2 or any(not n for n in names) or len(set(names)) != len(names):
            raise NotStreamable("fewer than two columns, or a blank or repeated column name")
        check_columns(design, names, file=source)
    except BaseException:
        fh.close()
        raise
    return fh, names, line, "utf-8-sig" if line.startswith(codecs.BOM_UTF8) else "utf-8"


def stream_items(path: str | os.PathLike, design: Design, *, name: str | None = None) -> StreamedItems:
    """The item answers of the CSV at ``path`` read block by block (see the module docstring);
    bad cells raise the :class:`~samesource.errors.DataError` that ``prepare`` raises."""
    path = os.fspath(path)
    source = name or path
    fh, names, line, _ = _open(path, source, design)
    with fh:
        reading = _Pass(source, names, design, keep_rows=0)
        reading.run(fh, line)
        return reading.items()


def prepare_streamed(path: str | os.PathLike, design: Design, *, name: str | None = None
                     ) -> StreamedPreparedData:
    """``prepare(load_table(path), design)`` for a plain CSV file larger than memory, read once
    a block of lines at a time (see the module docstring): the answers kept as one byte per
    cell (:class:`~samesource.input.rows.CodedRows`), ids and groups compactly, the loader's
    and prepare's notes and errors word for word. Raises :class:`NotStreamable` for a file or
    design outside the boundary, or answers that are not whole numbers on a scale of at most
    255 points (read it in memory)."""
    path = os.fspath(path)
    source = name or path
    lo, hi = design.scale_min, design.scale_max
    if lo is not None and hi is not None and (not float(lo).is_integer() or hi - lo > MISSING_CODE - 1):
        raise NotStreamable("the response scale does not start at a whole number or has over 255 points")
    fh, names, line, encoding = _open(path, source, design)
    with fh:
        size = os.fstat(fh.fileno()).st_size
        # Every kept line holds width - 1 commas and its newline: at most this many rows. The
        # arrays are allocated at that size and filled from the start; pages never written
        # are never given memory, and the arrays handed out are views of their filled rows.
        cap = (size - len(line)) // len(names) + 1
        reading = _Pass(source, names, design, keep_rows=cap)
        reading.run(fh, line)
        return reading.prepared(encoding, size)


class _Pass:
    """One pass over the file's blocks: what :class:`StreamedItems` holds, and with
    ``keep_rows`` (the most rows there can be) the answers' codes, row numbers, ids and groups."""

    def __init__(self, source: str, names: list[str], design: Design, *, keep_rows: int) -> None:
        self.source, self.names, self.design = source, names, design
        self.items_ = list(design.items)
        self.width = len(names)
        self.cols = [names.index(i) for i in self.items_]
        self.lo, self.hi = float(design.scale_min), float(design.scale_max)
        self.codes_missing = np.asarray(design.missing_codes or [], dtype=float)
        self.reverse = [self.items_.index(i) for c in design.constructs.values() for i in c.reverse]
        self.labels = [design.labels_for(c) for c in self.items_]
        p = self.p = len(self.items_)
        self.bad = [BadCells() for _ in range(p)]
        self.outside = [BadCells() for _ in range(p)]
        self.present = np.zeros(p, dtype=np.int64)
        self.vmin, self.vmax = np.full(p, np.inf), np.full(p, -np.inf)
        self.words: Counter = Counter()
        self.patterns = PatternAccumulator()
        self.n = self.missing = 0
        self.empty = _FirstRows()        # rows without answers
        self.keep = keep_rows > 0
        self.digest = hashlib.sha256()
        self.blank_inside: list[np.ndarray] = []   # blank rows with data rows after them
        self.blank_pending: list[np.ndarray] = []  # blank rows after the last data row so far
        self.blank_fields = False  # a blank line with fields (not an empty line at the end)
        if self.keep:
            self.codes = np.empty((keep_rows, p), dtype=np.uint8)
            self.row_numbers = np.empty(keep_rows, dtype=np.int64)
            self.id_col = _IdColumn(keep_rows) if design.id_column else None
            self.group_col = _GroupColumn(keep_rows) if design.group_column else None
        self.extra = [names.index(c) for c in (design.id_column, design.group_column) if c and self.keep]

    # ------------------------------------------------------------------ the pass
    def run(self, fh, header: bytes) -> None:
        self.digest.update(header)
        for row0, block in _blocks(fh, 2, self.digest):
            block, rows, blank, fields = _lines(block, self.width, row0)
            self.blank_fields |= fields
            self._blank(rows, blank)
            if not len(rows):
                continue
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                text = _read_plain(block, ",", self.width, self.extra, as_text=True) if self.extra else None
                done = 0
                for chunk in _read_plain(block, ",", self.width, sorted(set(self.cols))):
                    m = len(chunk)
                    self._chunk(block, chunk, rows[done:done + m], done,
                                None if text is None else text.iloc[done:done + m])
                    done += m
        if self.n == 0:
            raise NotStreamable("no data rows (the in-memory reader says so)")
        self._raise_errors()

    def _blank(self, rows: np.ndarray, blank: np.ndarray) -> None:
        if not len(rows):
            if len(blank):
                self.blank_pending.append(blank)
            return
        self.blank_inside += self.blank_pending
        last = rows[-1]
        self.blank_inside.append(blank[blank < last])
        self.blank_pending = [blank[blank > last]]

    def _chunk(self, block: bytes, chunk: pd.DataFrame, rows: np.ndarray, offset: int,
               text: pd.DataFrame | None) -> None:
        m, p = len(chunk), self.p
        X = np.empty((m, p))
        for j in range(p):
            s = chunk[self.cols[j]]
            if s.dtype.kind == "O":
                s = pd.Series(_plain_cells(s.to_numpy(dtype=object, na_value=np.nan)), dtype=object)
            elif s.dtype.kind not in "iu" and not (s.dtype.kind == "f" and np.isfinite(s.to_numpy()[s.notna()]).all()):
                # TRUE/FALSE, an infinite number: in memory the column is read as text, and a
                # message shows the cell as written.
                raw = _read_plain(block, ",", self.width, [self.cols[j]], as_text=True)[self.cols[j]]
                s = pd.Series(_plain_cells(raw.to_numpy(dtype=object)[offset:offset + m]), dtype=object)
            vals, wrong, w = _read_column(s, self.labels[j])
            self.words.update(w)
            if wrong.any():
                self.bad[j].add(rows[wrong], s.to_numpy()[wrong])
            X[:, j] = vals
        start = self.n
        self.n += m
        if len(self.codes_missing):
            X[np.isin(X, self.codes_missing)] = np.nan
        with np.errstate(invalid="ignore"):
            out = (X < self.lo) | (X > self.hi)
        for j in np.flatnonzero(out.any(axis=0)):
            self.outside[j].add(rows[out[:, j]], X[out[:, j], j], scale=True)
        if any(b.count for b in self.bad) or any(o.count for o in self.outside):
            return  # the pass goes on for the message's counts; nothing to keep
        gaps = np.isnan(X)
        self.missing += int(gaps.sum())
        self.empty.add(rows[gaps.all(axis=1)])
        self.present += (~gaps).sum(axis=0)
        with np.errstate(invalid="ignore"):
            self.vmin = np.fmin(self.vmin, np.nanmin(np.where(gaps, np.inf, X), axis=0))
            self.vmax = np.fmax(self.vmax, np.nanmax(np.where(gaps, -np.inf, X), axis=0))
        if self.reverse:
            X[:, self.reverse] = self.lo + self.hi - X[:, self.reverse]
        if not self.keep:  # the sums alone (stream_items); kept rows are summed by whoever reads them
            self.patterns.add(X)   # the complete rows' pattern is also the listwise sums
            return
        if not codable(X, self.lo, self.hi):
            raise NotStreamable("answers that are not whole numbers (kept one byte per cell only "
                                "when they are)")
        self.codes[start:start + m] = encode_block(X, self.lo)
        self.row_numbers[start:start + m] = rows
        if self.id_col is not None:
            self.id_col.add(text[self.names.index(self.design.id_column)])
        if self.group_col is not None:
            self.group_col.add(text[self.names.index(self.design.group_column)], rows)

    def _raise_errors(self) -> None:
        items, p = self.items_, self.p
        flagged = [j for j in range(p) if self.bad[j].count]
        if flagged:
            j = flagged[0]
            raise non_numeric_error(self.source, "row", items[j], self.bad[j], [items[k] for k in flagged[1:]],
                                    self.labels[j])
        flagged = [j for j in range(p) if self.outside[j].count]
        if flagged:
            j = flagged[0]
            raise scale_error(self.source, items[j], self.outside[j], self.lo, self.hi,
                              [items[k] for k in flagged[1:]])
        for j, col in enumerate(items):
            err = item_answers_error(col, int(self.present[j]), float(self.vmin[j]), float(self.vmax[j]),
                                     self.n, self.source, "row")
            if err is not None:
                raise err

    # ------------------------------------------------------------------ results
    def items(self) -> StreamedItems:
        return _summed(self.patterns, self._counts())

    def _counts(self) -> dict:
        """What StreamedItems says besides the sums."""
        return dict(source=self.source, items=tuple(self.items_), n_rows=self.n, missing_cells=self.missing,
                    rows_without_answers=self.empty.count, scale_min=self.lo, scale_max=self.hi,
                    missing_words=self.words)

    def prepared(self, encoding: str, size: int) -> StreamedPreparedData:
        n, design = self.n, self.design
        label = "row"
        row_numbers = self.row_numbers[:n]
        loader: list[dict] = []
        blank = np.concatenate(self.blank_inside) if self.blank_inside else np.empty(0, dtype=np.int64)
        _note_blank_rows([int(r) for r in blank], loader)
        table = LoadedTable(frame=pd.DataFrame({c: pd.Series(dtype=object) for c in self.names}),
                            row_numbers=row_numbers, row_label=label, format="csv", source=self.source,
                            encoding=encoding, delimiter=",", decimal=".", sha256=self.digest.hexdigest(),
                            size_bytes=size, warnings=loader)
        table.frame.columns = pd.Index(self.names, dtype=object)
        notes = [dict(w) for w in loader]
        if self.words:
            notes.append(missing_words_note(self.words))
        if self.empty.count:
            notes.append(rows_without_answers_note(label, self.empty.rows, self.empty.count))
        index = pd.Index(row_numbers, name=label, copy=False)
        ids = groups = None
        if design.id_column:
            # The in-memory reader gives a column of whole numbers as numbers only when it reads
            # the file column-wise, which a blank row stops (measurement/input/loading.py).
            ids = self.id_col.series(index, design.id_column, text=len(blank) > 0 or self.blank_fields)
            notes += self.id_col.notes(label, design.id_column, row_numbers)
        if design.group_column:
            groups = self.group_col.series(index, design.group_column)
            missing = self.group_col.missing
            if missing.count:
                notes.append(missing_groups_note(label, design.group_column, missing.rows, missing.count))
        rows = CodedRows(self.codes[:n], self.items_, row_numbers, self.lo)
        return StreamedPreparedData(items=None, ids=ids, groups=groups, scale_min=self.lo, scale_max=self.hi,
                                    scale_source="design", n_rows=n, missing_cells=self.missing,
                                    warnings=notes, table=table, item_rows=rows, counts=self._counts())


class _FirstRows:
    """Rows of some kind, counted, the first of them kept (as many as a message lists)."""

    def __init__(self) -> None:
        self.count = 0
        self.rows: list[int] = []

    def add(self, rows: np.ndarray) -> None:
        self.count += len(rows)
        room = BadCells.ROWS_KEPT - len(self.rows)
        if room > 0:
            self.rows += [int(r) for r in rows[:room]]


# An id written as a whole number the way the in-memory reader makes a column of them numeric:
# the integer's own digits (no sign of +, no leading zero or space), an int64 above its lowest.
_WHOLE = r"0|-?[1-9][0-9]{0,18}"
_EXACT_FLOAT = 2.0 ** 53
_NO_ID = np.iinfo(np.int64).min   # a blank id among whole numbers (never a value: see add)


class _IdColumn:
    """The id column's cells, block by block, kept compactly: whole numbers in int64 while every
    id is one (as the in-memory reader makes such a column numbers), otherwise codes into the
    distinct cells (text as the in-memory reader gives it: leading spaces dropped)."""

    def __init__(self, cap: int) -> None:
        self.n = 0
        self.ints: np.ndarray | None = np.empty(cap, dtype=np.int64)
        self.codes: np.ndarray | None = None
        self.where: dict[str, int] = {}
        self.uniques: list[str] = []
        self.cap = cap

    def add(self, cells: pd.Series) -> None:
        """One chunk's cells as written ("" for a blank field)."""
        m = len(cells)
        if self.ints is not None:
            blank = (cells == "").to_numpy(dtype=bool)
            whole = cells.str.fullmatch(_WHOLE).to_numpy(dtype=bool)
            if np.all(whole | blank):
                v = np.full(m, _NO_ID, dtype=np.int64)
                try:
                    v[~blank] = cells[~blank].astype(np.int64).to_numpy()
                except (OverflowError, ValueError, TypeError):
                    v[~blank] = _NO_ID   # past int64: read as text in memory
                if not np.any(v[~blank] == _NO_ID):
                    self.ints[self.n:self.n + m] = v
                    self.n += m
                    return
            self._to_text()
        raw = _plain_cells(cells.to_numpy(dtype=object))
        self.codes[self.n:self.n + m] = _code_cells(raw, self.where, self.uniques, str)
        self.n += m

    def _to_text(self) -> None:
        """From whole numbers to text codes: each number's text is its digits (see _WHOLE)."""
        ints = self.ints[:self.n]
        local, uniq = pd.factorize(np.where(ints == _NO_ID, np.iinfo(np.int64).max, ints))
        texts = [None if u == np.iinfo(np.int64).max else str(int(u)) for u in uniq]
        self.codes = np.empty(self.cap, dtype=np.int32)
        self.codes[:self.n] = _code_cells(np.array(texts, dtype=object)[local], self.where, self.uniques, str)
        self.ints = None

    def _numeric(self) -> np.ndarray | None:
        """The ids as the in-memory reader's numbers: int64, or float64 with NaN for blanks."""
        v = self.ints[:self.n]
        blank = v == _NO_ID
        if not blank.any():
            return v
        if np.any(np.abs(v[~blank]) >= _EXACT_FLOAT):
            return None   # such a column is read as text in memory
        out = v.astype(float)
        out[blank] = np.nan
        return out

    def series(self, index: pd.Index, name: str, *, text: bool) -> pd.Series:
        values = None if self.ints is None or text else self._numeric()
        if values is None:
            if self.ints is not None:
                self._to_text()
            values = pd.Categorical.from_codes(self.codes[:self.n], categories=pd.Index(self.uniques, dtype=object))
        return pd.Series(values, index=index, name=name, copy=False)

    def notes(self, label: str, col: str, row_numbers: np.ndarray) -> list[dict]:
        """prepare's notes on missing and repeated ids (its labels: numbers' digits, texts stripped)."""
        if self.ints is not None:
            keys = self.ints[:self.n]
            missing = keys == _NO_ID
            shown = str
        else:
            # Cells that differ only in white space at their end are one id.
            lab, lab_uniques = pd.factorize(np.array([u.strip() for u in self.uniques] + ["\0none"], dtype=object))
            keys = lab[np.where(self.codes[:self.n] < 0, len(self.uniques), self.codes[:self.n])].astype(np.int64)
            missing = keys == lab[-1]
            shown = lab_uniques.__getitem__
        rows = row_numbers[~missing]
        keys = keys[~missing]
        order = np.argsort(keys, kind="stable")
        ordered = keys[order]
        same = ordered[1:] == ordered[:-1]
        if not same.any():
            return id_notes(label, col, int(missing.sum()), 0, 0, None, [])
        run_start = np.flatnonzero(np.concatenate(([True], ~same)))
        run_len = np.diff(np.concatenate((run_start, [len(ordered)])))
        rep = run_len > 1
        firsts = order[run_start[rep]]   # each repeated id's first position (the sort is stable)
        key = ordered[run_start[rep][np.argmin(firsts)]]
        where = [int(r) for r in rows[keys == key]]
        return id_notes(label, col, int(missing.sum()), int(rep.sum()), int(run_len[rep].sum()),
                        shown(int(key)), where)


class _GroupColumn:
    """The group column's labels (cells stripped; blank ones missing), block by block, as codes
    into the distinct labels."""

    def __init__(self, cap: int) -> None:
        self.n = 0
        self.codes = np.empty(cap, dtype=np.int32)
        self.where: dict[str, int] = {}
        self.uniques: list[str] = []
        self.missing = _FirstRows()

    def add(self, cells: pd.Series, rows: np.ndarray) -> None:
        m = len(cells)
        codes = _code_cells(cells.to_numpy(dtype=object), self.where, self.uniques, str.strip)
        self.codes[self.n:self.n + m] = codes
        self.missing.add(rows[codes < 0])
        self.n += m

    def series(self, index: pd.Index, name: str) -> pd.Series:
        values = pd.Categorical.from_codes(self.codes[:self.n], categories=pd.Index(self.uniques, dtype=object))
        return pd.Series(values, index=index, name=name, copy=False)


def _code_cells(cells: np.ndarray, where: dict[str, int], uniques: list[str], key) -> np.ndarray:
    """Codes (int32; -1 for a missing or blank cell) into ``uniques``, the distinct ``key(cell)``
    in order of first appearance, extended with this chunk's new ones."""
    local, uniq = pd.factorize(cells)
    mapped = np.empty(len(uniq) + 1, dtype=np.int32)
    mapped[-1] = -1
    for k, u in enumerate(uniq):
        t = key(u) if isinstance(u, str) else None
        if not t:
            mapped[k] = -1
            continue
        code = where.get(t)
        if code is None:
            code = where[t] = len(uniques)
            uniques.append(t)
        mapped[k] = code
    return mapped[local]


def _summed(patterns: PatternAccumulator, counts: dict) -> StreamedItems:
    sums = patterns.result()
    p = len(counts["items"])
    listwise = next((ps.sums for ps in sums if ps.observed.all()), MomentSums.of(np.empty((0, p))))
    return StreamedItems(listwise=listwise, patterns=tuple(sums), **counts)


class StreamedPreparedData(PreparedData):
    """:class:`~samesource.input.prepare.PreparedData` of a file read a block of lines at a
    time (:func:`prepare_streamed`): ``rows`` are :class:`~samesource.input.rows.CodedRows`;
    ``ids`` int64 (whole numbers; float64 with NaN where some are blank) or a Categorical of
    the texts, ``groups`` a Categorical of the labels, both indexed by row number;
    ``table`` a :class:`LoadedTable` whose ``frame`` has the file's columns and no rows (what
    is read of it: the columns' order); ``sums`` the listwise moments and FIML pattern sums (formed on first use).

    ``items``, the answers as a float64 DataFrame (8 bytes a cell: 4.8 GB at 10,000,000 x 60),
    is built from the rows on first use, for callers that still read a DataFrame; the stages
    read ``rows`` and never build it."""

    def __init__(self, *, counts: dict, **fields) -> None:
        super().__init__(**fields)
        self._counts = counts   # the read's counts, for StreamedItems
        self._sums: StreamedItems | None = None

    @property
    def sums(self) -> StreamedItems:
        """The listwise moments and FIML pattern sums, summed from the rows on first use: the
        pipeline's missing-data plan sums the rows it analyses itself, so the read does not."""
        if self._sums is None:
            acc = PatternAccumulator()
            for _, X in self.rows.blocks():
                acc.add(X)
            self._sums = _summed(acc, self._counts)
        return self._sums

    @property
    def items(self) -> pd.DataFrame:
        if self._frame is None:
            rows = self.rows
            values = np.empty((len(rows), len(rows.names)))
            for start, X in rows.blocks():
                values[start:start + len(X)] = X
            self._frame = pd.DataFrame(values, columns=pd.Index(list(rows.names), dtype=object),
                                       index=pd.Index(rows.labels, name=self.table.row_label), copy=False)
        return self._frame

    @items.setter
    def items(self, frame: pd.DataFrame | None) -> None:
        self._frame = frame

    def __repr__(self) -> str:  # the dataclass's would build ``items``
        return (f"StreamedPreparedData(source={self.table.source!r}, n_rows={self.n_rows}, "
                f"items={len(self.rows.names)})")


__all__ = ["NotStreamable", "StreamedItems", "StreamedPreparedData", "prepare_streamed", "stream_items"]
