"""Storage faults the service survives: which errors are passing, which mean a full disk, and
retrying with backoff.

A database server that restarts, a connection cut, SQLite busy past its timeout or a disk
that filled up are conditions of the machine, not of a request: the job runner retries them
(with a growing pause, so a database coming back is not hammered) and HTTP answers 503 or
507 for them instead of a 500. Anything else is a bug and is not retried.
"""

from __future__ import annotations

import errno
import logging
import threading
import time
from collections.abc import Callable
from typing import TypeVar

from .errors import safe_trace

log = logging.getLogger("samesource.faults")

T = TypeVar("T")

_DISK_FULL_ERRNOS = {errno.ENOSPC, errno.EDQUOT}
_SQLITE_FULL = 13  # SQLITE_FULL: "database or disk is full"
_PG_DISK_FULL = "53100"  # SQLSTATE disk_full
_PG_RESOURCES = "53"  # SQLSTATE class 53: insufficient resources (disk, memory, connections)


def _chain(exc: BaseException):
    """The exception and its causes (SQLAlchemy wraps the driver's error in ``orig``)."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        yield exc
        orig = getattr(exc, "orig", None)
        exc = orig if isinstance(orig, BaseException) else (exc.__cause__ or exc.__context__)


def is_disk_full(exc: BaseException) -> bool:
    """True when ``exc`` says the disk (or the database server's disk) is full."""
    for e in _chain(exc):
        if isinstance(e, OSError) and e.errno in _DISK_FULL_ERRNOS:
            return True
        if getattr(e, "sqlite_errorcode", None) == _SQLITE_FULL:
            return True
        if getattr(e, "sqlstate", None) == _PG_DISK_FULL:
            return True
        if type(e).__name__ == "OperationalError" and "disk is full" in str(e):
            return True
    return False


def is_transient(exc: BaseException) -> bool:
    """True for storage errors that pass by themselves: the database unreachable or
    restarting, a dropped connection, a lock held past the timeout, a full disk."""
    from sqlalchemy import exc as sa

    if is_disk_full(exc):
        return True
    if isinstance(exc, sa.DBAPIError) and exc.connection_invalidated:
        return True
    if isinstance(exc, sa.OperationalError | sa.InterfaceError | sa.TimeoutError):
        return True
    if isinstance(exc, sa.DBAPIError) and str(getattr(exc.orig, "sqlstate", "") or ""
                                                 ).startswith(_PG_RESOURCES):
        return True
    return isinstance(exc, ConnectionError | TimeoutError)


BACKOFF_FIRST = 0.25  # seconds before the first retry; doubles each time
BACKOFF_MAX = 5.0


def backoff(attempt: int) -> float:
    """The pause before retry ``attempt`` (1, 2, ...): 0.25 s doubling to at most 5 s."""
    return min(BACKOFF_MAX, BACKOFF_FIRST * 2 ** max(0, attempt - 1))


def retrying(fn: Callable[[], T], *, what: str, within: float,
             stop: threading.Event | None = None,
             on_failure: Callable[[BaseException], None] | None = None,
             on_success: Callable[[], None] | None = None) -> T:
    """``fn()``, retried with backoff while it raises transient storage errors, for at most
    ``within`` seconds (or until ``stop`` is set); the last error is raised after that.
    Errors that are not transient are raised at once. ``on_failure`` sees each failure and
    ``on_success`` the success (the runner's record of whether storage is reachable)."""
    deadline = time.monotonic() + within
    attempt = 0
    while True:
        try:
            out = fn()
        except Exception as e:
            if not is_transient(e):
                raise
            if on_failure is not None:
                on_failure(e)
            attempt += 1
            pause = backoff(attempt)
            if time.monotonic() + pause > deadline or (stop is not None and stop.is_set()):
                raise
            if attempt == 1 or attempt % 10 == 0:
                log.warning("%s failed (%s); retrying for up to %.0f s", what,
                            "disk full" if is_disk_full(e) else safe_trace(e), within)
            if stop is not None:
                if stop.wait(pause):
                    raise
            else:
                time.sleep(pause)
            continue
        if on_success is not None:
            on_success()
        return out
