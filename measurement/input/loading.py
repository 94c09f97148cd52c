"""Reading survey data files into a table of raw cells, remembering where each row came from.

:func:`load_table` reads delimited text (.csv, .tsv, .txt), Excel workbooks (.xlsx), SPSS
files (.sav) and Parquet files (.parquet), and any of them gzip-compressed (.csv.gz), from a
path or from bytes (an HTTP upload). It does not interpret values: text
cells stay strings so that :mod:`samesource.input.prepare` can name a bad value exactly as the
user typed it. Every problem is an :class:`~samesource.errors.InputError` naming the file
and, where it applies, the row and column.
"""

from __future__ import annotations

import codecs
import csv
import hashlib
import io
import json
import os
import pickle
import re
import subprocess
import sys
import warnings
import zipfile
import zlib
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from samesource.errors import DataError, InputError, UnsupportedFormat
from samesource.input import formats
from samesource.input.design import did_you_mean, item_stem
from samesource.input.formats import FileFormat
from samesource.input.workbook_limits import UNPACKED_LIMIT, check_workbook

# READERS, the registry of formats, and FORMATS, READABLE and TEXT_EXTENSIONS made from it
# are at the end of this module, after the readers they name.
DELIMITERS = (",", ";", "\t", "|")

_SNIFF_CHARS = 65536
_SNIFF_RECORDS = 200
_CLEAR_SCORE = 0.9  # share of sampled rows that must agree with the header's field count

_DELIM_NAMES = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}

# Content signatures that are decisive whatever the file is called: (start, what, advice).
_MAGIC: tuple[tuple[bytes, str, str], ...] = (
    (b"%PDF", "a PDF document", ""),
    (b"\x89PNG\r\n\x1a\n", "a PNG image", ""),
    (b"\xff\xd8\xff", "a JPEG image", ""),
    (b"GIF87a", "a GIF image", ""),
    (b"GIF89a", "a GIF image", ""),
    (b"BZh", "a bzip2-compressed file", "Decompress it first."),
    (b"\xfd7zXZ\x00", "an xz-compressed file", "Decompress it first."),
    (b"7z\xbc\xaf\x27\x1c", "a 7-Zip archive", "Unpack it first."),
    (b"Rar!\x1a\x07", "a RAR archive", "Unpack it first."),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1",
     "an old-style Excel .xls workbook (or another Office 97-2003 file, or a "
     "password-protected workbook)", "Save it as .xlsx or .csv, without a password."),
    (b"SQLite format 3\x00", "an SQLite database", ""),
    (b"<stata_dta>", "a Stata .dta file", "Export it as .csv or .sav."),
    (b"{\\rtf", "a rich-text (RTF) document", ""),
    (b"\x00\x00\x00\x00\x00\x00\x00\x00\x00\x00\x00\x00\xc2\xea\x81\x60\xb3\x14\x11\xcf",
     "a SAS data set", "Export it as .csv or .sav."),
)
# UTF-32's marks first: little-endian UTF-32's starts with little-endian UTF-16's.
_BOMS = ((codecs.BOM_UTF8, "utf-8-sig"), (codecs.BOM_UTF32_LE, "utf-32"),
         (codecs.BOM_UTF32_BE, "utf-32"), (codecs.BOM_UTF16_LE, "utf-16"),
         (codecs.BOM_UTF16_BE, "utf-16"))
_CONTROL = re.compile(rb"[\x00-\x08\x0e-\x1a\x1c-\x1f\x7f]")
_FORMULA_TAG = re.compile(rb"<(?:\w+:)?f[\s>/]")
# Text that survey and statistics exports write for "no answer" (read as blank in items).
MISSING_WORDS = frozenset({"na", "n/a", "#n/a", "nan", ".", "null"})
_NUMBER_TEXT = re.compile(r"\s*[+-]?(?:\d+[.,]?\d*|[.,]\d+)(?:[eE][+-]?\d+)?\s*")
_NOT_SPACE = re.compile(rb"\S")  # a byte bytes.strip() keeps (found at once, where strip() copies the file)
_COMMA_DECIMAL = re.compile(r"[+-]?\d*,\d+(?:[eE][+-]?\d+)?")
_POINT_DECIMAL = re.compile(r"[+-]?\d*\.\d+(?:[eE][+-]?\d+)?")


@dataclass
class LoadedTable:
    """A data file read into raw cells; nothing interpreted yet."""

    frame: pd.DataFrame  # columns as named in the file; text cells are str or NaN (blank)
    row_numbers: np.ndarray  # per frame row, the row (or SPSS case) number the user sees
    row_label: str  # "row" or "case", for messages
    format: str  # one of FORMATS, as detected from the content
    source: str  # file name for messages
    encoding: str | None = None
    delimiter: str | None = None
    decimal: str | None = None
    sheet: str | None = None
    value_labels: dict[str, dict] = field(default_factory=dict)
    user_missing: dict[str, list] = field(default_factory=dict)
    sha256: str = ""
    size_bytes: int = 0
    # A workbook's sheets ({"name", "rows", "columns", "item_like"}) and their column names.
    sheets: list[dict] = field(default_factory=list)
    sheet_columns: dict[str, list[str]] = field(default_factory=dict)
    variable_labels: dict[str, str] = field(default_factory=dict)  # SPSS variable labels
    row_names: list[str] | None = None  # an unnamed first column read as row labels
    # Things the report should mention ({"code", "message"}): blank rows skipped, an
    # encoding guessed, short rows padded, SPSS missing values applied, ...
    warnings: list[dict] = field(default_factory=list)


# --------------------------------------------------------------------------- detection


def _unsupported(what: str, filename: str | None, advice: str = "") -> UnsupportedFormat:
    return UnsupportedFormat(
        f"this file looks like {what}, not a data table; samesource reads {READABLE} "
        f"files. {advice or 'Export the data in one of these formats.'}",
        file=filename)


def _extension(filename: str | None) -> str:
    return os.path.splitext(filename or "")[1].lower()


def _zip_kind(head: bytes, ext: str, filename: str | None) -> str:
    try:
        names = zipfile.ZipFile(io.BytesIO(head)).namelist()
    except (zipfile.BadZipFile, OSError, ValueError, EOFError):
        names = None  # only the start of the archive: look at the entry names in the bytes
    if names is not None:
        blob = "\n".join(names).encode("utf-8", "replace")
    else:
        blob = head
    if b"xl/workbook.bin" in blob:
        raise _unsupported("an Excel binary workbook (.xlsb)", filename, "Save it as .xlsx.")
    if b"xl/" in blob:
        return "xlsx"
    if b"opendocument.spreadsheet" in head:
        raise _unsupported("an OpenDocument spreadsheet (.ods)", filename,
                           "Save it as .xlsx or .csv.")
    if b"word/" in blob:
        raise _unsupported("a Word document", filename)
    if b"ppt/" in blob:
        raise _unsupported("a PowerPoint presentation", filename)
    if names is None and ext == ".xlsx":
        return "xlsx"  # damaged or cut short: let the workbook reader say so
    raise _unsupported("a ZIP archive (not an Excel workbook)", filename, "Unpack it first.")


