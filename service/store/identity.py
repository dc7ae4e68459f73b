"""Which store this process writes to, whether it is still there, and whether it last failed.

A server notes its store's id (written by the migration that made the store) and, for SQLite,
its file's device and inode when it starts. Every write transaction checks both, so a store
file deleted or replaced under a running server refuses writes instead of taking them into an
unlinked file that vanishes at the next start, or into someone else's store. The last storage
failure is kept for the readiness probe, which reports it until a write succeeds again.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import threading

from sqlalchemy import Connection, Engine, select, update
from sqlalchemy import exc as sa_exc
from sqlalchemy.orm import Session

from service.errors import ServiceError, StorageUnavailable
from service.store.db import sqlite_path
from service.store.failures import translated
from service.store.tables import StoreIdentityRow

log = logging.getLogger("excerpta.store")

_READ_ID = select(StoreIdentityRow.store_id).limit(1)
# Below this much free space a SQLite store counts as full: one write of a batch may need more.
FULL_BELOW_BYTES = 1 << 20


class StoreGuard:
    def __init__(self, engine: Engine) -> None:
        self._engine = engine
        self.path = sqlite_path(engine.url.render_as_string(hide_password=False))
        self.store_id: str | None = None
        self._file: tuple[int, int] | None = None
        self._failure: str | None = None
        self._lock = threading.Lock()
        self._errors: dict[str, int] = {}

    def remember(self) -> None:
        """Note the store as it is now; called once the migrations have run."""
        with self._engine.connect() as connection:
            self.store_id = connection.scalar(_READ_ID)
        if self.path is not None:
            found = os.stat(self.path)
            self._file = (found.st_dev, found.st_ino)

    def check(self, session: Session | Connection) -> None:
        """Refuse a store other than the one noted at start: a stat and a one-row read."""
        moved = self.file_moved()
        if moved is not None:
            raise moved
        try:
            store_id = session.scalar(_READ_ID)
        except (sa_exc.ProgrammingError, sa_exc.OperationalError) as exc:
            if "store_identity" not in str(exc.orig):
                raise
            raise self._unavailable("its tables are gone", "its tables are gone") from exc
        if self.store_id is None or store_id != self.store_id:
            raise self._unavailable(
                f"it is store {store_id!r}, not {self.store_id!r} as at start", "it was replaced"
            )

    def file_moved(self) -> StorageUnavailable | None:
        """For SQLite, the error to give when the store's file is gone or another file took its
        place; it says more than the driver's own error about a file it cannot open."""
        if self.path is None:
            return None
        try:
            found = os.stat(self.path)
        except FileNotFoundError:
            return self._unavailable(f"its file {self.path} is gone", "its file was removed")
        except OSError as exc:
            return self._unavailable(
                f"its file {self.path} cannot be read ({exc.strerror})", "its file cannot be read"
            )
        if self._file is not None and (found.st_dev, found.st_ino) != self._file:
            return self._unavailable(
                f"its file {self.path} was replaced by another file", "it was replaced"
            )
        return None

    def explain(self, error: BaseException) -> ServiceError | None:
        """The service error a store failure stands for (see ``failures``), or None for a bug.

        An error the store should never give (a missing table, say) is first checked against
        the store's identity: it may mean the store vanished or was replaced. Unavailability is
        kept for the readiness probe.
        """
        explained = translated(error) or self._lost()
        if isinstance(explained, StorageUnavailable):
            explained = self.file_moved() or explained
            self.failed(explained.message)
        kind = _error_kind(explained)
        with self._lock:
            self._errors[kind] = self._errors.get(kind, 0) + 1
        return explained

    def errors(self) -> dict[str, int]:
        """Failures explained since the start, by kind: ``lost_race`` (retried by the writer),
        ``unavailable`` and ``unexplained`` (a bug, left to surface)."""
        with self._lock:
            return dict(self._errors)

    def _lost(self) -> StorageUnavailable | None:
        try:
            with self._engine.connect() as connection:
                self.check(connection)
        except StorageUnavailable as lost:
            return lost
        except sa_exc.SQLAlchemyError:
            return None
        return None

    def disk_full(self) -> StorageUnavailable | None:
        """For SQLite, whether the filesystem under the store is (all but) full.

        A full disk can still take a write that fits in pages the store has already allocated,
        so a successful probe alone would call a full store ready.
        """
        if self.path is None:
            return None
        try:
            stats = os.statvfs(self.path.parent)
        except OSError:
            return None
        if stats.f_bavail * stats.f_frsize >= FULL_BELOW_BYTES:
            return None
        return StorageUnavailable("The store is unavailable: its disk is full.")

    def probe(self, session: Session) -> None:
        """A write of one row, for the readiness probe to learn that writes succeed again."""
        session.execute(update(StoreIdentityRow).values(checked_at=dt.datetime.now(dt.UTC)))

    # failures ---------------------------------------------------------------------------------

    @property
    def failure(self) -> str | None:
        """The last storage failure since the last successful write, in the error's words."""
        return self._failure

    def failed(self, message: str) -> None:
        with self._lock:
            self._failure = message

    def succeeded(self) -> None:
        if self._failure is not None:
            with self._lock:
                self._failure = None

    def _unavailable(self, logged: str, said: str) -> StorageUnavailable:
        log.error("the store is unavailable: %s", logged)
        return StorageUnavailable(f"The store is unavailable: {said}.")


def _error_kind(explained: ServiceError | None) -> str:
    if explained is None:
        return "unexplained"
    if isinstance(explained, StorageUnavailable):
        return "unavailable"
    return "lost_race"
