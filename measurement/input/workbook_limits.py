"""Refusing an .xlsx workbook from its sizes before anything parses it.

An .xlsx is a zip archive of XML parts. A small file can unpack to gigabytes (a
"decompression bomb": one repeated cell compresses a thousandfold), and the workbook reader
would then build all of it in memory. :func:`check_workbook` reads only the archive's
directory and then decompresses each part as a stream, counting bytes and keeping none: the
declared sizes are checked first (cheap), the real ones next (a damaged or hostile archive can
declare less than it holds). Either over the limit refuses the file.
"""

from __future__ import annotations

import contextvars
import io
import os
import zipfile

from samesource.errors import DataError

DEFAULT_MAX_UNPACKED_BYTES = 500 * 1024 * 1024
# The limit the workbook reader checks against: load_table(max_unpacked_bytes=...) sets it for
# its own call (the readers of the format registry take only the bytes, label and sheet).
UNPACKED_LIMIT: contextvars.ContextVar[int] = contextvars.ContextVar("unpacked_limit",
                                                                      default=DEFAULT_MAX_UNPACKED_BYTES)
MAX_PARTS = 10_000  # a workbook has tens of parts; tens of thousands is no spreadsheet
_CHUNK = 1 << 20


def _refuse(what: str, limit: int, source: str) -> DataError:
    return DataError(f"the workbook {what}, over the limit of {limit / 2**20:g} MB unpacked; "
                     "a survey export is far smaller. Save the data as .csv, or remove what "
                     "the analysis does not use", file=source, code="too_large")


def check_workbook(data: bytes | str | os.PathLike, source: str, *,
                   max_unpacked_bytes: int | None = None) -> int:
    """Raise a DataError (code too_large) when the workbook's parts, decompressed, would
    exceed ``max_unpacked_bytes`` (default: :data:`UNPACKED_LIMIT`'s value); returns the unpacked
    size. An archive that cannot be read is left for the workbook reader to describe. ``data``:
    the bytes, or a path."""
    if max_unpacked_bytes is None:
        max_unpacked_bytes = UNPACKED_LIMIT.get()
    try:
        z = zipfile.ZipFile(io.BytesIO(data) if isinstance(data, bytes | bytearray) else data)
    except (zipfile.BadZipFile, OSError, ValueError):
        return 0
    with z:
        infos = z.infolist()
        if len(infos) > MAX_PARTS:
            raise DataError(f"the workbook holds {len(infos)} parts (over {MAX_PARTS}); it is "
                            "not a spreadsheet a survey tool writes", file=source,
                            code="too_large")
        declared = sum(i.file_size for i in infos)
        if declared > max_unpacked_bytes:
            raise _refuse(f"declares {declared / 2**20:.0f} MB of contents", max_unpacked_bytes,
                          source)
        total = 0
        for info in infos:
            try:
                with z.open(info) as part:
                    while block := part.read(_CHUNK):
                        total += len(block)
                        if total > max_unpacked_bytes:
                            raise _refuse("unpacks to more than it declares and more than "
                                          "the limit", max_unpacked_bytes, source)
            except DataError:
                raise
            except Exception:  # a damaged part: the workbook reader names it
                continue
    return total
