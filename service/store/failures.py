"""The store's failures, translated once into the service's errors.

Two kinds matter to a caller. A write that lost a race against another writer (a deadlock, a
serialization failure, SQLite's wait for the write lock running out, no free connection) is
``Busy``: the writer retries it, and only then reports it. A store that cannot serve (gone,
replaced, full, read-only, unreachable, failing its I/O) is ``StorageUnavailable``. Anything
else, a constraint violated among them, is a bug and is left to surface as one.

Errors arrive wrapped by SQLAlchemy or, from the driver's own cursor, bare; both are read by
their codes (SQLite's result codes, PostgreSQL's SQLSTATE), never by their wording.
"""

from __future__ import annotations

import logging
import sqlite3

import psycopg
from sqlalchemy import exc as sa_exc

from service.errors import Busy, ServiceError, StorageUnavailable

log = logging.getLogger("excerpta.store")

BUSY_MESSAGE = "The store is busy with other writes; try again shortly."

# SQLite primary result codes (https://www.sqlite.org/rescode.html).
_SQLITE_BUSY = {5, 6}  # SQLITE_BUSY, SQLITE_LOCKED
_SQLITE_UNAVAILABLE = {
    8: "it is read-only",  # SQLITE_READONLY
    10: "its disk failed a read or a write",  # SQLITE_IOERR
    11: "its file is damaged",  # SQLITE_CORRUPT
    13: "its disk is full",  # SQLITE_FULL
    14: "its file cannot be opened",  # SQLITE_CANTOPEN
    26: "its file is not a database",  # SQLITE_NOTADB
}

# PostgreSQL SQLSTATE codes and classes (Appendix A of the PostgreSQL manual).
_POSTGRES_BUSY = {"40001", "40P01", "55P03"}  # serialization, deadlock, lock not available
_POSTGRES_UNAVAILABLE = {
    "53100": "the database server's disk is full",
    "25006": "the database is read-only",
    "3D000": "the database does not exist",
}
_POSTGRES_UNAVAILABLE_CLASSES = {
    "08": "the database server cannot be reached",
    "53": "the database server has run out of resources",
    "57": "the database server is shutting down or refusing connections",
    "58": "the database server's disk failed a read or a write",
}


def reason_for(error: BaseException) -> str | None:
    """Why the store cannot serve, in words for a message, or None when it is not that."""
    driver_error = _driver_error(error)
    if isinstance(driver_error, sqlite3.Error):
        code = getattr(driver_error, "sqlite_errorcode", None)
        return None if code is None else _SQLITE_UNAVAILABLE.get(code & 0xFF)
    sqlstate = getattr(driver_error, "sqlstate", None)
    if isinstance(sqlstate, str):
        return _POSTGRES_UNAVAILABLE.get(sqlstate) or _POSTGRES_UNAVAILABLE_CLASSES.get(
            sqlstate[:2]
        )
    if isinstance(error, sa_exc.OperationalError | psycopg.OperationalError):
        # A connection that failed before the server said anything carries no SQLSTATE.
        return "the database server cannot be reached"
    return None


def lost_race(error: BaseException) -> bool:
    """True when the statement lost to another writer and the same write may simply be retried."""
    if isinstance(error, sa_exc.TimeoutError):
        return True  # every pooled connection stayed busy for the pool's whole wait
    driver_error = _driver_error(error)
    if isinstance(driver_error, sqlite3.Error):
        code = getattr(driver_error, "sqlite_errorcode", None)
        return code is not None and code & 0xFF in _SQLITE_BUSY
    return getattr(driver_error, "sqlstate", None) in _POSTGRES_BUSY


def translated(error: BaseException) -> ServiceError | None:
    """The service error a store failure stands for, logged with its cause; None for a bug."""
    if lost_race(error):
        return Busy(BUSY_MESSAGE)
    reason = reason_for(error)
    if reason is None:
        return None
    log.error("the store is unavailable: %s (%s)", reason, _driver_error(error) or error)
    return StorageUnavailable(f"The store is unavailable: {reason}.")


def _driver_error(error: BaseException) -> BaseException | None:
    if isinstance(error, sa_exc.DBAPIError):
        return error.orig
    if isinstance(error, sqlite3.Error | psycopg.Error):
        return error
    return None
