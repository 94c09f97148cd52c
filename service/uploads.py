"""Uploaded files on disk: written whole and synced before the database row exists.

Layout: DATA_DIR/uploads/<tenant id>/<dataset id> holds the original bytes, unchanged; the
database keeps the name, the SHA-256 and the summary. A file is first written under a
temporary name, synced, then renamed into place, so a crash never leaves half a file under
a dataset's name; :func:`sweep` (run when the service starts) removes what a crash left.
"""

from __future__ import annotations

import hashlib
import logging
import os
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, BinaryIO

if TYPE_CHECKING:
    from .upload_summary import UploadSummary

log = logging.getLogger("samesource.service")

CHUNK = 1 << 20
SPOOL_PREFIX = ".incoming-"


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
    # the pid in the name lets the start-up sweep remove a dead process's spool files at once
    fd, name = tempfile.mkstemp(prefix=f"{SPOOL_PREFIX}{os.getpid()}-", dir=folder)
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
        spool_file = path.name.startswith(SPOOL_PREFIX)
        owned = rel in known and not spool_file
        try:
            if owned or (now - path.stat().st_mtime < older_than
                         and not (spool_file and _spooler_dead(path.name))):
                continue
            path.unlink()
        except OSError:  # gone meanwhile, or not ours to remove: the next sweep tries again
            continue
        removed.append(rel)
    return removed


# A few megabytes kept in reserve in the data folder: on a full disk, deleting a dataset
# needs the database to write (SQLite's log), and the reserve is given up to let it.
RESERVE_NAME = ".space-reserve"
RESERVE_BYTES = 4 << 20


def ensure_reserve(data_dir: Path, size: int = RESERVE_BYTES) -> bool:
    """Write the reserve file when it is missing and the disk has room; True if it exists."""
    path = data_dir / RESERVE_NAME
    if path.is_file() and path.stat().st_size >= size:
        return True
    try:
        with open(path, "wb") as fh:
            fh.write(b"\0" * size)
            fh.flush()
            os.fsync(fh.fileno())
        return True
    except OSError:
        path.unlink(missing_ok=True)
        return False


def release_reserve(data_dir: Path) -> bool:
    """Give the reserve up (the disk is full); True if there was one."""
    path = data_dir / RESERVE_NAME
    existed = path.is_file()
    path.unlink(missing_ok=True)
    return existed


def _spooler_dead(name: str) -> bool:
    """True when a spool file's name carries the pid of a process that has ended."""
    try:
        pid = int(name[len(SPOOL_PREFIX):].split("-", 1)[0])
    except ValueError:
        return False
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    return False


LOCK_NAME = ".lock"


class DataDirLocked(Exception):
    """Another running service holds the data folder."""


