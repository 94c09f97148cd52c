"""The analysis rows' item answers, handed out a block of rows at a time.

A stage that reads answers row by row (screening, robust SEs, bootstrap replicates, scale
scores, teams, answer distributions) reads them through an :class:`ItemRows`, so one code
path serves a survey held in memory as a DataFrame (:class:`FrameRows`) and a file larger
than memory whose whole-number answers are kept as one byte per cell (:class:`CodedRows`:
10,000,000 x 60 answers in 600 MB instead of 4.8 GB of float64). A block is float64 with NaN
for no answer, reverse keying applied, as ``PreparedData.items`` holds them.

Blocks are numbered by position among these rows; ``labels`` gives each row's label (the
user's row number in the file), which is what reports and messages name.
"""

from __future__ import annotations

import os
from abc import ABC, abstractmethod
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

import numpy as np
import pandas as pd

BLOCK_ROWS = 65_536  # rows per block: 30 MB of float64 at 60 items
MISSING_CODE = 255   # CodedRows: the byte of a cell with no answer


class ItemRows(ABC):
    """Item answers of a set of rows, read a block at a time (see the module docstring)."""

    names: tuple[str, ...]

    @abstractmethod
    def __len__(self) -> int: ...

    @property
    @abstractmethod
    def labels(self) -> np.ndarray:
        """Each row's label (int64), in row order."""

    @abstractmethod
    def blocks(self, columns: Sequence[str] | None = None, *,
               size: int = BLOCK_ROWS) -> Iterator[tuple[int, np.ndarray]]:
        """(position of the block's first row, its answers: float64, rows x columns, NaN for
        no answer). The array may be a view of the store: read it, never write to it."""

    @abstractmethod
    def select(self, keep: np.ndarray) -> ItemRows:
        """The rows where ``keep`` (boolean, one per row) is true."""

    def column(self, name: str) -> np.ndarray:
        """One item's answers over every row (float64, a new array)."""
        out = np.empty(len(self))
        for start, X in self.blocks([name]):
            out[start:start + len(X)] = X[:, 0]
        return out

    def _index(self, columns: Sequence[str] | None) -> np.ndarray:
        if columns is None:
            return np.arange(len(self.names))
        where = {n: i for i, n in enumerate(self.names)}
        missing = [c for c in columns if c not in where]
        if missing:
            raise KeyError(f"no item {missing[0]!r} among these rows")
        return np.array([where[c] for c in columns], dtype=np.intp)


class FrameRows(ItemRows):
    """The rows of a DataFrame of item answers held in memory (float64 columns, index = row labels)."""

    def __init__(self, frame: pd.DataFrame) -> None:
        self.frame = frame
        self.names = tuple(str(c) for c in frame.columns)
        # One float64 block is a view of the frame's own memory; anything else is copied once.
        self._values = frame.to_numpy(dtype=float)

    def __reduce__(self):
        # pickled (a bootstrap chunk for a worker) as the frame alone, not the frame and its
        # values again: the values are formed anew from it
        return (FrameRows, (self.frame,))

    def __len__(self) -> int:
        return self._values.shape[0]

    @property
    def labels(self) -> np.ndarray:
        return np.asarray(self.frame.index, dtype=np.int64)

    def blocks(self, columns=None, *, size=BLOCK_ROWS):
        idx = None if columns is None or list(columns) == list(self.names) else self._index(columns)
        values = self._values
        for s in range(0, len(self), size):
            block = values[s:s + size]
            yield s, block if idx is None else block[:, idx]

    def select(self, keep):
        return FrameRows(self.frame[np.asarray(keep, dtype=bool)])


