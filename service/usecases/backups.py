"""A backup of the whole store, for an admin, while the service keeps serving.

The copy is the one ``excerpta backup`` writes (``service.store.backup``): SQLite's own format
for a SQLite store, the logical format for PostgreSQL. It is written to a new file in the data
directory, which the caller hands over and then removes.
"""

from __future__ import annotations

import datetime as dt
import shutil
import sqlite3
import tempfile
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import exc as sa_exc

from service.errors import StorageUnavailable
from service.store.backup import BackupError, write_backup
from service.store.db import sqlite_path
from service.store.opening import cause
from service.usecases.callers import Caller, Role
from service.usecases.runtime import Runtime

SQLITE_MEDIA_TYPE = "application/vnd.sqlite3"
POSTGRES_MEDIA_TYPE = "application/gzip"
BACKUP_MEDIA_TYPES = (SQLITE_MEDIA_TYPE, POSTGRES_MEDIA_TYPE)


@dataclass(frozen=True)
class BackupFile:
    """A written backup; ``folder`` holds only it and is removed once it has been sent."""

    path: Path
    folder: Path
    filename: str
    media_type: str
    rows: int


def make_backup(runtime: Runtime, caller: Caller) -> BackupFile:
    caller.require(Role.ADMIN)
    is_sqlite = sqlite_path(runtime.engine.url.render_as_string(hide_password=False)) is not None
    stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    filename = f"excerpta-backup-{stamp}" + (".sqlite" if is_sqlite else ".jsonl.gz")
    runtime.settings.data_dir.mkdir(parents=True, exist_ok=True)
    folder = Path(tempfile.mkdtemp(prefix=".backup-", dir=runtime.settings.data_dir))
    path = folder / filename
    try:
        copied = write_backup(runtime.engine, path)
    except (BackupError, sa_exc.SQLAlchemyError, OSError, sqlite3.Error) as exc:
        shutil.rmtree(folder, ignore_errors=True)
        raise StorageUnavailable(f"The backup could not be written: {cause(exc)}.") from exc
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise
    media_type = SQLITE_MEDIA_TYPE if is_sqlite else POSTGRES_MEDIA_TYPE
    return BackupFile(path, folder, filename, media_type, copied.total)


def discard(backup: BackupFile) -> None:
    shutil.rmtree(backup.folder, ignore_errors=True)
