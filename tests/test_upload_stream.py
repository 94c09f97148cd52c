"""The upload's file field streamed to disk (service/upload_stream.py), never held in memory.

Reference for the multipart encoding: werkzeug's own encoder (werkzeug.test.encode_multipart),
the one Flask's test client uses."""

from __future__ import annotations

import hashlib
import io
import os
import tracemalloc

import pytest
from werkzeug.datastructures import FileStorage
from werkzeug.test import encode_multipart

from samesource.service import uploads
from samesource.service.upload_stream import MultipartError, MultipartFileStream


def _body(content: bytes, name: str = "big.csv.gz") -> tuple[str, bytes]:
    return encode_multipart({"before": "x" * 100,
                             "file": FileStorage(io.BytesIO(content), filename=name),
                             "after": "y"})


def test_a_big_file_field_goes_to_disk_in_blocks(tmp_path):
    content = os.urandom(16 * 2**20)  # 16 MB
    boundary, body = _body(content)
    stream = io.BytesIO(body)
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        base = tracemalloc.get_traced_memory()[0]
        parts = MultipartFileStream(stream, boundary)
        spooled = uploads.spool(parts, tmp_path, max_bytes=32 * 2**20)
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    assert parts.found and parts.filename == "big.csv.gz"
    assert spooled.size == len(content) and spooled.sha256 == hashlib.sha256(content).hexdigest()
    assert spooled.path.read_bytes() == content
    assert peak < 4 * 2**20, f"{peak / 2**20:.1f} MB held while streaming a 16 MB file"


def test_the_limit_stops_the_stream(tmp_path):
    boundary, body = _body(b"a,b\n" * 100_000)
    with pytest.raises(uploads.TooLarge):
        uploads.spool(MultipartFileStream(io.BytesIO(body), boundary), tmp_path, max_bytes=100_000)
    assert not list(tmp_path.iterdir())


def test_no_file_field_and_broken_bodies(tmp_path):
    boundary, body = encode_multipart({"other": "x"})
    parts = MultipartFileStream(io.BytesIO(body), boundary)
    assert parts.read() == b"" and not parts.found
    boundary, body = _body(b"a,b\n1,2\n" * 1000)
    with pytest.raises(MultipartError, match="cannot be read|ends before"):
        uploads.spool(MultipartFileStream(io.BytesIO(body[:2000]), boundary), tmp_path, max_bytes=10**6)
    assert not list(tmp_path.iterdir())
