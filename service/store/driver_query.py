"""A one-row SELECT compiled once per engine and run on the database driver's own cursor.

Every query checks its API key by one indexed row. Through a Core connection and transaction
that lookup costs several times what it costs on the driver's cursor of a pooled connection, and
more again inside the server, where each vector scan leaves the caches cold. The statement is
compiled by the engine's own dialect and each column's value goes through its type's own result
processor, so the values are those a Core ``execute`` returns, on SQLite and PostgreSQL alike.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

from sqlalchemy import Engine, Select


class DriverQuery:
    def __init__(self, engine: Engine, statement: Select[*tuple[Any, ...]]) -> None:
        dialect = engine.dialect
        compiled = statement.compile(dialect=dialect)
        self._engine = engine
        self._compiled = compiled
        self._sql = str(compiled)
        self._order = compiled.positiontup if compiled.positional else None
        self._processors: list[Callable[[Any], Any] | None] = [
            column.type.dialect_impl(dialect).result_processor(dialect, None)
            for column in statement.selected_columns
        ]

    def first(self, parameters: Mapping[str, Any]) -> tuple[Any, ...] | None:
        """The first row's values, or None; ``parameters`` go to the driver as given."""
        values = self._compiled.construct_params(parameters)
        bound = values if self._order is None else tuple(values[name] for name in self._order)
        connection = self._engine.raw_connection()
        try:
            cursor = connection.cursor()
            try:
                cursor.execute(self._sql, bound)
                row = cursor.fetchone()
            finally:
                cursor.close()
        finally:
            # Back to the pool, which ends the read's transaction as it does for Core.
            connection.close()
        if row is None:
            return None
        return tuple(
            value if process is None else process(value)
            for value, process in zip(row, self._processors, strict=True)
        )
