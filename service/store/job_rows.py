"""Queries and writes over the jobs table, so the job use cases never build SQL themselves."""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from typing import Any

from sqlalchemy import or_, select
from sqlalchemy.orm import Session, undefer

from service.store.tables import JobRow

ACTIVE_STATES = ("queued", "running")
# What a job does: write documents, delete the documents a filter matches, or re-chunk and
# re-embed a collection whose chunking changed.
UPSERT = "upsert"
DELETE = "delete"
RECHUNK = "rechunk"


def add_job(
    session: Session,
    *,
    job_id: str,
    collection: str,
    kind: str,
    key_id: int | None,
    key_name: str,
    caller: dict[str, Any],
    payload: dict[str, Any],
    documents: int,
    batch_documents: int,
    skip_invalid: bool,
    now: dt.datetime,
) -> JobRow:
    """A new queued job, added to the session and flushed."""
    row = JobRow(
        id=job_id,
        collection=collection,
        kind=kind,
        state="queued",
        key_id=key_id,
        key_name=key_name,
        caller=caller,
        payload=payload,
        batch_documents=batch_documents,
        skip_invalid=skip_invalid,
        documents=documents,
        documents_done=0,
        chunks=0,
        embedded=0,
        cached=0,
        results=[],
        errors=[],
        failure=None,
        cancel_requested=False,
        attempts=0,
        created_at=now,
    )
    session.add(row)
    session.flush()
    return row


def lock_open_job(session: Session, collection: str, kind: str) -> JobRow | None:
    """The collection's queued or running job of ``kind``, under its row lock."""
    query = (
        select(JobRow)
        .where(
            JobRow.collection == collection,
            JobRow.kind == kind,
            JobRow.state.in_(ACTIVE_STATES),
        )
        .order_by(JobRow.created_at, JobRow.id)
        .limit(1)
        .with_for_update()
    )
    return session.scalars(query).first()


def job_by_id(session: Session, job_id: str, *, with_payload: bool = False) -> JobRow | None:
    query = select(JobRow).where(JobRow.id == job_id)
    if with_payload:
        query = query.options(undefer(JobRow.payload))
    return session.scalars(query).first()


def lock_job(session: Session, job_id: str, *, with_payload: bool = False) -> JobRow | None:
    """The job read under its row lock (PostgreSQL's ``FOR UPDATE``; SQLite's write
    transaction already holds the store's one lock)."""
    query = select(JobRow).where(JobRow.id == job_id).with_for_update()
    if with_payload:
        query = query.options(undefer(JobRow.payload))
    return session.scalars(query).first()


def next_claimable_job(session: Session, now: dt.datetime) -> JobRow | None:
    """The oldest job no live worker holds: queued, or running on a lease that ran out.

    Rows another transaction has locked are skipped (PostgreSQL), so workers claiming at once
    take different jobs instead of queueing behind one another.
    """
    query = (
        select(JobRow)
        .where(
            or_(
                JobRow.state == "queued",
                (JobRow.state == "running") & (JobRow.lease_expires_at < now),
            )
        )
        .order_by(JobRow.created_at, JobRow.id)
        .limit(1)
        .with_for_update(skip_locked=True)
    )
    return session.scalars(query).first()


def list_jobs(
    session: Session,
    *,
    key_id: int | None,
    everyone: bool,
    collection: str | None,
    states: Sequence[str],
    limit: int,
) -> list[JobRow]:
    """The newest jobs first; ``everyone`` lists every key's jobs, else only ``key_id``'s."""
    query = select(JobRow)
    if not everyone:
        if key_id is None:
            return []
        query = query.where(JobRow.key_id == key_id)
    if collection is not None:
        query = query.where(JobRow.collection == collection)
    if states:
        query = query.where(JobRow.state.in_(list(states)))
    query = query.order_by(JobRow.created_at.desc(), JobRow.id.desc()).limit(limit)
    return list(session.scalars(query))