def _looks_binary(head: bytes) -> bool:
    sample = head[:_SNIFF_CHARS]
    if b"\x00" in sample:
        return True
    return len(_CONTROL.findall(sample)) > max(2, len(sample) // 100)


def _markup_kind(text: str) -> tuple[str, str] | None:
    start = text.lstrip()[:200].lower()
    if start.startswith(("<!doctype html", "<html", "<table")):
        return "a web page (HTML)", "If it came from a survey site, download the data as .csv."
    if start.startswith("<?xml"):
        return ("an XML file (for example an Excel 2003 XML spreadsheet)",
                "Save it as .xlsx or .csv.")
    if start[:1] in ("{", "["):
        try:
            json.loads(text)
        except ValueError:
            return None
        return "a JSON file", "If it is the study design, pass it as the design (--design)."
    return None


def _sample_lines(text: str) -> str:
    if len(text) <= _SNIFF_CHARS:
        return text
    cut = text.rfind("\n", 0, _SNIFF_CHARS)
    return text[: cut + 1] if cut > 0 else text[:_SNIFF_CHARS]


def _is_blank(cells: Sequence[Any]) -> bool:
    return all(_blank_cell(c) for c in cells)


def _blank_cell(c: Any) -> bool:
    if c is None:
        return True
    if isinstance(c, str):
        return not c.strip()
    return isinstance(c, float) and c != c


def _preference(fmt: str | None) -> tuple[str, ...]:
    if fmt == "tsv":
        return ("\t", ",", ";", "|")
    if fmt == "txt":
        return ("\t", "|", ";", ",")
    return DELIMITERS


def sniff_delimiter(text: str, fmt: str | None = None) -> tuple[str | None, float]:
    """The delimiter among , ; tab | whose field count is most consistent with the header.

    Quotes are respected. Returns (delimiter, share of sampled rows agreeing with the
    header), or (None, 0.0) when no candidate splits the header into two or more fields.
    """
    sample = _sample_lines(text)
    pref = _preference(fmt)
    best: tuple[tuple[float, int, int], str] | None = None
    for rank, d in enumerate(pref):
        rows: list[list[str]] = []
        reader = csv.reader(io.StringIO(sample, newline=""), delimiter=d, quotechar='"',
                            skipinitialspace=True, strict=False)
        try:
            for r in reader:
                if not _is_blank(r):
                    rows.append(r)
                    if len(rows) >= _SNIFF_RECORDS:
                        break
        except csv.Error:
            continue
        if not rows or len(rows[0]) < 2:
            continue
        h = len(rows[0])
        agree = sum(1 for r in rows if len(r) == h or (len(r) > h and _is_blank(r[h:])))
        key = (round(agree / len(rows), 3), h, -rank)
        if best is None or key > best[0]:
            best = (key, d)
    if best is None:
        return None, 0.0
    return best[1], best[0][0]


def _text_head(head: bytes) -> str:
    # Only for recognising the kind of text: a character cut in two or a wrong guess between
    # 8-bit encodings does not matter here.
    head = head[: 16 * _SNIFF_CHARS]
    for bom, enc in _BOMS:
        if head.startswith(bom):
            if enc != "utf-8-sig":  # the codec takes the byte order from the mark itself
                return head.decode(enc, "replace")
            return head[len(bom):].decode("utf-8", "replace")
    return head.decode("utf-8", "replace")


def detect_format(head: bytes, filename: str | None) -> str:
    """The file's format (one of :data:`FORMATS`) from its content and name.

    Content wins where it is decisive (a workbook called .csv is read as a workbook);
    anything we do not read raises :class:`UnsupportedFormat` saying what it looks like.
    ``head`` is the start of the file (the whole file is best for ZIP-based formats).
    """
    ext = _extension(filename)
    if _NOT_SPACE.search(head) is None:
        raise DataError("the file is empty; export the survey data again", file=filename)
    for f in READERS:
        if f.sniff is not None and f.sniff(head, ext, filename):
            return f.name
    if head.startswith(GZIP_MAGIC):  # load_table unpacks once: here it was compressed twice
        raise _unsupported("a gzip-compressed file", filename,
                           "Decompress it until it is a data table (compressing that once is fine).")
    has_bom = any(head.startswith(bom) for bom, _ in _BOMS)
    if not has_bom:
        for magic, what, advice in _MAGIC:
            if head.startswith(magic):
                raise _unsupported(what, filename, advice)
        if _looks_binary(head):
            sample = head[:4096]
            if len(sample) > 8 and sample[1::2].count(0) > len(sample) // 4:
                raise _unsupported("UTF-16 text without a byte-order mark", filename,
                                   "Save it as UTF-8 text.")
            raise _unsupported("binary data" + (f" (it is named {ext})" if ext else ""), filename)
    text = _text_head(head)
    markup = _markup_kind(text)
    if markup:
        raise _unsupported(markup[0], filename, markup[1])
    if ext in TEXT_EXTENSIONS:
        return TEXT_EXTENSIONS[ext]
    delim, score = sniff_delimiter(text)
    if delim is None or score < _CLEAR_SCORE:
        raise _unsupported("text that is not a delimited table (no consistent comma, semicolon, "
                           "tab or pipe separators in the first lines)", filename)
    return {"\t": "tsv", "|": "txt"}.get(delim, "csv")


# --------------------------------------------------------------------------- text files


def _line_of(data: bytes, pos: int) -> int:
    return data.count(b"\n", 0, pos) + 1


def _decode(data: bytes, source: str) -> tuple[str, str]:
    """Decode text: BOM, then strict UTF-8, then Windows-1252, a detected charset, Latin-1."""
    for bom, enc in _BOMS:
        if data.startswith(bom):
            body = data[len(bom):]
            try:
                # UTF-16 or -32 with the mark: the codec reads the byte order (little- or
                # big-endian) from it; without the mark it would assume this machine's order.
                return (body.decode("utf-8") if enc == "utf-8-sig" else data.decode(enc)), enc
            except UnicodeDecodeError as e:
                label = "UTF-8" if enc == "utf-8-sig" else enc.upper()
                where = f"line {_line_of(body, e.start)}" if enc == "utf-8-sig" else \
                    f"byte {e.start}"
                raise DataError(
                    f"the file says it is {label} text (it starts with a byte-order mark) but "
                    f"its {where} holds bytes that are not {label}; save it again as UTF-8 text",
                    file=source) from None
    try:
        return data.decode("utf-8"), "utf-8"
    except UnicodeDecodeError:
        pass
    try:
        return data.decode("cp1252"), "cp1252"
    except UnicodeDecodeError:
        pass
    try:
        import charset_normalizer

        best = charset_normalizer.from_bytes(data[: 4 * _SNIFF_CHARS]).best()
        if best is not None and best.encoding:
            return data.decode(best.encoding), best.encoding
    except (LookupError, UnicodeDecodeError, ValueError):
        pass
    return data.decode("latin-1"), "latin-1"


def _parse_records(text: str, delim: str, source: str, strict: bool
                   ) -> tuple[list[tuple[int, list[str]]], list[int], int]:
    """All records with their row numbers (each record, blank ones too, is one row).

    Also returns the rows whose quoted values run over several lines, and the line on
    which the last record starts.
    """
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delim, quotechar='"',
                        skipinitialspace=True, strict=strict)
    records: list[tuple[int, list[str]]] = []
    multiline: list[int] = []
    row = 0
    last_start = 1
    while True:
        first_line = reader.line_num + 1
        try:
            fields = next(reader)
        except StopIteration:
            break
        except csv.Error as e:
            if "end of data" in str(e):
                raise _unclosed_quote(row + 1, first_line, source) from None
            if "field larger than field limit" in str(e):
                raise _too_long_value(text, row + 1, first_line, source) from None
            raise
        row += 1
        last_start = first_line
        if reader.line_num > first_line:
            multiline.append(row)
        records.append((row, fields))
    return records, multiline, last_start


def _too_long_value(text: str, row: int, line: int, source: str) -> DataError:
    """The csv module refuses a value over its field limit (131072 characters); no survey
    answer is that long, so it is mostly a quote never closed, swallowing the rest."""
    tail = "".join(io.StringIO(text, newline="").readlines()[line - 1:])
    if tail.count('"') % 2 == 1:
        return _unclosed_quote(row, line, source)
    return DataError(
        f"row {row} (line {line}) holds a value over {csv.field_size_limit()} characters long, "
        "far longer than any survey answer; check that row, or remove long free-text columns "
        "the analysis does not use", file=source, row=row)


def _unclosed_quote(row: int, line: int, source: str) -> DataError:
    return DataError(
        f"a quoted value that starts in row {row} (line {line}) is never closed, so the rest "
        "of the file would be read as one value; add the missing closing quote (\")",
        file=source, row=row)


# A character other than blanks, separators, quotes and byte-order marks (found at once in a
# table, where stripping those off copied the whole text).
_NOT_EMPTY_TEXT = re.compile(r'[^ \t\r\n\f\v,;|"\ufeff]')
_NOT_EMPTY_BYTES = re.compile(rb'[^ \t\r\n\f\v,;|"]')  # the same in ASCII


