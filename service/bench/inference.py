"""Filter inference on the synthetic collection: the per-question cost a query pays for it.

The questions mention the synthetic attributes the way people write (a region code, a year, a
number with a comparison, a relative time, a boolean by its name) and some mention none. The
lexicon is built once per index version, as the service does, and its build time is reported
beside the per-question figures.
"""

from __future__ import annotations

import datetime as dt
import time
from typing import Any

from service.bench.synthetic import SCHEMA
from service.bench.timing import Summary, time_each
from service.filters.inference.engine import InferenceScope, infer_clauses
from service.filters.inference.lexicon import build_lexicon
from service.index.collection_index import IndexSnapshot

NOW = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)
QUESTIONS = (
    "what do the r07 documents say about w1520 w3301",
    "active records in region r12 from 2010 onwards",
    "tier c entries with position under 5000",
    "which r03 items have a day in the last six months",
    "w2207 w98 w4410 in 2015",
    "show the half ones for r19 between 2004 and 2008",
    "entries with a share of at least 0.25 and not active",
    "what changed since March 2020 in r11",
    "w1501 w7020 w333",
    "tags s100 in region r05 before 2012",
    "position between 1000 and 2000 for the year 2020",
    "anything about w810 w1999 for r14 or r15",
    "active r01 records stamped in 2000",
    "w4001 w4002 w4003 w4004",
    "day after 2019-06-30 and tier b",
    "w12001 in the past 30 days for region r02",
)


def time_inference(snapshot: IndexSnapshot, count: int) -> tuple[Summary, dict[str, Any]]:
    """Per-question inference over every live row (no access limit, no request filter)."""
    started = time.perf_counter()
    lexicon = build_lexicon(SCHEMA, {}, snapshot.columns)
    build_ms = (time.perf_counter() - started) * 1000.0
    live = snapshot.live.copy()
    scope = InferenceScope(
        columns=snapshot.columns, visible=live, allowed=live, explicit=frozenset(), now=NOW
    )
    questions = [QUESTIONS[i % len(QUESTIONS)] for i in range(count)]
    summary, inferred = time_each(questions, lambda q: infer_clauses(q, lexicon, scope))
    return summary, {
        "questions": len(QUESTIONS),
        "clauses_kept": sum(len(inference.clauses) for inference in inferred[: len(QUESTIONS)]),
        "lexicon_build_ms": build_ms,
        "lexicon_entries": sum(len(found) for found in lexicon.entries.values()),
    }
