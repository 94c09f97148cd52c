"""?limit=&offset= for the list routes."""

from __future__ import annotations

from flask import request

from ..errors import ApiError, echo

DEFAULT_LIMIT = 100
MAX_LIMIT = 1000


def _int_arg(name: str, default: int, lo: int, hi: int) -> int:
    raw = request.args.get(name)
    if raw is None:
        return default
    try:
        value = int(raw)
    except ValueError:
        value = None
    if value is None or not lo <= value <= hi:
        raise ApiError(400, "bad_query", f"must be a whole number from {lo} to {hi}, got {echo(raw)}",
                       name)
    return value


def page_args() -> tuple[int, int]:
    return (_int_arg("limit", DEFAULT_LIMIT, 1, MAX_LIMIT),
            _int_arg("offset", 0, 0, 10**9))
