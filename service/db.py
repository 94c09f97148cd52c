"""Database engines: the embedded SQLite (WAL mode) or a server named by a SQLAlchemy URL.

SQLite: WAL so that readers never wait for the writer, synchronous=FULL so that a
committed upload survives a power cut, foreign keys on, a 30 s busy timeout, and write
transactions opened with BEGIN IMMEDIATE (a deferred transaction that reads and then writes
can fail at once with "database is locked" when another connection wrote in between).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import create_engine, event, inspect, text
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.orm import Session, sessionmaker

from .models import Base

WRITE = "samesource_write"  # execution option: this transaction writes


def make_engine(url: str) -> Engine:
    if url.startswith("sqlite"):
        engine = create_engine(url, connect_args={"timeout": 30, "check_same_thread": False},
                               pool_size=10, max_overflow=20)

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record) -> None:
            dbapi_conn.isolation_level = None  # we issue BEGIN ourselves (below)
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=FULL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute("PRAGMA busy_timeout=30000")
            cur.close()

        @event.listens_for(engine, "begin")
        def _on_begin(conn: Connection) -> None:
            conn.exec_driver_sql("BEGIN IMMEDIATE" if conn.get_execution_options().get(WRITE)
                                 else "BEGIN")

        return engine
    return create_engine(url, pool_pre_ping=True, pool_size=10, max_overflow=20)


class Database:
    """An engine and two kinds of session: read-only and writing."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.engine = make_engine(url)
        self._read = sessionmaker(self.engine, expire_on_commit=False)
        self._write = sessionmaker(self.engine.execution_options(**{WRITE: True}),
                                   expire_on_commit=False)

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def create_schema(self) -> None:
        Base.metadata.create_all(self.engine)
        self._add_missing_columns()

    def _add_missing_columns(self) -> None:
        """Columns a later version added (always nullable) to tables an earlier one created:
        create_all makes missing tables only."""
        have = inspect(self.engine)
        for table in Base.metadata.sorted_tables:
            present = {c["name"] for c in have.get_columns(table.name)}
            for col in table.columns:
                if col.name in present or not col.nullable:
                    continue
                kind = col.type.compile(dialect=self.engine.dialect)
                try:
                    with self.engine.begin() as c:
                        c.exec_driver_sql(f"ALTER TABLE {table.name} ADD COLUMN {col.name} {kind}")
                except Exception:  # another process added it at the same moment
                    if col.name not in {c["name"] for c in inspect(self.engine)
                                        .get_columns(table.name)}:
                        raise

    @contextmanager
    def reading(self) -> Iterator[Session]:
        with self._read() as s, s.begin():
            yield s

    @contextmanager
    def writing(self) -> Iterator[Session]:
        """A transaction that commits on leaving the block (rolls back on an exception)."""
        with self._write() as s, s.begin():
            yield s

    def ping(self) -> None:
        with self.engine.connect() as c:
            c.execute(text("SELECT 1"))

    def dispose(self) -> None:
        self.engine.dispose()
