"""Uploaded files on disk: written whole and synced before the database row exists.

Layout: DATA_DIR/uploads/<tenant id>/<dataset id> holds the original bytes, unchanged; the
database keeps the name, the SHA-256 and the summary. A file is first written under a
temporary name, synced, then renamed into place, so a crash never leaves half a file under
a dataset's name; :func:`sweep` (run when the service starts) removes what a crash left.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

CHUNK = 1 << 20


class TooLarge(Exception):
    def __init__(self, limit: int) -> None:
        super().__init__(f"over {limit} bytes")
        self.limit = limit


@dataclass
class Spooled:
    """An upload written to a temporary file in the uploads folder."""

    path: Path
    size: int
    sha256: str

    def read_bytes(self) -> bytes:
        return self.path.read_bytes()

    def discard(self) -> None:
        try:
            self.path.unlink()
        except FileNotFoundError:
            pass


def spool(stream: BinaryIO, folder: Path, *, max_bytes: int) -> Spooled:
    """Copy ``stream`` into a temporary file under ``folder``, hashing it and stopping with
    :class:`TooLarge` as soon as it passes ``max_bytes``."""
    folder.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=".incoming-", dir=folder)
    digest = hashlib.sha256()
    size = 0
    try:
        with os.fdopen(fd, "wb") as out:
            while True:
                block = stream.read(CHUNK)
                if not block:
                    break
                size += len(block)
                if size > max_bytes:
                    raise TooLarge(max_bytes)
                digest.update(block)
                out.write(block)
            out.flush()
            os.fsync(out.fileno())
    except BaseException:
        Path(name).unlink(missing_ok=True)
        raise
    return Spooled(Path(name), size, digest.hexdigest())


def stored_relpath(tenant_id: str, dataset_id: str) -> str:
    return f"uploads/{tenant_id}/{dataset_id}"


def keep(spooled: Spooled, data_dir: Path, relpath: str) -> Path:
    """Move the spooled file to its final place and sync the folder (the rename survives
    a crash)."""
    final = data_dir / relpath
    final.parent.mkdir(parents=True, exist_ok=True)
    os.replace(spooled.path, final)
    _fsync_dir(final.parent)
    return final


def remove(data_dir: Path, relpath: str) -> None:
    (data_dir / relpath).unlink(missing_ok=True)


SWEEP_AGE_SECONDS = 3600.0  # far longer than any upload takes to reach its database row


def sweep(data_dir: Path, known: set[str], *, older_than: float = SWEEP_AGE_SECONDS,
          now: float | None = None) -> list[str]:
    """Remove upload files that no dataset owns: spool files of uploads that never finished
    and stored files whose database row is gone (a crash between the steps, or a failed
    delete). Only files older than ``older_than`` seconds go, so an upload in progress in
    another process is never touched. Returns the removed paths, relative to ``data_dir``."""
    root = data_dir / "uploads"
    if not root.is_dir():
        return []
    now = time.time() if now is None else now
    removed = []
    for path in sorted(root.rglob("*")):
        if not path.is_file() or path.is_symlink():
            continue
        rel = path.relative_to(data_dir).as_posix()
        owned = rel in known and not path.name.startswith(".incoming-")
        try:
            if owned or now - path.stat().st_mtime < older_than:
                continue
            path.unlink()
        except OSError:  # gone meanwhile, or not ours to remove: the next sweep tries again
            continue
        removed.append(rel)
    return removed


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
