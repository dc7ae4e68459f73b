"""Copies of the store taken while a server runs, and loading one into an empty store.

A SQLite store is copied with SQLite's online backup: a consistent copy of the whole file even
while a server writes, itself an ordinary SQLite store in one file. A PostgreSQL store is
exported table by table from one snapshot (REPEATABLE READ) into excerpta's logical backup
format, version 1:

    a gzip-compressed UTF-8 text of JSON values, one per line:
    {"format": "excerpta-backup", "version": 1, "schema": "<migration revision>",
     "created_at": "<ISO 8601>"}
    then for each table, parents before children:
    {"table": "<name>", "columns": ["<column>", ...]}
    [<value>, ...]          one line per row, values in the order of "columns":
                            bytes as base64 text, times as ISO 8601 with their offset,
                            JSON columns as JSON, everything else as itself
    {"end": {"tables": <count>, "rows": <count>}}

Either kind of backup restores into an empty store on either backend. The copy holds excerpta's
own tables only (not the migration bookkeeping) and keeps each key's salted hash, never a key;
the store's identity row is not copied, since a restored store is a store of its own.
"""

from __future__ import annotations

import base64
import datetime as dt
import gzip
import json
import os
import sqlite3
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any
from urllib.parse import quote

from alembic.migration import MigrationContext
from sqlalchemy import Connection, Engine, Table, create_engine, func, insert, select, text

from service.store.db import WRITE_LOCK, sqlite_path
from service.store.tables import Base, StoreIdentityRow

FORMAT = "excerpta-backup"
VERSION = 1
SQLITE_HEADER = b"SQLite format 3\x00"
GZIP_HEADER = b"\x1f\x8b"
BATCH_ROWS = 500
TABLES: tuple[Table, ...] = tuple(
    table for table in Base.metadata.sorted_tables if table.name != StoreIdentityRow.__tablename__
)


class BackupError(ValueError):
    """A backup that cannot be written or read; the message is one sentence for the caller."""


@dataclass(frozen=True)
class Copied:
    """What a backup or a restore copied: rows per table, in the order they were copied."""

    rows: dict[str, int]

    @property
    def total(self) -> int:
        return sum(self.rows.values())


def schema_revision(connection: Connection) -> str | None:
    return MigrationContext.configure(connection).get_current_revision()


# Writing ----------------------------------------------------------------------------------------


def write_backup(engine: Engine, target: Path) -> Copied:
    """Copy the store to ``target``, a new file: SQLite's own format or the logical one."""
    if target.exists():
        raise BackupError(f"{target} already exists; a backup is written to a new file only.")
    partial = target.with_name(f".{target.name}.partial-{os.getpid()}")
    try:
        store_file = sqlite_path(engine.url.render_as_string(hide_password=False))
        if store_file is not None:
            copied = _sqlite_online_backup(engine, store_file, partial)
        else:
            copied = _logical_export(engine, partial)
        partial.rename(target)
    finally:
        partial.unlink(missing_ok=True)
    return copied


def _sqlite_online_backup(engine: Engine, store_file: Path, target: Path) -> Copied:
    source = sqlite3.connect(f"file:{quote(str(store_file))}?mode=rw", uri=True)
    copy = sqlite3.connect(target)
    try:
        # One step: the whole store is copied under one read lock, so the copy is of one moment.
        source.backup(copy)
        # A backup is one self-contained file: no write-ahead log beside it.
        copy.execute("PRAGMA journal_mode=DELETE")
        copy.commit()
    finally:
        copy.close()
        source.close()
    reader = _read_only(target)
    try:
        with reader.connect() as connection:
            return Copied(
                {
                    t.name: connection.scalar(select(func.count()).select_from(t)) or 0
                    for t in TABLES
                }
            )
    finally:
        reader.dispose()