def _delimiter(text: str, fmt: str) -> str:
    """The delimiter of a text (from its first lines, :func:`_sample_lines`)."""
    delim, _score = sniff_delimiter(text, fmt)
    if delim is None:
        # One column: split on a candidate the text does not contain.
        sample = _sample_lines(text)
        pref = _preference(fmt)
        delim = next((d for d in pref if d not in sample), pref[0])
    return delim


def _read_text(data: bytes, source: str, fmt: str) -> dict:
    tried = data.isascii()
    if tried:  # ASCII is UTF-8 as it stands: the column-wise reader takes the bytes
        body = data.rstrip(b"\x1a")  # (no decoded copy of the file, and no encoded one)
        tried = _NOT_EMPTY_BYTES.search(body) is not None
        if tried:
            delim = _delimiter(body[:_SNIFF_CHARS + 1].decode("ascii"), fmt)
            try:
                plain = _read_text_plain(body, delim)
            except (ValueError, TypeError, AttributeError, IndexError, OverflowError):
                plain = None
            if plain is not None:
                return dict(plain, encoding="utf-8", delimiter=delim, warnings=[], row_names=None)
    text, encoding = _decode(data, source)
    text = text.rstrip("\x1a")  # an old end-of-file marker
    if _NOT_EMPTY_TEXT.search(text) is None:
        raise DataError("the file is empty (it holds only blank lines or empty fields); export "
                        "the survey data again", file=source)
    notes: list[dict] = []
    delim = _delimiter(text, fmt)
    try:  # from the decoded text: any encoding (an ASCII file's bytes were tried above)
        plain = None if tried else _read_text_plain(text, delim)
    except (ValueError, TypeError, AttributeError, IndexError, OverflowError):
        plain = None  # the record-by-record reader below is exact for every file
    if plain is not None:
        _note_encoding(text, encoding, notes)
        return dict(plain, encoding=encoding, delimiter=delim, warnings=notes, row_names=None)
    try:
        records, multiline, _ = _parse_records(text, delim, source, strict=True)
    except csv.Error:
        # A quote in the middle of a value ("a"b): read it the forgiving way, and say so.
        records, multiline, last_start = _parse_records(text, delim, source, strict=False)
        last_row = records[-1][0]
        tail = "".join(io.StringIO(text, newline="").readlines()[last_start - 1:])
        if last_row in multiline and tail.count('"') % 2 == 1:
            # Read the forgiving way, an unclosed quote swallows the rest of the file.
            raise _unclosed_quote(last_row, last_start, source) from None
        notes.append({"code": "loose_quotes", "message": (
            "some quotes in the file are not where the CSV rules expect them (a quote inside "
            "a value that is not itself quoted); those values were read with the quotes "
            "dropped")})
    if multiline:
        notes.append({"code": "multiline_values", "message": (
            f"{len(multiline)} row(s) hold a quoted value running over several lines (first: "
            f"row {multiline[0]}); rows are numbered as a spreadsheet shows them, so from "
            "there on a row number can differ from the line number in a text editor")})

    header_row, header, rows, blank_inside = _split_header(records, _is_blank)
    if header_row is None:
        raise DataError("the file is empty (it holds only blank lines or empty fields)",
                        file=source)
    if header:
        header[0] = header[0].lstrip("\ufeff")
    columns, body, row_numbers, row_names = _assemble(
        [h.strip() for h in header], rows, header_row, source,
        position=str, extra_hint=(f"A value in this row may contain an unquoted "
                                  f"{_DELIM_NAMES[delim]}: put quotes around it"
                                  + (", or write decimals with a point" if delim == "," else "")),
        notes=notes)
    decimal = _apply_decimal(body, delim)
    frame = _frame(columns, body)
    _note_blank_rows(blank_inside, notes)
    _note_encoding(text, encoding, notes)
    return dict(frame=frame, row_numbers=row_numbers, encoding=encoding, delimiter=delim,
                decimal=decimal, warnings=notes, row_names=row_names)


def _note_encoding(text: str, encoding: str, notes: list[dict]) -> None:
    if encoding not in ("utf-8", "utf-8-sig", "utf-16", "utf-32") and not text.isascii():
        notes.append({"code": "encoding_guessed", "message": (
            f"the file is not UTF-8; it was read as {_ENCODING_NAMES.get(encoding, encoding)} "
            "text. If accented letters look wrong, save the file as UTF-8")})


_ENCODING_NAMES = {"cp1252": "Windows-1252", "latin-1": "Latin-1", "utf-16": "UTF-16",
                   "utf-32": "UTF-32"}


def _split_header(records: list, blank) -> tuple[int | None, list, list, list[int]]:
    nonblank = [(n, r) for n, r in records if not blank(r)]
    if not nonblank:
        return None, [], [], []
    header_row, header = nonblank[0]
    rows = nonblank[1:]
    last = rows[-1][0] if rows else header_row
    blank_inside = [n for n, r in records if header_row < n < last and blank(r)]
    return header_row, list(header), rows, blank_inside


def _note_blank_rows(blank_inside: list[int], notes: list[dict]) -> None:
    if blank_inside:
        shown = ", ".join(str(n) for n in blank_inside[:5]) + (", ..." if len(blank_inside) > 5
                                                               else "")
        notes.append({"code": "blank_rows_skipped", "message": (
            f"{len(blank_inside)} empty row(s) between the data rows were skipped (rows "
            f"{shown})")})


def _assemble(names: list[str], rows: list[tuple[int, Sequence[Any]]], header_row: int,
              source: str, *, position, extra_hint: str, notes: list[dict]
              ) -> tuple[list[str], list[list[Any]], np.ndarray, list[str] | None]:
    """Check the header against the rows; return kept names, cells, row numbers and the row
    labels of an unnamed first column (None when there is none)."""
    if not rows:
        raise DataError(f"the file has a header (row {header_row}) but no data rows; export "
                        "the survey data with the respondents' answers", file=source,
                        row=header_row)
    width = len(names)
    short = 0
    body: list[list[Any]] = []
    for n, r in rows:
        r = list(r)
        if len(r) > width:
            extra = [j for j in range(width, len(r)) if not _blank_cell(r[j])]
            if extra:
                j = extra[0]
                if position is str:
                    count = f"this row has {len(r)} values"
                else:
                    count = f"this row has a value in column {position(j + 1)}"
                raise DataError(
                    f"{count} but the header (row {header_row}) names only {width} columns; "
                    f"the first extra value is {_show(r[j])}. {extra_hint}; otherwise give "
                    "the extra column a name in the header",
                    file=source, row=n, column=position(j + 1))
            r = r[:width]
        elif len(r) < width:
            short += 1
            r = r + [None] * (width - len(r))
        body.append(r)

    keep: list[int] = []
    row_names = _row_names(names, body, position, notes)
    for j, name in enumerate(names):
        if name:
            keep.append(j)
            continue
        if j == 0 and row_names is not None:
            continue
        used = next((n for (n, _), r in zip(rows, body, strict=True) if not _blank_cell(r[j])),
                    None)
        if used is not None:
            left = next((names[k] for k in range(j - 1, -1, -1) if names[k]), None)
            after = f" (the column after '{left}')" if left else ""
            raise DataError(
                f"column {position(j + 1)}{after} has no name in the header (row {header_row}) "
                f"but holds values (first in row {used}); give it a name or delete the column",
                file=source, row=header_row, column=position(j + 1))
    seen: dict[str, list[int]] = {}
    for j in keep:
        seen.setdefault(names[j], []).append(j + 1)
    for name, where in seen.items():
        if len(where) > 1:
            times = "twice" if len(where) == 2 else f"{len(where)} times"
            cols = ", ".join(position(k) for k in where[:-1]) + f" and {position(where[-1])}"
            raise DataError(
                f"the column name '{name}' appears {times} in the header (columns {cols}); "
                "give each column its own name", file=source, row=header_row, column=name)
    if short:
        notes.append({"code": "short_rows", "message": (
            f"{short} row(s) have fewer values than the header has columns; the missing "
            "values at their ends were read as blank")})
    if len(keep) < width:
        body = [[r[j] for j in keep] for r in body]
    columns = [names[j] for j in keep]
    return columns, body, np.array([n for n, _ in rows], dtype=np.int64), row_names


