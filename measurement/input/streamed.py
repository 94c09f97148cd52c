"""The answers of a plain numeric CSV file read a block of lines at a time, for files larger
than memory: what the models need from them (listwise moments, FIML's per-pattern sums)
accumulated block by block, no row kept.

Each block goes through the column-wise reader's own parser (``loading._read_plain``) and
each cell through the item rules of :mod:`samesource.input.prepare` (``_read_column``:
answer labels, missing words), missing codes, the response-scale check and reverse keying,
so the numbers are those of ``prepare(load_table(path), design)``. A bad cell's message is
made from the :class:`~samesource.input.prepare.BadCells` of its column gathered over the
whole pass (count, first rows, answer texts, other columns), so it is the in-memory one word
for word, whatever block the cell is in.

Boundary (docs/performance.md, "Beyond memory"): this reads plain files only, as the
column-wise reader does (UTF-8, comma-delimited, no quotes, tabs or bare carriage returns,
every line with the header's number of fields), with a design that gives the response scale
and no second sources; anything else raises :class:`NotStreamable` (read it in memory). It
gives the moments and pattern sums only: screening, alpha, teams and the report's other
stages need the rows and are not run on it yet, and nothing in the pipeline calls it.
"""

from __future__ import annotations

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
from samesource.input.loading import _plain_cells, _read_plain, detect_format, sniff_delimiter
from samesource.input.prepare import (
    BadCells,
    _read_column,
    item_answers_error,
    non_numeric_error,
    scale_error,
)

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


def _blocks(fh, first_line: int) -> Iterator[tuple[int, bytes]]:
    """(user row number of the block's first line, the block's whole lines, each ending in \\n)."""
    row = first_line
    rest = b""
    while True:
        data = fh.read(BLOCK_BYTES)
        if not data:
            tail = rest.rstrip(b"\r\n")  # blank lines after the last row are no rows
            if tail:
                yield row, tail + b"\n"
            return
        data = rest + data
        cut = data.rfind(b"\n")
        if cut < 0:
            rest = data
            continue
        block, rest = data[:cut + 1], data[cut + 1:]
        yield row, block
        row += block.count(b"\n")


def _check_block(block: bytes, width: int) -> None:
    """The column-wise reader's conditions for a plain file, on one block."""
    if b'"' in block or b"\t" in block or block.count(b"\r") != block.count(b"\r\n"):
        raise NotStreamable("a quote, tab or bare carriage return: the record reader's rules apply")
    if not block.isascii():
        try:
            block.decode("utf-8")
        except UnicodeDecodeError:
            raise NotStreamable("not UTF-8 throughout") from None
    arr = np.frombuffer(block, dtype=np.uint8)
    ends = np.flatnonzero(arr == 10)
    commas = np.cumsum(arr == 44)[ends]
    per_line = np.diff(np.concatenate(([0], commas)))
    if np.any(per_line != width - 1):
        raise NotStreamable("a line with more or fewer fields than the header, or a blank line")


def stream_items(path: str | os.PathLike, design: Design, *, name: str | None = None) -> StreamedItems:
    """The item answers of the CSV at ``path`` read block by block (see the module docstring);
    bad cells raise the :class:`~samesource.errors.DataError` that ``prepare`` raises."""
    path = os.fspath(path)
    source = name or path
    if design.scale_min is None or design.scale_max is None:
        raise NotStreamable("no response_scale in the design (inferred from all answers in memory)")
    if getattr(design, "sources", None):
        raise NotStreamable("second sources are joined in memory")
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
        if detect_format(head, source) != "csv":
            raise NotStreamable("not a CSV file")
        text_head = head.decode("utf-8", errors="replace")
        if sniff_delimiter(text_head, "csv")[0] != ",":
            raise NotStreamable("not comma-delimited")
        fh.seek(0)
        header = fh.readline().rstrip(b"\r\n").decode("utf-8")
        names = [h.lstrip(" ").strip() for h in header.split(",")]
        names[0] = names[0].lstrip("\ufeff")
        if any(not n for n in names) or len(set(names)) != len(names):
            raise NotStreamable("a blank or repeated column name")
        check_columns(design, names, file=source)
        return _accumulate(fh, source, names, design)


