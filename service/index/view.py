"""What one query reads of a collection: a snapshot, its analyzer, its scoring settings and
the facts it needs beside the index, so that a query reads nothing from the store."""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, field

from service.attributes import Schema
from service.filters.inference.hints import AttributeHints
from service.index.analyzer import Analyzer
from service.index.collection_index import IndexSnapshot
from service.index.lexical import LexicalScoring
from service.retrieval.ranking_settings import PLAIN_FUSION, RankingSettings


@dataclass(frozen=True)
class CollectionFacts:
    """What a query needs of a collection beside its index. ``collection_id`` and
    ``created_at`` name the collection itself: a collection made again under a deleted one's
    name may get its id back (SQLite reuses the largest), never its creation time."""

    collection_id: int
    created_at: dt.datetime
    schema: Schema
    cite_attributes: tuple[str, ...]
    answer_caution: str | None
    inference_hints: Mapping[str, AttributeHints] = field(default_factory=dict)
    ranking: RankingSettings = PLAIN_FUSION


@dataclass(frozen=True)
class IndexView:
    facts: CollectionFacts
    snapshot: IndexSnapshot
    analyzer: Analyzer
    scoring: LexicalScoring