def _row_names(names: list[str], body: list[list[Any]], position, notes: list[dict]) -> list[str] | None:
    """A first column with an empty header holding 1, 2, ..., n, or a label per row, all
    different: row labels as some statistics programs write them, not data."""
    if len(names) < 2 or names[0] or not body:
        return None
    cells = [r[0] for r in body]
    if any(_blank_cell(c) for c in cells):
        return None
    labels = [_header_name(c) if not isinstance(c, str) else c.strip() for c in cells]
    if len(set(labels)) != len(labels):
        return None
    counting = labels == [str(i) for i in range(1, len(labels) + 1)]
    what = f"1 to {len(labels)}" if counting else "a different label in every row"
    notes.append({"code": "row_names", "message": (
        f"column {position(1)} has no name in the header and holds {what}: it was read as row "
        "labels, not as data (as some statistics programs write a table with row names)")})
    return labels


def _apply_decimal(body: list[list[Any]], delim: str) -> str:
    """Detect a decimal comma ("3,5") and rewrite such cells as "3.5"."""
    if delim == ",":
        return "."
    commas = points = 0
    for r in body:
        for c in r:
            if isinstance(c, str) and ("," in c or "." in c):
                s = c.strip()
                if _COMMA_DECIMAL.fullmatch(s):
                    commas += 1
                elif _POINT_DECIMAL.fullmatch(s):
                    points += 1
    if commas == 0 or commas < points:
        return "."
    for r in body:
        for j, c in enumerate(r):
            if isinstance(c, str) and "," in c:
                s = c.strip()
                if _COMMA_DECIMAL.fullmatch(s):
                    r[j] = s.replace(",", ".")
    return ","


def _frame(columns: list[str], body: list[list[Any]]) -> pd.DataFrame:
    cells = [[np.nan if _blank_cell(c) else c for c in r] for r in body]
    frame = pd.DataFrame(cells, columns=pd.Index(columns, dtype=object), dtype=object)
    if frame.shape[1] != len(columns):  # no rows survive: keep the columns anyway
        frame = pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    return frame


def _show(v: Any) -> str:
    s = str(v)
    return repr(s if len(s) <= 40 else s[:37] + "...")


# --------------------------------------------------------------------------- plain text, column-wise

# Files with no quotes, one record per line and a header of distinct names are read column-wise
# by pandas' C parser (the common case); anything else, or anything this reader is not sure of,
# goes to the record-by-record reader above, which is exact for every file.
_PLAIN_CHUNK_ROWS = 200_000
_PLAIN_CHECK_LINES = 2000  # lines looked at one by one when their lengths disagree
_POW10 = 10 ** np.arange(19, dtype=np.int64)
_EXACT_FLOAT = 2.0 ** 53


# A number written with the exponent 2 (12e2, 3E2) is exactly as long as the integer it is
# (1200, 300); any other way of writing an integer (a sign, leading zeros, a decimal point,
# another exponent) is longer.
_EXPONENT_TWO = re.compile(rb"[0-9][eE]2(?![0-9])")


def _may_hide_exponent(values: np.ndarray, body: bytes) -> bool:
    """Whether a float column read from ``body`` might hold a field written with the exponent
    2, which the line-length check cannot tell from the integer: a whole multiple of 100 in the
    column and such a field somewhere in the file."""
    with np.errstate(invalid="ignore"):
        hundreds = (np.abs(values) >= 100) & (np.fmod(values, 100) == 0)
    return bool(hundreds.any()) and _EXPONENT_TWO.search(body) is not None


def _canonical_lengths(values: np.ndarray) -> np.ndarray | None:
    """Characters of each value written as the integer it is (0 for NaN): a numeric field
    whose text is that long is exactly that text (any other form of the number is longer, but
    for the exponent 2, which :func:`_may_hide_exponent` rules out first); None when some value
    is not a whole number that is written so."""
    v = np.asarray(values)
    if v.dtype.kind == "f":
        blank = np.isnan(v)
        whole = v[~blank]
        if whole.size and (not np.all(np.isfinite(whole)) or np.any(np.abs(whole) >= _EXACT_FLOAT)
                           or np.any(whole != np.round(whole))):
            return None
        ints = np.where(blank, 0, v).astype(np.int64)
    elif v.dtype.kind == "i":
        if v.size and v.min() == np.iinfo(v.dtype).min:
            return None
        ints, blank = v, None  # in their own (often one-byte) type: |v| fits, as the lowest value is not there
    else:
        return None
    mag = np.abs(ints)
    digits = (ints < 0).astype(np.uint8) + np.uint8(1)  # at most 20 characters
    top = int(mag.max()) if len(mag) else 0
    for p in _POW10[1:]:  # one comparison per digit the largest value has beyond the first
        if p > top:
            break
        digits += mag >= p
    return digits if blank is None else np.where(blank, 0, digits)


def _compact(lengths: np.ndarray) -> np.ndarray:
    """Field lengths in the smallest unsigned type that holds them: kept for every column until
    the line-length check is done, they were 8 bytes a cell (480 MB at a million rows of 60)."""
    top = int(lengths.max()) if len(lengths) else 0
    return lengths.astype(next(t for t in (np.uint8, np.uint16, np.uint32, np.int64) if top <= np.iinfo(t).max))


def _text_lengths(cells: np.ndarray, ascii_only: bool) -> np.ndarray:
    """Each text cell's length in UTF-8 bytes (0 where missing)."""
    if ascii_only:
        lengths = text_cells(cells).lengths
        if lengths is not None:
            return lengths
    s = pd.Series(cells, dtype=object)
    lengths = s.str.len() if ascii_only else s.str.encode("utf-8").str.len()
    return lengths.fillna(0).to_numpy(dtype=np.int64)


# What str.strip() removes (Python's whitespace): the ASCII ones as a byte table, all of them
# next to a cell's edge in cells joined by NUL.
_ASCII_SPACE = np.array([chr(b).isspace() for b in range(256)]) & (np.arange(256) < 128)
_SPACE_AT_EDGE = re.compile(r"(?:^|\x00)\s|\s(?:\x00|$)")


@dataclass(frozen=True)
class TextCells:
    """What a column's text cells hold, found without a Python step per cell: ``missing``
    (NaN or None), ``spaced`` (some cell begins or ends with whitespace: str.strip() would
    change it) and, when every cell is ASCII text without a NUL, ``lengths`` (characters per
    cell, 0 where missing; else None)."""

    missing: np.ndarray
    spaced: bool
    lengths: np.ndarray | None


def text_cells(cells: np.ndarray) -> TextCells:
    """:class:`TextCells` of an object array of text (str, NaN or None where missing; any other
    value counts as spaced, so the caller takes the cell-by-cell way). The cells are joined by
    NUL once: each cell's edges are the characters next to a NUL (or the ends), each cell's
    length the distance between NULs."""
    missing = pd.isna(cells)
    present = cells[~missing] if missing.any() else cells
    try:
        joined = "\x00".join(present)
    except TypeError:  # not all text
        return TextCells(missing, True, None)
    if joined.isascii():
        arr = np.frombuffer(joined.encode("ascii"), dtype=np.uint8)
        seps = np.flatnonzero(arr == 0)
        if len(seps) == max(len(present) - 1, 0):  # no cell holds a NUL of its own
            starts = np.concatenate(([0], seps + 1))
            ends = np.concatenate((seps, [len(arr)]))
            filled = starts < ends
            spaced = bool(_ASCII_SPACE[arr[starts[filled]]].any() or _ASCII_SPACE[arr[ends[filled] - 1]].any())
            lengths = np.zeros(len(cells), dtype=np.int64)
            lengths[~missing] = (ends - starts)[:len(present)]
            return TextCells(missing, spaced, lengths)
    return TextCells(missing, _SPACE_AT_EDGE.search(joined) is not None, None)


def _plain_body(text: str | bytes, delim: str) -> tuple[list[str], bytes] | None:
    body = text if isinstance(text, bytes) else text.encode("utf-8")
    if b'"' in body:
        return None
    returns = body.count(b"\r")
    if returns and returns != body.count(b"\r\n"):
        return None
    if delim != "\t" and b"\t" in body:  # the two readers skip different spaces at a field's start
        return None
    cut = body.find(b"\n")
    if cut <= 0:
        return None
    header = body[:cut].rstrip(b"\r").decode("utf-8").split(delim)
    names = [h.lstrip(" ").strip() for h in header]
    if names:
        names[0] = names[0].lstrip("\ufeff")
    if any(not n for n in names) or len(set(names)) != len(names) or len(names) < 2:
        return None
    end = len(body)  # blank lines after the last row are no rows (one copy of the rows, not two)
    while end > cut + 1 and body[end - 1] in b"\r\n":
        end -= 1
    if _NOT_SPACE.search(body, cut + 1, end) is None:
        return None
    return names, body[cut + 1:end]


