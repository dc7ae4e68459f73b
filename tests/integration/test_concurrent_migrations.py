"""Replicas that start together on one new store migrate it once, and all of them start.

Without a lock, two processes creating PostgreSQL's tables at once fail on duplicate catalog
entries; with it, the later ones wait and find nothing left to do, and the store has exactly
one identity.
"""

from __future__ import annotations

import multiprocessing

from sqlalchemy import func, select

from service.store.db import make_engine, migrate
from service.store.tables import StoreIdentityRow

PROCESSES = 3


def _migrate(url: str, outcomes: multiprocessing.Queue[str]) -> None:
    engine = make_engine(url)
    try:
        migrate(engine)
        outcomes.put("migrated")
    except Exception as exc:
        outcomes.put(repr(exc))
    finally:
        engine.dispose()


def test_processes_migrating_one_new_store_at_once_all_succeed_and_make_one_identity(
    store_url: str,
) -> None:
    context = multiprocessing.get_context("fork")
    outcomes: multiprocessing.Queue[str] = context.Queue()
    processes = [
        context.Process(target=_migrate, args=(store_url, outcomes)) for _ in range(PROCESSES)
    ]
    for process in processes:
        process.start()
    for process in processes:
        process.join(timeout=120)
    assert sorted(outcomes.get(timeout=10) for _ in processes) == ["migrated"] * PROCESSES
    engine = make_engine(store_url)
    try:
        with engine.connect() as connection:
            assert connection.scalar(select(func.count()).select_from(StoreIdentityRow)) == 1
    finally:
        engine.dispose()
