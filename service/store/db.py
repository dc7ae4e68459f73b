"""Engines, sessions and migrations for SQLite (embedded) and PostgreSQL (shared by replicas)."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any
from urllib.parse import quote, unquote

from alembic import command
from alembic.config import Config
from sqlalchemy import Connection, Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

from service.json_text import json_text

MIGRATIONS_DIR = Path(__file__).resolve().parents[2] / "migrations"
# The execution option that makes a transaction take the write lock as it begins.
WRITE_LOCK = "excerpta_write_lock"
SQLITE_LOCK_WAIT_SECONDS = 30


def sqlite_path(url: str) -> Path | None:
    """The file of a SQLite store, or None for another backend or an in-memory database."""
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or not parsed.database:
        return None
    database = parsed.database
    if database.startswith("file:"):
        database = unquote(database[len("file:") :])
    return None if database == ":memory:" else Path(database)


def make_engine(url: str, *, schema: str | None = None) -> Engine:
    """Create an engine; SQLite gets WAL, foreign keys and a busy timeout on every connection.

    A SQLite file is made here when missing, and every connection then opens it with
    ``mode=rw``, which never creates one: a store deleted under a running server is reported
    as gone instead of being silently replaced by a fresh, empty file. SQLite transactions
    begin with an explicit ``BEGIN`` (``BEGIN IMMEDIATE`` for writes, see ``write_unit_of_work``)
    instead of the driver's own, which begins only at the first write.

    JSON columns are written with ``json_text``: every query's trace body goes through it.

    ``schema`` pins PostgreSQL's search_path, so a test run (or a deployment) can keep its own
    tables apart from others in the same database.
    """
    if url.startswith("sqlite"):
        path = sqlite_path(url)
        if path is not None and "?" not in url:
            path.parent.mkdir(parents=True, exist_ok=True)
            if not path.exists():
                sqlite3.connect(path).close()
            url = f"sqlite:///file:{quote(str(path.resolve()))}?mode=rw&uri=true"
        engine = create_engine(
            url,
            connect_args={"check_same_thread": False, "timeout": SQLITE_LOCK_WAIT_SECONDS},
            json_serializer=json_text,
        )
        event.listen(engine, "connect", _configure_sqlite)
        event.listen(engine, "begin", _begin_sqlite)
        return engine
    connect_args: dict[str, Any] = {}
    if schema:
        connect_args["options"] = f"-csearch_path={schema}"
    return create_engine(
        url, pool_pre_ping=True, connect_args=connect_args, json_serializer=json_text
    )


def _configure_sqlite(dbapi_connection: Any, _record: Any) -> None:
    # The driver's own transaction handling off: ``_begin_sqlite`` emits BEGIN itself.
    dbapi_connection.isolation_level = None
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


def _begin_sqlite(connection: Connection) -> None:
    write = connection.get_execution_options().get(WRITE_LOCK, False)
    connection.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")


def alembic_config(engine: Engine) -> Config:
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.attributes["engine"] = engine
    return config


def migrate(engine: Engine) -> None:
    """Bring the schema to the newest revision; the schema exists only through migrations."""
    command.upgrade(alembic_config(engine), "head")


def session_factory(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(engine, expire_on_commit=False)


@contextmanager
def unit_of_work(factory: sessionmaker[Session]) -> Iterator[Session]:
    """One transaction: committed when the block ends, rolled back on any exception."""
    session = factory()
    try:
        with session.begin():
            yield session
    finally:
        session.close()


@contextmanager
def read_unit_of_work(factory: sessionmaker[Session]) -> Iterator[Session]:
    """A transaction whose statements all read one snapshot of the store.

    PostgreSQL's default, READ COMMITTED, gives each statement its own snapshot: a document
    read by one statement and its chunks by the next could belong to two versions. REPEATABLE
    READ makes it one snapshot (a SQLite transaction always reads one). Never for writes, which
    would then fail whenever a row they lock changed after their snapshot.
    """
    session = factory()
    try:
        with session.begin():
            if session.get_bind().dialect.name == "postgresql":
                session.connection(execution_options={"isolation_level": "REPEATABLE READ"})
            yield session
    finally:
        session.close()


@contextmanager
def write_unit_of_work(factory: sessionmaker[Session]) -> Iterator[Session]:
    """A transaction that means to write, holding SQLite's write lock from its first statement.

    On SQLite it begins with ``BEGIN IMMEDIATE``: it waits for the database's one write lock
    before it reads anything, so nothing it reads can change before it writes, and it can never
    fail half-way for want of the lock. PostgreSQL takes its locks row by row: the caller locks
    what the write depends on first (``repository.lock_collection``).
    """
    session = factory()
    try:
        with session.begin():
            session.connection(execution_options={WRITE_LOCK: True})
            yield session
    finally:
        session.close()