def _read_plain(body: bytes, delim: str, width: int, columns: list[int] | None = None,
                as_text: bool = False):
    """pandas' C parser over the body (no quotes in it): each field as it stands."""
    import csv as _csv

    return pd.read_csv(
        io.BytesIO(body), sep=delim, header=None, names=list(range(width)), usecols=columns,
        dtype=str if as_text else None, na_filter=not as_text, na_values=[""], keep_default_na=False,
        skipinitialspace=False, quoting=_csv.QUOTE_NONE, skip_blank_lines=False, engine="c",
        encoding="utf-8", chunksize=None if as_text else _PLAIN_CHUNK_ROWS)


def _read_text_plain(text: str | bytes, delim: str) -> dict | None:
    """The column-wise reading of a plain delimited file (its text, or its bytes when they are
    ASCII), or None when it is not plain.

    Gives what the record-by-record reader gives: a column of whole numbers each written as
    the integer itself becomes numeric (the same numbers and the same text for ids and groups),
    every other column keeps each cell's text (leading spaces dropped, blank cells missing,
    decimal commas rewritten). That a numeric column's every field is written as its integer
    is checked by line lengths: each line's length is the sum of its fields' lengths."""
    plain = _plain_body(text, delim)
    if plain is None:
        return None
    names, body = plain
    width = len(names)
    arr = np.frombuffer(body, dtype=np.uint8)
    ends = np.flatnonzero(arr == 10)
    starts = np.concatenate(([0], ends + 1))
    ends = np.concatenate((ends, [len(arr)]))
    line_len = ends - starts
    if body.count(b"\r"):
        line_len = line_len - (arr[np.maximum(ends - 1, 0)] == 13)
    n = len(starts)
    parts: list[list] = [[] for _ in range(width)]  # per column, each chunk's values
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for chunk in _read_plain(body, delim, width):
                for j in range(width):
                    parts[j].append(_chunk_values(chunk[j]))
                del chunk
    except (ValueError, pd.errors.ParserError, UnicodeDecodeError, MemoryError):
        return None
    if sum(len(p) for p in parts[0]) != n:
        return None
    cols: dict[int, np.ndarray] = {}
    text_cols: set[int] = set()
    for j in range(width):
        kinds = {p.dtype.kind for p in parts[j]}
        if kinds <= {"i"}:
            cols[j] = np.concatenate(parts[j])
        elif kinds <= {"i", "f"}:
            cols[j] = np.concatenate([p.astype(float) for p in parts[j]])
            if _may_hide_exponent(cols[j], body):
                cols[j] = None  # read as text: a field like 2e2 is no integer, though as long as 200
        elif kinds == {"O"}:
            v = np.concatenate(parts[j])
            if pd.api.types.infer_dtype(v, skipna=True) in ("string", "empty"):
                cols[j] = v
                text_cols.add(j)
            else:  # numbers past int64 and text mixed: read the fields as text
                cols[j] = None
        else:
            cols[j] = None
        parts[j] = []
    ascii_only = body.isascii()
    expected = np.full(n, width - 1, dtype=np.int64)
    lengths: dict[int, np.ndarray] = {}
    for j, v in cols.items():
        lj = _text_lengths(v, ascii_only) if j in text_cols else (None if v is None else _canonical_lengths(v))
        if lj is None:
            cols[j] = None
        else:
            lengths[j] = _compact(lj)
            expected += lj
    limit = csv.field_size_limit()  # the record reader refuses longer values, naming the row
    if any(j in text_cols and len(lj) and lj.max() > limit for j, lj in lengths.items()):
        return None
    while True:
        need = [j for j, v in cols.items() if v is None]
        if need:
            raw = _read_plain(body, delim, width, need, as_text=True)
            if len(raw) != n:
                return None
            for j in need:
                v = raw[j].to_numpy(dtype=object)
                if j in lengths:
                    expected -= lengths[j]
                cols[j], lengths[j] = v, _compact(_text_lengths(v, ascii_only))
                expected += lengths[j]
                text_cols.add(j)
            del raw
            if any(len(lengths[j]) and lengths[j].max() > limit for j in need):
                return None
        wrong = np.flatnonzero(expected != line_len)
        if not len(wrong):
            break
        found = set()
        for i in wrong[:_PLAIN_CHECK_LINES]:
            fields = body[starts[i]:ends[i]].rstrip(b"\r").decode("utf-8").split(delim)
            if len(fields) != width:
                return None  # a short or long row, or a blank line: the exact reader says so
            for j, f in enumerate(fields):
                v = cols[j][i]
                if j in text_cols:
                    if ("" if v is np.nan else v) != f:
                        return None
                elif ("" if v != v else str(int(v))) != f:
                    found.add(j)
        if not found:
            return None
        for j in found:
            cols[j] = None
    frame_cols: dict[str, Any] = {}
    for j, name in enumerate(names):
        v = cols[j]
        if j in text_cols:
            frame_cols[name] = _plain_cells(v)
        elif v.dtype.kind == "i":
            lo, hi = (int(v.min()), int(v.max())) if v.size else (0, 0)
            small = next(t for t in (np.int8, np.int16, np.int32, np.int64)
                         if np.iinfo(t).min <= lo and hi <= np.iinfo(t).max)
            frame_cols[name] = v.astype(small)
        else:
            frame_cols[name] = v
    frame = pd.DataFrame(frame_cols, copy=False)
    frame.columns = pd.Index(names, dtype=object)
    decimal = _plain_decimal(frame, [names[j] for j in sorted(text_cols)], delim)
    gaps = [frame[c].isna().to_numpy() for c in frame.columns if frame[c].dtype.kind not in "iu"]
    if len(gaps) == width and np.logical_and.reduce(gaps).any():
        return None  # a row of empty fields: the exact reader skips it and says so
    return dict(frame=frame, row_numbers=np.arange(2, n + 2, dtype=np.int64), decimal=decimal)


def _chunk_values(s: pd.Series) -> np.ndarray:
    """A chunk's column as numbers (whole numbers in the smallest integer type that holds them
    with room below: a type's lowest value is kept for "not written as an integer") or as
    objects (text, NaN where missing); booleans and others keep their kind."""
    if s.dtype.kind == "i":
        v = s.to_numpy()
        lo, hi = (int(v.min()), int(v.max())) if len(v) else (0, 0)
        for t in (np.int8, np.int16, np.int32):
            if np.iinfo(t).min < lo and hi <= np.iinfo(t).max:
                return v.astype(t)
        return v
    if s.dtype.kind == "f":
        return s.to_numpy()
    if s.dtype.kind in "OU" or isinstance(s.dtype, pd.StringDtype):
        return s.to_numpy(dtype=object, na_value=np.nan)
    return s.to_numpy()


def _plain_cells(raw: np.ndarray) -> np.ndarray:
    """Each field's cell as the csv reader gives it (leading spaces dropped), blank ones NaN."""
    facts = text_cells(raw)
    if not facts.spaced:  # nothing to strip (ids, most often): only empty fields become NaN
        cells = raw.copy()
        cells[facts.missing | np.equal(raw, "")] = np.nan
        return cells
    codes, uniques = pd.factorize(raw)
    kept = pd.Series(uniques, dtype=object).str.lstrip(" ")
    kept = kept.where(kept.str.strip() != "", np.nan)
    cells = np.append(kept.to_numpy(dtype=object), np.nan)
    return cells[codes]  # code -1 (a missing field) takes the NaN at the end