class CodedRows(ItemRows):
    """Whole-number answers kept as one byte per cell: ``codes[i, j] = answer - low``,
    :data:`MISSING_CODE` for no answer. ``keep`` (boolean over the stored rows) selects
    without copying the codes."""

    def __init__(self, codes: np.ndarray, names: Sequence[str], labels: np.ndarray, low: float,
                 keep: np.ndarray | None = None) -> None:
        if codes.dtype != np.uint8 or codes.ndim != 2 or codes.shape[1] != len(names):
            raise ValueError(f"codes must be uint8 with one column per item ({len(names)}), got "
                             f"{codes.dtype} {codes.shape}")
        self.codes = codes
        self.names = tuple(names)
        self._labels = np.asarray(labels, dtype=np.int64)
        self.low = float(low)
        self.keep = None if keep is None else np.asarray(keep, dtype=bool)
        self._n = codes.shape[0] if self.keep is None else int(self.keep.sum())
        # Code -> answer (every code a float64 exactly: small whole numbers).
        self._table = np.arange(256, dtype=float) + self.low
        self._table[MISSING_CODE] = np.nan

    @classmethod
    def encode(cls, X: np.ndarray, names: Sequence[str], labels: np.ndarray, low: float) -> CodedRows:
        """Codes of float answers (NaN for none); every answer must be a whole number from
        ``low`` to ``low + 254`` (:func:`codable` says whether they are)."""
        codes = encode_block(X, low)
        return cls(codes, names, labels, low)

    def __len__(self) -> int:
        return self._n

    @property
    def labels(self) -> np.ndarray:
        return self._labels if self.keep is None else self._labels[self.keep]

    def blocks(self, columns=None, *, size=BLOCK_ROWS):
        idx = None if columns is None or list(columns) == list(self.names) else self._index(columns)
        n_stored = self.codes.shape[0]
        position = 0
        # Stored rows are read a block at a time; with a selection, a stored block gives its kept rows.
        for s in range(0, n_stored, size):
            c = self.codes[s:s + size]
            if idx is not None:  # the columns first: the row selection then copies only them
                c = c[:, idx]
            if self.keep is not None:
                c = c[self.keep[s:s + size]]
                if not len(c):
                    continue
            yield position, self._table[c]
            position += len(c)

    def select(self, keep):
        keep = np.asarray(keep, dtype=bool)
        if keep.shape != (len(self),):
            raise ValueError(f"keep must have one value per row ({len(self)}), got {keep.shape}")
        if self.keep is None:
            full = keep
        else:
            full = np.zeros(self.codes.shape[0], dtype=bool)
            full[np.flatnonzero(self.keep)[keep]] = True
        return CodedRows(self.codes, self.names, self._labels, self.low, keep=full)


# Threads a pass over blocks of rows runs in (at most the cores this process may use). numpy
# releases the interpreter lock in its array work, so two threads take two cores. On the quiet
# two-core machine (2026-12-03) two threads took the robust SEs' pair products at 1,000,000 x 25
# from 4.9 to 2.9 s of wall time; on a loaded machine (200,000 x 25) they were about even.
BLOCK_THREADS = 2

_T = TypeVar("_T")
_R = TypeVar("_R")


def block_threads(threads: int | None = None) -> int:
    """How many threads a pass over blocks uses: ``threads`` (default :data:`BLOCK_THREADS`),
    at most the cores this process may use."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else 1
    return max(1, min(cores, BLOCK_THREADS if threads is None else threads))


def map_in_threads(fn: Callable[[_T], _R], items: Iterable[_T], threads: int | None = None) -> Iterator[_R]:
    """``fn`` of each item, in the items' order, worked out in :func:`block_threads` threads
    (a few items ahead, so a pass holds a few blocks at a time, not all). ``fn`` must touch only
    its own item's part of any shared array: its results come back in order for the caller to
    add up, so sums are the same bit for bit however many threads there are. An error in ``fn``
    is raised here."""
    threads = block_threads(threads)
    if threads <= 1:
        yield from map(fn, items)
        return
    with ThreadPoolExecutor(threads, thread_name_prefix="samesource-block") as pool:
        pending: deque = deque()
        try:
            for item in items:
                pending.append(pool.submit(fn, item))
                if len(pending) > threads:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()
        finally:
            for f in pending:
                f.cancel()


def codable(X: np.ndarray, low: float, high: float) -> bool:
    """Whether answers (float, NaN for none) can be kept as codes: whole numbers, a scale of
    at most 255 points starting at a whole number."""
    if not float(low).is_integer() or high - low > MISSING_CODE - 1:
        return False
    # one pass of comparisons, no copy of the answers (NaN fails every comparison)
    ok = (X == np.floor(X)) & (X >= low) & (X <= high)
    return bool(np.all(ok | np.isnan(X)))


def encode_block(X: np.ndarray, low: float) -> np.ndarray:
    """The codes of a block of answers that :func:`codable` accepted."""
    gaps = np.isnan(X)
    codes = np.where(gaps, MISSING_CODE, X - low).astype(np.uint8)
    return codes


__all__ = ["BLOCK_ROWS", "BLOCK_THREADS", "MISSING_CODE", "CodedRows", "FrameRows", "ItemRows", "block_threads",
           "codable", "encode_block", "map_in_threads"]
