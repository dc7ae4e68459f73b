"""Engines, sessions and migrations for SQLite (embedded) and PostgreSQL (shared by replicas)."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from alembic import command
from alembic.config import Config
from sqlalchemy import Engine, create_engine, event
from sqlalchemy.orm import Session, sessionmaker

from service.json_text import json_text

MIGRATIONS_DIR = Path(__file__).resolve().parents[2] / "migrations"


def make_engine(url: str, *, schema: str | None = None) -> Engine:
    """Create an engine; SQLite gets WAL, foreign keys and a busy timeout on every connection.

    JSON columns are written with ``json_text``: every query's trace body goes through it.

    ``schema`` pins PostgreSQL's search_path, so a test run (or a deployment) can keep its own
    tables apart from others in the same database.
    """
    if url.startswith("sqlite"):
        path = url.split("///", 1)[-1]
        if path and path != ":memory:":
            Path(path).parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            url,
            connect_args={"check_same_thread": False, "timeout": 30},
            json_serializer=json_text,
        )
        event.listen(engine, "connect", _configure_sqlite)
        return engine
    connect_args: dict[str, Any] = {}
    if schema:
        connect_args["options"] = f"-csearch_path={schema}"
    return create_engine(
        url, pool_pre_ping=True, connect_args=connect_args, json_serializer=json_text
    )


def _configure_sqlite(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


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