def _plain_decimal(frame: pd.DataFrame, text_columns: list[str], delim: str) -> str:
    """_apply_decimal over the text columns, one distinct cell at a time."""
    if delim == ",":
        return "."
    commas = points = 0
    coded = {}
    for col in text_columns:
        codes, uniques = pd.factorize(frame[col].to_numpy(dtype=object))
        counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
        coded[col] = (codes, uniques)
        for u, k in zip(uniques, counts, strict=True):
            if "," in u or "." in u:
                s = u.strip()
                if _COMMA_DECIMAL.fullmatch(s):
                    commas += int(k)
                elif _POINT_DECIMAL.fullmatch(s):
                    points += int(k)
    if commas == 0 or commas < points:
        return "."
    for col, (codes, uniques) in coded.items():
        new = [u.strip().replace(",", ".") if "," in u and _COMMA_DECIMAL.fullmatch(u.strip()) else u
               for u in uniques]
        cells = np.array(new + [np.nan], dtype=object)
        frame[col] = cells[codes]
    return ","


# --------------------------------------------------------------------------- xlsx


def _letter(n: int) -> str:
    s = ""
    while n:
        n, rem = divmod(n - 1, 26)
        s = chr(65 + rem) + s
    return s


def _header_name(v: Any) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "TRUE" if v else "FALSE"
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v).strip()


def _brief(e: BaseException) -> str:
    msg = str(e).strip().splitlines()[0] if str(e).strip() else ""
    return f"{e.__class__.__name__}: {msg[:120]}" if msg else e.__class__.__name__


def _read_xlsx(data: bytes, source: str, sheet: str | int | None) -> dict:
    import openpyxl

    check_workbook(data, source)  # a decompression bomb is refused before it is parsed

    def open_book(data_only: bool):
        return openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=data_only)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # openpyxl warns about styles and extensions it skips
        try:
            wb = open_book(True)
        except MemoryError:  # a workbook is read whole: say so, and what to do (the MemoryError stays the context)
            raise DataError(
                "ran out of memory opening the Excel workbook (a workbook is read whole and takes many "
                "times its size in memory); save the sheet as .csv or .parquet, which are read with far "
                "less, or run it where more memory is free", file=source) from None
        except Exception as e:  # any other failure inside the workbook reader means "cannot open"
            raise DataError(
                f"cannot open the Excel workbook ({_brief(e)}); check that the file is complete "
                "and not password-protected, or save it again as .xlsx or .csv",
                file=source) from None
        try:
            if sheet is None and len(wb.sheetnames) > 1:
                every = {t: _sheet_rows(wb, t, source) for t in wb.sheetnames}
                sheets = [_sheet_size(t, r) for t, r in every.items()]
                title = _choose_sheet(sheets)
                rows = every[title]
            else:
                title = _pick_sheet(wb.sheetnames, sheet, source)
                rows = _sheet_rows(wb, title, source)
                sheets = [_sheet_size(title, rows)]
                if len(wb.sheetnames) > 1:  # the others' names and sizes, for the listing
                    sheets = [_sheet_size(t, rows if t == title else _sheet_rows(wb, t, source))
                              for t in wb.sheetnames]
        finally:
            wb.close()
        notes: list[dict] = []
        if len(sheets) > 1:
            listed = "; ".join(f"'{d['name']}' ({d['rows']} rows, {d['columns']} columns)" for d in sheets)
            why = ("chosen as the sheet with the most rows under item-like columns" if sheet is None
                   else "as asked")
            notes.append({"code": "sheet_chosen", "message": (
                f"the workbook has {len(sheets)} sheets: {listed}; sheet '{title}' was read ({why}). "
                "To read another, name it with --sheet (or the option sheet)")})
        if _has_uncomputed(rows, data):
            wb = open_book(False)
            try:
                formulas = _sheet_rows(wb, title, source)
            finally:
                wb.close()
            filled = _fill_formulas(rows, formulas)
            if filled:
                r, c = filled[0]
                notes.append({"code": "formulas_without_results", "message": (
                    f"{len(filled)} cell(s) hold a formula with no saved result (first: "
                    f"{_letter(c)}{r}), as when a program wrote the workbook without a "
                    "spreadsheet ever calculating it; they were read as the formula text. Open "
                    "and save the workbook in a spreadsheet program to store the results")})

    numbered = [(i + 1, r) for i, r in enumerate(rows)]
    header_row, header, body_rows, blank_inside = _split_header(numbered, _is_blank)
    if header_row is None:
        raise DataError(f"sheet '{title}' is empty", file=source)
    last_col = max((max((j for j, c in enumerate(r) if not _blank_cell(c)), default=-1)
                    for _, r in [(header_row, header)] + body_rows), default=-1)
    header = [_header_name(v) for v in header[: last_col + 1]]
    body_rows = [(n, list(r[: last_col + 1])) for n, r in body_rows]
    columns, body, row_numbers, row_names = _assemble(
        header, body_rows, header_row, source, position=_letter,
        extra_hint="Clear that cell if it is not part of the data", notes=notes)
    frame = _frame(columns, body)
    _note_blank_rows(blank_inside, notes)
    names = {d["name"]: d.pop("names") for d in sheets}
    names[title] = list(columns)
    return dict(frame=frame, row_numbers=row_numbers, sheet=title, warnings=notes, sheets=sheets,
                sheet_columns=names, row_names=row_names)


def _sheet_size(title: str, rows: list[list[Any]]) -> dict:
    """A sheet's name, data rows, named columns and item-like columns (by the draft's naming
    rules), from its first non-blank row as the header."""
    numbered = [(i + 1, r) for i, r in enumerate(rows)]
    _, header, body, _ = _split_header(numbered, _is_blank)
    names = [h for h in (_header_name(v) for v in header) if h]
    return {"name": title, "rows": len(body), "columns": len(names),
            "item_like": sum(item_stem(n) is not None for n in names), "names": names}


def _choose_sheet(sheets: list[dict]) -> str:
    """The sheet that holds the respondents: the most rows among sheets with at least two
    item-like columns; else the most rows; the first such sheet on a tie."""
    best = max(range(len(sheets)), key=lambda i: (sheets[i]["item_like"] >= 2, sheets[i]["rows"], -i))
    return sheets[best]["name"]


def _pick_sheet(names: list[str], sheet: str | int | None, source: str) -> str:
    listed = ", ".join(f"'{n}'" for n in names)
    if not names:
        raise DataError("the workbook has no sheets", file=source)
    if sheet is None:
        return names[0]
    if isinstance(sheet, int) and not isinstance(sheet, bool):
        if 0 <= sheet < len(names):
            return names[sheet]
        raise DataError(f"there is no sheet number {sheet} (counting from 0); the workbook has "
                        f"{len(names)} sheet(s): {listed}", file=source)
    if sheet in names:
        return sheet
    raise DataError(f"sheet '{sheet}' not found{did_you_mean(str(sheet), names)}; the workbook has "
                    f"sheets {listed}", file=source)


def _sheet_rows(wb, title: str, source: str) -> list[list[Any]]:
    try:
        ws = wb[title]
        ws.reset_dimensions()  # a wrong stored size would silently cut rows off
        return [list(r) for r in ws.iter_rows(min_row=1, min_col=1, values_only=True)]
    except Exception as e:  # a damaged sheet, or a chart sheet
        raise DataError(f"cannot read sheet '{title}' ({_brief(e)}); save the workbook again "
                        "as .xlsx or .csv", file=source) from None


def _has_uncomputed(rows: list[list[Any]], data: bytes) -> bool:
    if not any(c is None for r in rows for c in r):
        return False
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as z:
            for name in z.namelist():
                if name.startswith("xl/worksheets/") and name.endswith(".xml"):
                    if _FORMULA_TAG.search(z.read(name)):
                        return True
    except (zipfile.BadZipFile, OSError, KeyError):
        return False
    return False


def _fill_formulas(rows: list[list[Any]], formulas: list[list[Any]]) -> list[tuple[int, int]]:
    filled = []
    for i, (r, f) in enumerate(zip(rows, formulas, strict=False)):
        for j, c in enumerate(r):
            if c is None and j < len(f) and f[j] is not None:
                v = f[j]
                text = getattr(v, "text", v)
                if isinstance(text, str):
                    r[j] = text if text.startswith("=") else "=" + text
                    filled.append((i + 1, j + 1))
    return filled


# --------------------------------------------------------------------------- sav