def _accumulate(fh, source: str, names: list[str], design: Design) -> StreamedItems:
    items = list(design.items)
    width = len(names)
    cols = [names.index(i) for i in items]
    lo, hi = float(design.scale_min), float(design.scale_max)
    codes = np.asarray(design.missing_codes or [], dtype=float)
    reverse = [items.index(i) for c in design.constructs.values() for i in c.reverse]
    labels = [design.labels_for(c) for c in items]
    p = len(items)
    bad = [BadCells() for _ in items]
    outside = [BadCells() for _ in items]
    present = np.zeros(p, dtype=np.int64)
    vmin, vmax = np.full(p, np.inf), np.full(p, -np.inf)
    words: Counter = Counter()
    patterns = PatternAccumulator()
    n = missing = empty = 0
    for row0, block in _blocks(fh, 2):
        _check_block(block, width)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            chunks = _read_plain(block, ",", width, sorted(cols))
            for chunk in chunks:
                rows = np.arange(row0, row0 + len(chunk), dtype=np.int64)
                row0 += len(chunk)
                X = np.empty((len(chunk), p))
                for j in range(p):
                    s = chunk[cols[j]]
                    if s.dtype.kind == "b":
                        raise NotStreamable(f"TRUE/FALSE cells in {items[j]}: read as text in memory")
                    if s.dtype.kind == "O":
                        s = pd.Series(_plain_cells(s.to_numpy(dtype=object, na_value=np.nan)), dtype=object)
                    vals, wrong, w = _read_column(s, labels[j])
                    words.update(w)
                    if wrong.any():
                        bad[j].add(rows[wrong], s.to_numpy()[wrong])
                    X[:, j] = vals
                n += len(chunk)
                if len(codes):
                    X[np.isin(X, codes)] = np.nan
                with np.errstate(invalid="ignore"):
                    out = (X < lo) | (X > hi)
                for j in np.flatnonzero(out.any(axis=0)):
                    outside[j].add(rows[out[:, j]], X[out[:, j], j], scale=True)
                if any(b.count for b in bad) or any(o.count for o in outside):
                    continue  # the pass goes on for the message's counts; nothing to add up
                gaps = np.isnan(X)
                missing += int(gaps.sum())
                empty += int(gaps.all(axis=1).sum())
                present += (~gaps).sum(axis=0)
                with np.errstate(invalid="ignore"):
                    vmin = np.fmin(vmin, np.nanmin(np.where(gaps, np.inf, X), axis=0))
                    vmax = np.fmax(vmax, np.nanmax(np.where(gaps, -np.inf, X), axis=0))
                if reverse:
                    X[:, reverse] = lo + hi - X[:, reverse]
                patterns.add(X)   # the complete rows' pattern is also the listwise sums
    flagged = [j for j in range(p) if bad[j].count]
    if flagged:
        j = flagged[0]
        raise non_numeric_error(source, "row", items[j], bad[j], [items[k] for k in flagged[1:]], labels[j])
    flagged = [j for j in range(p) if outside[j].count]
    if flagged:
        j = flagged[0]
        raise scale_error(source, items[j], outside[j], lo, hi, [items[k] for k in flagged[1:]])
    for j, col in enumerate(items):
        err = item_answers_error(col, int(present[j]), float(vmin[j]), float(vmax[j]), n, source, "row")
        if err is not None:
            raise err
    sums = patterns.result()
    listwise = next((ps.sums for ps in sums if ps.observed.all()), MomentSums.of(np.empty((0, p))))
    return StreamedItems(source=source, items=tuple(items), n_rows=n, missing_cells=missing,
                         rows_without_answers=empty, scale_min=lo, scale_max=hi, listwise=listwise,
                         patterns=tuple(sums), missing_words=words)


__all__ = ["NotStreamable", "StreamedItems", "stream_items"]
