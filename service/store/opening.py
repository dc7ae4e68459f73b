"""Opening the store a command names, or saying in one sentence why it cannot be used.

``serve``, ``migrate``, ``ingest`` and the other commands open the store before they load the
model, so a data directory that cannot be written or a database that cannot be reached is
reported at once: the path or URL (never its password) and the cause, and exit status 1.
"""

from __future__ import annotations

import os
import re
import sqlite3
from pathlib import Path

from sqlalchemy import Engine
from sqlalchemy import exc as sa_exc
from sqlalchemy.engine import make_url

from service.errors import StorageUnavailable
from service.store.db import make_engine, migrate, sqlite_path

_PASSWORD = re.compile(r"(://[^:/@]*:)[^@]*@")


def open_store(url: str, data_dir: Path) -> Engine:
    """An engine over the store at ``url``, migrated to the newest schema."""
    check_data_dir(data_dir)
    store_file = sqlite_path(url) if url.startswith("sqlite") else None
    if store_file is not None and store_file.parent != data_dir:
        check_data_dir(store_file.parent)
    shown = str(store_file) if store_file is not None else shown_url(url)
    try:
        engine = make_engine(url)
    except (sa_exc.ArgumentError, ImportError, ValueError) as exc:
        raise StorageUnavailable(f"The database URL {shown} cannot be used: {cause(exc)}.") from exc
    except (OSError, sqlite3.Error) as exc:
        raise StorageUnavailable(f"The store {shown} cannot be opened: {cause(exc)}.") from exc
    try:
        migrate(engine)
    except (sa_exc.SQLAlchemyError, OSError, sqlite3.Error) as exc:
        engine.dispose()
        raise StorageUnavailable(f"The store {shown} cannot be used: {cause(exc)}.") from exc
    return engine


def check_data_dir(path: Path) -> None:
    """The directory must exist (or be made) and take new files; root ignores permission bits,
    so a file is written and removed to learn that."""
    try:
        path.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        raise StorageUnavailable(f"The data directory {path} is not a directory.") from None
    except OSError as exc:
        raise StorageUnavailable(
            f"The data directory {path} cannot be created: {cause(exc)}."
        ) from exc
    if not path.is_dir():
        raise StorageUnavailable(f"The data directory {path} is not a directory.")
    probe = path / f".excerpta-write-check-{os.getpid()}"
    try:
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        raise StorageUnavailable(
            f"The data directory {path} is not writable: {cause(exc)}."
        ) from exc


def shown_url(url: str) -> str:
    """The URL as it may be printed: with its password hidden."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except (sa_exc.ArgumentError, ValueError):
        return _PASSWORD.sub(r"\1***@", url)


def cause(error: BaseException) -> str:
    """The first line of what the driver or the system said, without a closing full stop."""
    if isinstance(error, sa_exc.DBAPIError) and error.orig is not None:
        error = error.orig
    if isinstance(error, OSError) and error.strerror:
        return error.strerror
    lines = str(error).strip().splitlines()
    return (lines[0] if lines else type(error).__name__).strip().rstrip(".")