# The SPSS reader runs in a child process: readstat, the C library under pyreadstat, can crash
# the whole process on a damaged file (a variable index or string width out of range read
# out of bounds), and an upload is read inside the service's own process. The child also
# caps the time a read can take.
_SAV_CHILD = """
import io, pickle, sys
import pyreadstat
try:
    result = ("ok", pyreadstat.read_sav(io.BytesIO(sys.stdin.buffer.read()), user_missing=True))
except Exception as e:  # the reader's own error types vary by version
    msg = str(e).strip().splitlines()[0] if str(e).strip() else ""
    result = ("error", f"{e.__class__.__name__}: {msg[:120]}" if msg else e.__class__.__name__)
sys.stdout.buffer.write(pickle.dumps(result, protocol=pickle.HIGHEST_PROTOCOL))
"""
SAV_READ_SECONDS = 300.0


def _read_sav_isolated(data: bytes, source: str) -> tuple[pd.DataFrame, Any]:
    advice = "check that it is complete, or save it again from SPSS as .sav or .csv"
    try:
        # -P: the child does not put the working folder on its import path
        proc = subprocess.run([sys.executable, "-P", "-c", _SAV_CHILD], input=data,
                              capture_output=True, timeout=SAV_READ_SECONDS)
    except subprocess.TimeoutExpired:
        raise DataError(f"cannot read the SPSS file (reading it took over "
                        f"{SAV_READ_SECONDS:g} s and was stopped); {advice}", file=source) from None
    status, value = "crashed", None
    if proc.returncode == 0:
        try:
            status, value = pickle.loads(proc.stdout)
        except Exception:  # it died before writing its whole answer
            pass
    if status == "crashed":
        raise DataError(f"cannot read the SPSS file (the reader stopped on damaged contents); "
                        f"{advice}", file=source)
    if status != "ok":
        raise DataError(f"cannot read the SPSS file ({value}); {advice}", file=source)
    return value


def _read_sav(data: bytes, source: str) -> dict:
    df, meta = _read_sav_isolated(data, source)
    columns = [str(c) for c in df.columns]
    if not columns:
        raise DataError("the SPSS file has no variables", file=source)
    if len(df) == 0:
        raise DataError("the SPSS file has variables but no cases", file=source)
    df.columns = columns
    notes: list[dict] = []
    user_missing: dict[str, list] = {}
    applied: list[str] = []
    for col, ranges in (getattr(meta, "missing_ranges", None) or {}).items():
        if col not in df.columns or not ranges:
            continue
        s = df[col]
        mask = np.zeros(len(s), dtype=bool)
        kept = []
        for rg in ranges:
            lo, hi = rg.get("lo"), rg.get("hi")
            try:
                mask |= ((s == lo) if lo == hi else ((s >= lo) & (s <= hi))).to_numpy(bool)
            except TypeError:
                continue
            kept.append({"lo": lo, "hi": hi})
        if kept:
            kept.sort(key=lambda d: (str(type(d["lo"])), d["lo"]))
            user_missing[col] = kept
            if mask.any():
                df[col] = s.where(~mask)
                applied.append(f"{col} ({int(mask.sum())})")
    for col in df.columns:
        if not pd.api.types.is_numeric_dtype(df[col]) and \
                not pd.api.types.is_datetime64_any_dtype(df[col]):
            s = df[col].astype(object)
            df[col] = s.where(~s.map(_blank_cell), np.nan)
    if applied:
        notes.append({"code": "spss_missing_values", "message": (
            "answers marked as missing values in the SPSS file were read as missing: "
            + ", ".join(applied[:10]) + (", ..." if len(applied) > 10 else ""))})
    labels = {str(k): dict(v) for k, v in (meta.variable_value_labels or {}).items()}
    var_labels = {str(k): str(v) for k, v in (getattr(meta, "column_names_to_labels", None) or {}).items()
                  if isinstance(v, str) and v.strip()}
    return dict(frame=df.reset_index(drop=True), row_numbers=np.arange(1, len(df) + 1,
                                                                       dtype=np.int64),
                encoding=getattr(meta, "file_encoding", None), value_labels=labels,
                variable_labels=var_labels, user_missing=user_missing, warnings=notes)


# --------------------------------------------------------------------------- entry point


def load_table(source: str | os.PathLike | bytes, *, name: str | None = None,
               sheet: str | int | None = None, max_bytes: int | None = None,
               max_unpacked_bytes: int | None = None) -> LoadedTable:
    """Read a data file (a path, or the bytes of an upload) into a :class:`LoadedTable`.

    ``name`` is the file name used in messages and for the extension (required in spirit
    for bytes); ``sheet`` picks an .xlsx sheet by name or 0-based position (default: the
    first); ``max_bytes`` refuses larger files; ``max_unpacked_bytes`` refuses a workbook that
    unpacks to more (default 500 MB).
    """
    if max_unpacked_bytes is not None:
        token = UNPACKED_LIMIT.set(max_unpacked_bytes)
        try:
            return load_table(source, name=name, sheet=sheet, max_bytes=max_bytes)
        finally:
            UNPACKED_LIMIT.reset(token)
    if isinstance(source, bytes | bytearray | memoryview):
        data = bytes(source)
        label = name or "upload"
    else:
        path = os.fspath(source)
        label = name or path
        try:
            size = os.path.getsize(path)
            if max_bytes is not None and size > max_bytes:
                raise _too_large(size, max_bytes, label)
            with open(path, "rb") as fh:
                data = fh.read()
        except FileNotFoundError:
            raise DataError("file not found; check the path", file=label,
                            code="file_not_found") from None
        except IsADirectoryError:
            raise DataError("is a folder, not a data file", file=label) from None
        except PermissionError:
            raise DataError("cannot read the file (permission denied)", file=label) from None
    if max_bytes is not None and len(data) > max_bytes:
        raise _too_large(len(data), max_bytes, label)
    if _NOT_SPACE.search(data) is None:
        raise DataError("the file is empty; export the survey data again", file=label)

    packed = data
    # The file's SHA-256 (the report names the data by it) is worked out beside the reading:
    # hashlib lets go of the interpreter lock, and at 129 MB it took 0.3 s.
    with ThreadPoolExecutor(1, thread_name_prefix="samesource-sha256") as pool:
        digest = pool.submit(lambda: hashlib.sha256(packed).hexdigest())
        unpack_notes: list[dict] = []
        if data.startswith(GZIP_MAGIC):
            data, unpack_notes = gunzip(data, label, max_bytes)
        fmt = _detect_unpacked(data, label) if unpack_notes else detect_format(data, label)
        reader = READER[fmt]
        parts = reader.read(data, label, sheet)
        parts["warnings"] = unpack_notes + parts.get("warnings", [])
        sha256 = digest.result()
    return LoadedTable(row_label=reader.row_label, format=fmt, source=label,
                       sha256=sha256, size_bytes=len(packed), **parts)


# --------------------------------------------------------------------------- gzip, Parquet

GZIP_MAGIC = b"\x1f\x8b"
PARQUET_MAGIC = b"PAR1"
# A compressed file may unpack to at most this many times the byte limit (when there is one):
# survey tables of small integers compress about 5 to 10 times, a "zip bomb" a million times.
UNPACKED_LIMIT_FACTOR = 20
_UNPACK_BLOCK = 1 << 24


def gunzip(data: bytes, label: str, max_bytes: int | None = None) -> tuple[bytes, list[dict]]:
    """The unpacked contents of a gzip file (RFC 1952; every member of a multi-member file),
    and a note for the report. Stops with a :class:`DataError` as soon as the contents pass
    ``UNPACKED_LIMIT_FACTOR x max_bytes``, or when the file is damaged or cut short."""
    cap = None if max_bytes is None else max_bytes * UNPACKED_LIMIT_FACTOR
    advice = "check that it is complete, or compress the file again"
    parts: list[bytes] = []
    size = 0
    rest = data
    try:
        while rest:
            d = zlib.decompressobj(wbits=31)  # 31: the gzip wrapper
            buf = rest
            while buf:
                block = d.decompress(buf, _UNPACK_BLOCK)
                size += len(block)
                if cap is not None and size > cap:
                    raise DataError(
                        f"the compressed file unpacks to over {cap / 1e6:.3g} MB ({UNPACKED_LIMIT_FACTOR} "
                        f"times the limit of {max_bytes / 1e6:.3g} MB); remove columns the analysis "
                        "does not use, or split the file", file=label, code="too_large")
                parts.append(block)
                buf = d.unconsumed_tail
            parts.append(d.flush())
            if not d.eof:
                raise DataError(f"the gzip-compressed file is cut short; {advice}", file=label)
            rest = d.unused_data
            if not rest.strip(b"\x00"):  # padding after the last member
                break
    except zlib.error as e:
        raise DataError(f"cannot unpack the gzip-compressed file ({e}); {advice}", file=label) from None
    out = b"".join(parts)
    if not out.strip():
        raise DataError("the compressed file is empty inside; export the survey data again", file=label)
    note = {"code": "unpacked", "message": (
        f"the file was gzip-compressed: {len(data) / 1e6:.3g} MB unpacked to {len(out) / 1e6:.3g} MB")}
    return out, [note]


