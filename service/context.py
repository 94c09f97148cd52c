"""What a request handler reaches: the configuration, the store and the job runner."""

from __future__ import annotations

from dataclasses import dataclass

from flask import current_app

from .config import ServiceConfig
from .runner import JobRunner
from .store import Store

EXTENSION = "samesource"


@dataclass
class Services:
    config: ServiceConfig
    store: Store
    runner: JobRunner | None = None

    def close(self) -> None:
        """Stop the job runner (running analyses go back to the queue) and the database."""
        if self.runner is not None:
            self.runner.stop()
        self.store.db.dispose()


def services() -> Services:
    return current_app.extensions[EXTENSION]
