"""What a request handler reaches: the configuration, the store and the job runner."""

from __future__ import annotations

from dataclasses import dataclass, field

from flask import current_app

from .config import ServiceConfig
from .runner import JobRunner
from .store import Store
from .upload_gate import ParseSlots, SameBytes

EXTENSION = "samesource"
# The WSGI environ key in which the server (service/server.py) puts the seconds a request,
# fully received, waited for a request thread; the app answers 503 past the setting.
QUEUED_SECONDS = "samesource.queued_seconds"


@dataclass
class Services:
    config: ServiceConfig
    store: Store
    runner: JobRunner | None = None
    lock_fd: int | None = None  # the data folder's lock, held while the service runs
    same_bytes: SameBytes = field(default_factory=SameBytes)  # one upload of the same bytes at a time
    parse_slots: ParseSlots = field(init=False)  # the bound on parsing children at once

    def __post_init__(self) -> None:
        self.parse_slots = ParseSlots(self.config.max_parsers, self.config.max_queue_seconds)

    def close(self) -> None:
        """Stop the job runner (running analyses go back to the queue), the database, and
        give the data folder back."""
        if self.runner is not None:
            self.runner.stop()
        self.store.db.dispose()
        if self.lock_fd is not None:
            from .uploads import unlock_data_dir

            unlock_data_dir(self.lock_fd)
            self.lock_fd = None


def services() -> Services:
    return current_app.extensions[EXTENSION]