def _detect_unpacked(data: bytes, label: str) -> str:
    # the name without ".gz" tells the format inside ("survey.csv.gz" -> .csv); messages keep
    # the name the user gave
    inner = label[:-3] if label.lower().endswith(".gz") else label
    try:
        return detect_format(data, inner)
    except InputError as e:
        e.file = label
        if "looks like" in e.message:
            e.message = e.message.replace("this file looks like", "this file unpacks to", 1)
        raise


def read_parquet(data: bytes, source: str) -> dict:
    """A Parquet file (the Apache Parquet columnar format) read with pyarrow, as the parts of a
    :class:`LoadedTable`: numeric columns stay numeric (as from .sav), text columns become
    strings with blanks as missing, dictionary-encoded (categorical) columns their texts.
    Rows are numbered from 1 (the file has no header row). Columns holding lists, structures
    or maps, duplicate or empty column names, and damaged files are refused by name."""
    advice = "check that it is complete, or export it again from where it came"
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:  # pragma: no cover - pyarrow is a dependency
        raise UnsupportedFormat("reading Parquet files needs the pyarrow package; export the "
                                "data as .csv instead", file=source) from None
    try:
        pf = pq.ParquetFile(io.BytesIO(data))
        schema = pf.schema_arrow
    except Exception as e:  # pyarrow's errors for damaged files vary by release
        raise DataError(f"cannot read the Parquet file ({_brief(e)}); {advice}", file=source) from None
    names = [str(n) for n in schema.names]
    if not names:
        raise DataError("the Parquet file has no columns", file=source)
    seen: dict[str, int] = {}
    for j, name in enumerate(names, start=1):
        if not name.strip():
            raise DataError(f"column {j} of the Parquet file has no name; give it one", file=source,
                            column=str(j))
        if name in seen:
            raise DataError(f"the column name '{name}' appears twice in the Parquet file (columns "
                            f"{seen[name]} and {j}); give each column its own name", file=source,
                            column=name)
        seen[name] = j
    for f in schema:
        t = f.type
        if pa.types.is_nested(t):
            raise DataError(f"this column holds {t} values (lists or structures), not one answer per "
                            "respondent; flatten it into one column per item", file=source,
                            column=str(f.name))
    try:
        table = pf.read()
    except Exception as e:
        raise DataError(f"cannot read the Parquet file ({_brief(e)}); {advice}", file=source) from None
    if table.num_rows == 0:
        raise DataError("the Parquet file has columns but no rows", file=source)
    columns = {}
    for name, col in zip(names, table.columns, strict=True):
        t = col.type
        if pa.types.is_dictionary(t):
            col, t = col.cast(t.value_type), t.value_type
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
            s = col.to_pandas()
            columns[name] = s.astype(float) if pa.types.is_decimal(t) else s
        elif pa.types.is_timestamp(t) or pa.types.is_date(t):
            columns[name] = col.to_pandas()
        else:  # text (and anything else) as Python objects, blanks missing
            s = pd.Series(col.to_pylist(), dtype=object)
            columns[name] = s.where(~s.map(_blank_cell), np.nan)
    frame = pd.DataFrame({n: pd.Series(v).reset_index(drop=True) for n, v in columns.items()})
    frame.columns = pd.Index(names, dtype=object)
    return dict(frame=frame, row_numbers=np.arange(1, len(frame) + 1, dtype=np.int64))


def text_answers(table: LoadedTable, columns: Sequence[str] | None = None, *,
                 limit: int = 50) -> dict[str, dict]:
    """Columns (item-like by name, or the ``columns`` given) whose cells hold answer texts:
    text that is not a number, not blank and not a word for "no answer" (NA, n/a, ...).

    Returns ``{column: {"row": first row, "text": its text, "texts": distinct texts (up to
    ``limit``, in order of appearance), "rows": the first row of each, "more": whether there
    were more}}``.
    """
    out: dict[str, dict] = {}
    names = [str(c) for c in table.frame.columns]
    wanted = list(columns) if columns is not None else [c for c in names if item_stem(c) is not None]
    for col in wanted:
        if col not in table.frame.columns:
            continue
        s = table.frame[col]
        if pd.api.types.is_numeric_dtype(s.dtype) or pd.api.types.is_datetime64_any_dtype(s.dtype):
            continue
        first = None
        texts: dict[str, int] = {}
        more = False
        for i, v in enumerate(s.to_numpy(dtype=object)):
            if not isinstance(v, str):
                continue
            t = v.strip()
            if not t or t.lower() in MISSING_WORDS or _NUMBER_TEXT.fullmatch(t) or t.startswith("="):
                continue
            if first is None:
                first = (int(table.row_numbers[i]), t)
            if t not in texts:
                if len(texts) >= limit:
                    more = True
                    continue
                texts[t] = int(table.row_numbers[i])
        if first is not None:
            out[col] = {"row": first[0], "text": first[1], "texts": list(texts),
                        "rows": list(texts.values()), "more": more}
    return out


def _too_large(size: int, limit: int, label: str) -> DataError:
    return DataError(f"the file is {size / 1e6:.1f} MB, over the limit of {limit / 1e6:.1f} MB; "
                     "remove columns the analysis does not use, or split the file",
                     file=label, code="too_large")


# --------------------------------------------------------------------------- the formats we read

ZIP_MAGIC = (b"PK\x03\x04", b"PK\x05\x06")
SAV_MAGIC = (b"$FL2", b"$FL3")  # SPSS system files; $FL3: with zlib-compressed data


def _text_reader(fmt: str) -> formats.ReadFunction:
    def read(data: bytes, label: str, sheet: str | int | None) -> dict:
        return _read_text(data, label, fmt)

    return read


def _is_xlsx(head: bytes, ext: str, filename: str | None) -> bool:
    # a ZIP archive that is not a workbook raises UnsupportedFormat saying what it is
    return head.startswith(ZIP_MAGIC) and _zip_kind(head, ext, filename) == "xlsx"


# One object per format, in the order content sniffing tries them (and the API lists them).
# Adding a format: DEVELOPERS.md "Adding a file format".
READERS: tuple[FileFormat, ...] = (
    FileFormat("csv", (".csv",), ("text/csv",), _text_reader("csv"), kind="delimited text"),
    FileFormat("tsv", (".tsv",), ("text/tab-separated-values",), _text_reader("tsv"),
               kind="delimited text"),
    FileFormat("txt", (".txt",), ("text/plain",), _text_reader("txt"), kind="delimited text"),
    FileFormat("xlsx", (".xlsx",), ("application/vnd.openxmlformats-officedocument.spreadsheetml.sheet",),
               lambda data, label, sheet: _read_xlsx(data, label, sheet), sniff=_is_xlsx),
    FileFormat("sav", (".sav",), ("application/x-spss-sav",),
               lambda data, label, sheet: _read_sav(data, label),
               sniff=lambda head, ext, filename: head[:4] in SAV_MAGIC, row_label="case"),
    FileFormat("parquet", (".parquet",), ("application/vnd.apache.parquet",),
               lambda data, label, sheet: read_parquet(data, label),
               sniff=lambda head, ext, filename: head.startswith(PARQUET_MAGIC)),
)
READER = {f.name: f for f in READERS}
FORMATS = formats.names(READERS)
READABLE = formats.readable(READERS)
TEXT_EXTENSIONS = formats.text_suffixes(READERS)
