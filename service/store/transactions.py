"""The store's two kinds of transaction, each giving the service's errors for the store's
failures (``StoreGuard.explain``): a read sees one snapshot, a write takes the write lock first
and checks that the store is still the one this process started with.

The runtime's use cases and the workers it assembles (the index registry's source, the rebuild
step, the trace pruner) all go through one ``Transactions``, so none of them can write to a
store that vanished or was replaced, or surface a store failure as a bug.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import exc as sa_exc
from sqlalchemy.orm import Session, sessionmaker

from service.errors import StorageUnavailable
from service.store.db import read_unit_of_work, write_unit_of_work
from service.store.identity import StoreGuard


class Transactions:
    def __init__(self, sessions: sessionmaker[Session], guard: StoreGuard) -> None:
        self._sessions = sessions
        self._guard = guard

    @contextmanager
    def read(self) -> Iterator[Session]:
        """A transaction that reads, from one snapshot of the store (``read_unit_of_work``)."""
        with self._failures(), read_unit_of_work(self._sessions) as session:
            yield session

    @contextmanager
    def write(self) -> Iterator[Session]:
        """A transaction that writes: the write lock first (``write_unit_of_work``), then a
        check that the store is still the one this process started with."""
        with self._failures(), write_unit_of_work(self._sessions) as session:
            self._guard.check(session)
            yield session
        self._guard.succeeded()

    @contextmanager
    def _failures(self) -> Iterator[None]:
        try:
            yield
        except StorageUnavailable as exc:
            self._guard.failed(exc.message)
            raise
        except sa_exc.SQLAlchemyError as exc:
            error = self._guard.explain(exc)
            if error is None:
                raise
            raise error from exc