def lock_data_dir(data_dir: Path) -> int:
    """Take the data folder for this process (an exclusive lock the kernel drops when the
    process ends, even by SIGKILL): two services on one folder would sweep each other's
    uploads. Returns the lock's file descriptor; :func:`unlock_data_dir` gives it back."""
    import fcntl

    fd = os.open(data_dir / LOCK_NAME, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        holder = os.read(fd, 64).decode("ascii", "replace").strip() or "another process"
        os.close(fd)
        raise DataDirLocked(f"the data folder {data_dir} is in use by another samesource "
                            f"service (pid {holder}); stop it, or give this one its own "
                            "--data folder") from None
    os.ftruncate(fd, 0)
    os.write(fd, str(os.getpid()).encode())
    return fd


def unlock_data_dir(fd: int) -> None:
    try:
        os.close(fd)
    except OSError:
        pass


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


# ---------------------------------------------------------------------- bounded parsing
#
# An upload is parsed in a child process, never in the web process: a file that needs
# gigabytes to read (a decompression bomb, a huge text cell) would otherwise grow the
# service and keep the memory. The child runs under an address-space limit and a time
# limit, checks the table's size against the limits below and sends back only the summary
# the dataset row needs. Every limit is a setting (docs/http-api.md, "Limits").


@dataclass(frozen=True)
class ParseLimits:
    memory_mb: float = 2048.0
    seconds: float = 60.0
    max_rows: int = 1_000_000
    max_columns: int = 2_000
    max_cells: int = 20_000_000
    max_cell_chars: int = 32_767
    max_column_name_chars: int = 256
    max_unpacked_mb: float = 500.0
    max_bytes: int | None = None

    @classmethod
    def from_config(cls, cfg) -> ParseLimits:
        return cls(memory_mb=cfg.parse_memory_mb, seconds=cfg.parse_seconds,
                   max_rows=cfg.max_rows, max_columns=cfg.max_columns, max_cells=cfg.max_cells,
                   max_cell_chars=cfg.max_cell_chars,
                   max_column_name_chars=cfg.max_column_name_chars,
                   max_unpacked_mb=cfg.max_unpacked_mb, max_bytes=cfg.max_upload_bytes)


class OverLimit(Exception):
    """The file is over one of the parsing limits: ``status`` 413 (size, memory) or 422."""

    def __init__(self, status: int, field: str, value: float, message: str) -> None:
        super().__init__(message)
        self.status = status
        self.field = field  # the ServiceConfig field of the limit
        self.value = value
        self.message = message


def _vm_bytes() -> int:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmSize:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def _is_string_dtype(dtype) -> bool:
    from pandas.api.types import is_string_dtype  # pandas loads only in the parsing child

    return is_string_dtype(dtype)


def check_table_limits(frame, limits: ParseLimits) -> None:
    """Rows, columns, cells, column-name length and cell length against the limits."""
    rows, cols = frame.shape
    if cols > limits.max_columns:
        raise OverLimit(422, "max_columns", limits.max_columns,
                        f"the file has {cols} columns, over the limit of {limits.max_columns}")
    if rows > limits.max_rows:
        raise OverLimit(422, "max_rows", limits.max_rows,
                        f"the file has {rows} rows, over the limit of {limits.max_rows}")
    if rows * cols > limits.max_cells:
        raise OverLimit(422, "max_cells", limits.max_cells,
                        f"the file has {rows * cols} cells ({rows} rows x {cols} columns), over "
                        f"the limit of {limits.max_cells}")
    for i, name in enumerate(frame.columns):
        if len(str(name)) > limits.max_column_name_chars:
            raise OverLimit(422, "max_column_name_chars", limits.max_column_name_chars,
                            f"the name of column {i + 1} is {len(str(name))} characters long, "
                            f"over the limit of {limits.max_column_name_chars}; shorten it")
    for name in frame.columns:
        col = frame[name]
        # text columns are object or pandas' string dtype (the column-wise reader's text columns)
        if col.dtype != object and not _is_string_dtype(col.dtype):
            continue
        lengths = col.map(lambda v: len(v) if isinstance(v, str) else 0)
        if len(lengths) and int(lengths.max()) > limits.max_cell_chars:
            row = int(lengths.to_numpy().argmax())
            raise OverLimit(422, "max_cell_chars", limits.max_cell_chars,
                            f"a cell of column '{str(name)[:60]}' (data row {row + 1}) holds "
                            f"{int(lengths.max())} characters, over the limit of "
                            f"{limits.max_cell_chars}")


def ran_out_of_memory(e: BaseException) -> bool:
    """Whether ``e`` was raised while handling a MemoryError: the workbook reader reports any
    failure inside openpyxl as a workbook it cannot open (``raise ... from None`` still keeps
    the MemoryError as the context), which under the child's memory cap is the cap (and for
    the command line, the machine's memory or the process's limit)."""
    seen: set[int] = set()
    while e is not None and id(e) not in seen:
        if isinstance(e, MemoryError):
            return True
        seen.add(id(e))
        e = e.__cause__ or e.__context__
    return False


def _parse_child(conn, path: str, name: str, limits: ParseLimits) -> None:
    """In the child: limit memory, parse, check, send ("ok", UploadSummary) or the refusal."""
    import resource

    from samesource.errors import InputError
    from samesource.input.loading import load_table

    from .errors import from_input_error
    from .upload_summary import summarize

    try:
        _soft, hard = resource.getrlimit(resource.RLIMIT_AS)
        cap = _vm_bytes() + int(limits.memory_mb * 1024 * 1024)
        resource.setrlimit(resource.RLIMIT_AS, (cap if hard == resource.RLIM_INFINITY
                                                else min(cap, hard), hard))
        table = load_table(path, name=name, max_bytes=limits.max_bytes,
                           max_unpacked_bytes=int(limits.max_unpacked_mb * 1024 * 1024))
        check_table_limits(table.frame, limits)
        out = ("ok", summarize(table))
    except MemoryError:
        out = ("memory", None)
    except OverLimit as e:
        out = ("limit", (e.status, e.field, e.value, e.message))
    except InputError as e:
        if ran_out_of_memory(e):  # a reader's "cannot open" over the cap is the cap
            out = ("memory", None)
        else:
            api = from_input_error(e)
            out = ("input", (api.status, api.code, api.message, api.field, api.extra))
    except Exception as e:
        from .errors import safe_trace

        out = ("error", safe_trace(e))
    conn.send(out)
    conn.close()


_PRELOAD = ["samesource.input.loading", "samesource.input.prepare", "samesource.service.uploads", "samesource.service.upload_summary"]


def _parse_context():
    """Where parsing children start: our one way of starting processes
    (``executor.pool_context``: the forkserver, never "fork", without the serving script's
    main module), with the readers preloaded in the forkserver."""
    from samesource.executor import pool_context

    ctx = pool_context()
    if ctx.get_start_method() == "forkserver":
        ctx.set_forkserver_preload(_PRELOAD)  # no effect once the server runs; then only slower
    return ctx


def start_parsing_server() -> threading.Thread | None:
    """Start the forkserver that parsing children are forked from now, in the background,
    rather than at the first upload (which waited for it: seconds, importing the readers).
    An upload that comes sooner waits for the start under way, as before; nothing else does.
    The job processes fork from the same server (one per process), readers preloaded too."""
    if _parse_context().get_start_method() != "forkserver":
        return None

    def start() -> None:
        from multiprocessing import forkserver

        try:
            forkserver.ensure_running()
        except Exception as e:  # the first upload tries again and reports what is wrong
            log.warning("starting the parsing forkserver failed: %s", e.__class__.__name__)

    thread = threading.Thread(target=start, name="samesource-parse-server", daemon=True)
    thread.start()
    return thread


def parse_bounded(path: Path, name: str, limits: ParseLimits) -> UploadSummary:
    """Parse the upload at ``path`` in a child process under ``limits``. Raises
    :class:`OverLimit`, or an ApiError for a file that cannot be read (its 4xx)."""
    from .errors import ApiError

    with open(path, "rb") as fh:
        head = fh.read(4)
    if head == b"PK\x03\x04":  # a zip: an .xlsx is checked before parsing
        from samesource.errors import DataError
        from samesource.input.workbook_limits import check_workbook

        try:
            check_workbook(path, name,
                           max_unpacked_bytes=int(limits.max_unpacked_mb * 1024 * 1024))
        except DataError as e:
            if e.code != "too_large":
                raise
            raise OverLimit(413, "max_unpacked_mb", limits.max_unpacked_mb, str(e)) from None
    ctx = _parse_context()
    receive, send = ctx.Pipe(duplex=False)
    proc = ctx.Process(target=_parse_child, args=(send, str(path), name, limits), daemon=True,
                       name="samesource-parse")
    proc.start()
    send.close()
    try:
        if not receive.poll(limits.seconds):
            raise OverLimit(422, "parse_seconds", limits.seconds,
                            f"reading the file took over {limits.seconds:g} s and was stopped")
        try:
            status, value = receive.recv()
        except EOFError:  # the child died: over its memory (killed), or crashed in C code
            status, value = "memory", None
    finally:
        receive.close()
        if proc.is_alive():
            proc.kill()
        proc.join(5)
    if status == "ok":
        return value
    if status == "memory":
        raise OverLimit(413, "parse_memory_mb", limits.memory_mb,
                        f"reading the file needs more than {limits.memory_mb:g} MB of memory")
    if status == "limit":
        raise OverLimit(*value)
    if status == "input":
        st, code, message, field, extra = value
        raise ApiError(st, code, message, field, extra)
    raise RuntimeError(f"parsing the upload failed in its child process: {value}")
