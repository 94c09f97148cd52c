"""What an upload waits for in the web process before it is parsed and stored.

* :class:`SameBytes`: one upload of the same bytes (a tenant's SHA-256) at a time, so that
  identical uploads sent at the same moment are parsed and stored once: the others wait, then
  find the first's dataset (the store checks again inside its write, for other processes).
* :class:`ParseSlots`: at most ``SAMESOURCE_MAX_PARSERS`` parsing children at once. Each may
  take up to ``SAMESOURCE_PARSE_MEMORY_MB``, and every request thread could start one: without
  a bound, eight threads could ask for eight times that.
"""

from __future__ import annotations

import contextlib
import threading
import time
from collections.abc import Iterator


class SameBytes:
    """A lock per key (tenant, SHA-256), forgotten once nobody holds or waits for it."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._held: dict[tuple[str, str], tuple[threading.Lock, int]] = {}

    @contextlib.contextmanager
    def holding(self, tenant_id: str, sha256: str) -> Iterator[None]:
        """Hold the key's lock while the block runs (waiting while another upload holds it)."""
        key = (tenant_id, sha256)
        with self._lock:
            lock, users = self._held.get(key, (threading.Lock(), 0))
            self._held[key] = (lock, users + 1)
        try:
            with lock:
                yield
        finally:
            with self._lock:
                lock, users = self._held[key]
                if users == 1:
                    del self._held[key]
                else:
                    self._held[key] = (lock, users - 1)


class Busy(Exception):
    """Every parsing slot stayed taken for as long as a request may wait."""

    def __init__(self, waited: float) -> None:
        super().__init__(f"waited {waited:.1f} s for a parsing slot")
        self.waited = waited


class ParseSlots:
    """At most ``size`` parsing children at once; a request waits up to ``wait_seconds`` for
    a slot, then :class:`Busy` (the API answers 503 ``overloaded``, as for a request that
    waited too long for a request thread)."""

    def __init__(self, size: int, wait_seconds: float) -> None:
        self.size = int(size)
        self.wait_seconds = float(wait_seconds)
        self._slots = threading.BoundedSemaphore(self.size)

    @contextlib.contextmanager
    def taken(self) -> Iterator[None]:
        start = time.monotonic()
        if not self._slots.acquire(timeout=self.wait_seconds):
            raise Busy(time.monotonic() - start)
        try:
            yield
        finally:
            self._slots.release()
