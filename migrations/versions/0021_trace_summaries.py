"""trace summaries: the columns a trace listing shows and filters by, filled for old traces

Revision ID: 0021_trace_summaries
Revises: 0017_jobs
Create Date: 2026-12-03
"""

import json
from collections.abc import Sequence
from typing import Any

import sqlalchemy as sa
from alembic import op

revision: str = "0021_trace_summaries"
down_revision: str | None = "0017_jobs"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_BATCH = 500


def upgrade() -> None:
    with op.batch_alter_table("traces", schema=None) as batch_op:
        batch_op.add_column(sa.Column("query", sa.Text(), nullable=True))
        batch_op.add_column(sa.Column("candidates", sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column("hits", sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column("outcome", sa.String(length=16), nullable=True))
        batch_op.add_column(sa.Column("reason", sa.String(length=64), nullable=True))
        batch_op.add_column(sa.Column("milliseconds", sa.Float(), nullable=True))
        batch_op.create_index("ix_traces_key_id_created_at", ["key_id", "created_at"], unique=False)
    _fill_summaries()


def _fill_summaries() -> None:
    """Summaries of the traces written before this revision, read from their bodies."""
    traces = sa.table(
        "traces",
        sa.column("id", sa.String()),
        sa.column("route", sa.String()),
        sa.column("body", sa.JSON()),
        sa.column("query", sa.Text()),
        sa.column("candidates", sa.Integer()),
        sa.column("hits", sa.Integer()),
        sa.column("outcome", sa.String()),
        sa.column("reason", sa.String()),
        sa.column("milliseconds", sa.Float()),
    )
    connection = op.get_bind()
    last = ""
    while True:
        rows = connection.execute(
            sa.select(traces.c.id, traces.c.route, traces.c.body)
            .where(traces.c.id > last)
            .order_by(traces.c.id)
            .limit(_BATCH)
        ).all()
        if not rows:
            return
        for trace_id, route, body in rows:
            values = _summary(route, body if isinstance(body, dict) else json.loads(body))
            connection.execute(traces.update().where(traces.c.id == trace_id).values(**values))
        last = rows[-1][0]


def _summary(route: str, body: dict[str, Any]) -> dict[str, Any]:
    stages = {stage.get("stage"): stage for stage in body.get("stages", [])}
    filtered = stages.get("filter", {}).get("counts", {})
    packed = stages.get("packing", {}).get("chunks")
    if route == "search":
        hits = len(body["hits"]) if isinstance(body.get("hits"), list) else None
    elif packed is not None:
        hits = sum(1 for chunk in packed if chunk.get("outcome") in ("included", "merged"))
    else:
        hits = 0 if body.get("reason") == "no_candidates" else None
    reason = body.get("reason")
    if body.get("generator_error") is not None:
        outcome, reason = "failed", "generator_unavailable"
    elif route != "answer":
        outcome = "returned"
    else:
        outcome = "declined" if reason else "answered"
    return {
        "query": body.get("request", {}).get("query"),
        "candidates": filtered.get("candidates"),
        "hits": hits,
        "outcome": outcome,
        "reason": reason,
        "milliseconds": body.get("total_milliseconds"),
    }


def downgrade() -> None:
    with op.batch_alter_table("traces", schema=None) as batch_op:
        batch_op.drop_index("ix_traces_key_id_created_at")
        batch_op.drop_column("milliseconds")
        batch_op.drop_column("reason")
        batch_op.drop_column("outcome")
        batch_op.drop_column("hits")
        batch_op.drop_column("candidates")
        batch_op.drop_column("query")