def _logical_export(engine: Engine, target: Path) -> Copied:
    rows: dict[str, int] = {}
    with engine.connect() as connection:
        connection = connection.execution_options(isolation_level="REPEATABLE READ")
        with connection.begin(), gzip.open(target, "wt", encoding="utf-8") as out:
            _line(
                out,
                {
                    "format": FORMAT,
                    "version": VERSION,
                    "schema": schema_revision(connection),
                    "created_at": dt.datetime.now(dt.UTC).isoformat(),
                },
            )
            for table in TABLES:
                columns = [c.name for c in table.columns]
                _line(out, {"table": table.name, "columns": columns})
                encoders = [_encoder(c.type) for c in table.columns]
                result = connection.execution_options(yield_per=BATCH_ROWS).execute(
                    select(table).order_by(*table.primary_key.columns)
                )
                count = 0
                for row in result:
                    _line(out, [encode(value) for encode, value in zip(encoders, row, strict=True)])
                    count += 1
                rows[table.name] = count
            _line(out, {"end": {"tables": len(rows), "rows": sum(rows.values())}})
    return Copied(rows)


def _line(out: IO[str], value: Any) -> None:
    out.write(json.dumps(value, ensure_ascii=False, separators=(",", ":")))
    out.write("\n")


def _python_type(column_type: Any) -> type | None:
    # A decorated type (``UtcDateTime``) says ``object``; the type it wraps says what it holds.
    column_type = getattr(column_type, "impl_instance", column_type)
    try:
        python_type: type = column_type.python_type
    except NotImplementedError:
        return None
    return python_type


def _encoder(column_type: Any) -> Any:
    kind = _python_type(column_type)
    if kind is bytes:
        return lambda v: None if v is None else base64.b64encode(bytes(v)).decode("ascii")
    if kind in (dt.datetime, dt.date):
        return lambda v: None if v is None else v.isoformat()
    return lambda v: v


def _decoder(column_type: Any) -> Any:
    kind = _python_type(column_type)
    if kind is bytes:
        return lambda v: None if v is None else base64.b64decode(v)
    if kind is dt.datetime:
        return lambda v: None if v is None else dt.datetime.fromisoformat(v)
    if kind is dt.date:
        return lambda v: None if v is None else dt.date.fromisoformat(v)
    return lambda v: v


# Reading ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TableRows:
    table: Table
    columns: list[str]
    rows: Iterable[Sequence[Any]]


def read_backup(path: Path, expected_schema: str | None) -> Iterator[TableRows]:
    """The tables of a backup of either kind, checked to be of the schema this store has."""
    try:
        with path.open("rb") as probe:
            head = probe.read(len(SQLITE_HEADER))
    except OSError as exc:
        raise BackupError(f"{path} cannot be read: {exc.strerror}.") from exc
    if head.startswith(SQLITE_HEADER):
        yield from _read_sqlite_backup(path, expected_schema)
    elif head.startswith(GZIP_HEADER):
        yield from _read_logical_backup(path, expected_schema)
    else:
        raise BackupError(f"{path} is not an excerpta backup.")


def _read_sqlite_backup(path: Path, expected_schema: str | None) -> Iterator[TableRows]:
    reader = _read_only(path)
    try:
        with reader.connect() as connection:
            _check_schema(path, schema_revision(connection), expected_schema)
            for table in TABLES:
                result = connection.execution_options(yield_per=BATCH_ROWS).execute(
                    select(table).order_by(*table.primary_key.columns)
                )
                yield TableRows(table, [c.name for c in table.columns], result)
    finally:
        reader.dispose()


