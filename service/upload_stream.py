"""The upload's file field streamed out of the multipart body, block by block, to disk.

Flask's ``request.files`` parses the whole body first (large parts into a temporary file of its
own) before the route runs; here the body is parsed as it is read, and the bytes of the field
``file`` go straight to :func:`samesource.service.uploads.spool` (hashed and size-checked on the way), so
neither the body nor the file is ever held in memory: at most a block or two (``BLOCK``) are.
waitress, in front, keeps a request body over its ``inbuf_overflow`` (512 kB) in a temporary
file, not in memory, until the route reads it.
"""

from __future__ import annotations

from typing import BinaryIO

from werkzeug.sansio.multipart import Data, Epilogue, Field, File, MultipartDecoder, NeedData

MAX_PARTS = 100  # form fields beside the file: a few are normal, thousands an attack
BLOCK = 256 * 1024  # bytes of body read at a time
# The parser's buffer (a block and what is left of the previous one) and any other field's
# value (ignored, but held while parsed) stay under this.
MAX_FIELD_BYTES = 4 * BLOCK


class MultipartError(Exception):
    """The multipart body is malformed or cut short."""


class MultipartFileStream:
    """A read-only stream of one file field's bytes from a multipart/form-data body.

    ``read()`` returns the next block of the field's contents and ``b""`` once the field ends
    (the rest of the body is not read). After that, ``found`` says whether the body had the
    field and ``filename`` is the name the client gave. Raises :class:`MultipartError`.
    """

    def __init__(self, body: BinaryIO, boundary: str | bytes, field: str = "file") -> None:
        if isinstance(boundary, str):
            boundary = boundary.encode("latin-1")
        self._body = body
        self._decoder = MultipartDecoder(boundary, max_form_memory_size=MAX_FIELD_BYTES,
                                         max_parts=MAX_PARTS)
        self._field = field
        self._pending: list[bytes] = []
        self._in_file = False
        self._done = False
        self.found = False
        self.filename: str | None = None

    def read(self, size: int = -1) -> bytes:
        while not self._pending and not self._done:
            self._advance()
        return self._pending.pop(0) if self._pending else b""

    def _advance(self) -> None:
        block = self._body.read(BLOCK)
        try:
            self._decoder.receive_data(block or None)
            event = self._decoder.next_event()
            while not isinstance(event, Epilogue | NeedData):
                if isinstance(event, File) and event.name == self._field and not self.found:
                    self.found, self._in_file, self.filename = True, True, event.filename
                elif isinstance(event, Field | File):
                    self._in_file = False
                elif isinstance(event, Data) and self._in_file:
                    if event.data:
                        self._pending.append(event.data)
                    if not event.more_data:  # the file field is complete
                        self._in_file, self._done = False, True
                        return
                event = self._decoder.next_event()
        except ValueError as e:  # werkzeug's word for a malformed or cut-short body
            raise MultipartError(f"the multipart body cannot be read ({e})") from None
        except Exception as e:  # its size guards (RequestEntityTooLarge) and the like
            raise MultipartError(f"the multipart body cannot be read ({e.__class__.__name__})") from None
        if isinstance(event, Epilogue):
            self._done = True
        elif not block:
            raise MultipartError("the multipart body ends before its closing boundary")


__all__ = ["MultipartFileStream", "MultipartError", "MAX_PARTS"]