def _read_logical_backup(path: Path, expected_schema: str | None) -> Iterator[TableRows]:
    by_name = {table.name: table for table in TABLES}
    with gzip.open(path, "rt", encoding="utf-8") as lines:
        try:
            header = json.loads(next(lines))
        except (StopIteration, ValueError, OSError) as exc:
            raise BackupError(f"{path} is not an excerpta backup.") from exc
        if not isinstance(header, dict) or header.get("format") != FORMAT:
            raise BackupError(f"{path} is not an excerpta backup.")
        if header.get("version") != VERSION:
            raise BackupError(
                f"{path} is a backup of format version {header.get('version')}; "
                f"this excerpta reads version {VERSION}."
            )
        _check_schema(path, header.get("schema"), expected_schema)
        pending = next(lines, None)
        while pending is not None:
            marker = json.loads(pending)
            if "end" in marker:
                return
            table = by_name.get(marker.get("table"))
            columns = marker.get("columns")
            if table is None or set(columns) != {c.name for c in table.columns}:
                raise BackupError(
                    f"{path} holds a table this excerpta does not know: {marker.get('table')!r}."
                )
            decoders = [_decoder(table.columns[name].type) for name in columns]
            rows: list[list[Any]] = []
            pending = None
            for line in lines:
                value = json.loads(line)
                if isinstance(value, dict):
                    pending = line
                    break
                rows.append([decode(v) for decode, v in zip(decoders, value, strict=True)])
            yield TableRows(table, columns, rows)
    raise BackupError(f"{path} ends early: the backup is incomplete.")


def _read_only(path: Path) -> Engine:
    """An engine that only reads a SQLite backup file (and so changes nothing about it)."""
    return create_engine(f"sqlite:///file:{quote(str(path))}?mode=ro&uri=true")


def _check_schema(path: Path, found: str | None, expected: str | None) -> None:
    if found != expected:
        raise BackupError(
            f"{path} is a backup of schema revision {found}; this store is at {expected}, "
            "so restore it with the excerpta version that wrote it."
        )


# Loading ----------------------------------------------------------------------------------------


def rows_present(connection: Connection) -> dict[str, int]:
    """Rows in each of excerpta's own tables; a store to restore into has none."""
    counts = {t.name: connection.scalar(select(func.count()).select_from(t)) or 0 for t in TABLES}
    return {name: count for name, count in counts.items() if count}


def load(connection: Connection, tables: Iterable[TableRows]) -> Copied:
    """Insert every row of ``tables`` (inside the caller's transaction), then move PostgreSQL's
    id sequences past the ids loaded, so later inserts do not collide with them."""
    copied: dict[str, int] = {}
    for part in tables:
        count = 0
        batch: list[dict[str, Any]] = []
        for row in part.rows:
            batch.append(dict(zip(part.columns, row, strict=True)))
            if len(batch) == BATCH_ROWS:
                connection.execute(insert(part.table), batch)
                count += len(batch)
                batch = []
        if batch:
            connection.execute(insert(part.table), batch)
            count += len(batch)
        copied[part.table.name] = count
        if connection.dialect.name == "postgresql":
            _advance_sequence(connection, part.table)
    return Copied(copied)


def _advance_sequence(connection: Connection, table: Table) -> None:
    keys = list(table.primary_key.columns)
    if len(keys) != 1 or _python_type(keys[0].type) is not int:
        return
    column = keys[0].name
    sequence = connection.scalar(
        text("SELECT pg_get_serial_sequence(:table, :column)"),
        {"table": table.name, "column": column},
    )
    if sequence is None:
        return
    highest = connection.scalar(select(func.max(keys[0])))
    if highest is not None:
        connection.execute(
            text("SELECT setval(:sequence, :value)"), {"sequence": sequence, "value": highest}
        )


def restore_backup(engine: Engine, source: Path) -> Copied:
    """Load the backup at ``source`` into the (migrated, empty) store, all of it or nothing."""
    with engine.connect() as connection:
        expected = schema_revision(connection)
        connection.rollback()
        connection.execution_options(**{WRITE_LOCK: True})
        with connection.begin():
            present = rows_present(connection)
            if present:
                listed = ", ".join(f"{count} in {name}" for name, count in present.items())
                raise BackupError(
                    f"The store is not empty ({listed}); a backup is restored into an empty "
                    "store only."
                )
            return load(connection, read_backup(source, expected))
