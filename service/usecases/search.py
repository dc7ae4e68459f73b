"""A retrieval request, its one check, and the query the retrieval core takes from it.

The HTTP API and the CLI both build a ``SearchOptions``; ``prepare_query`` checks it against
the limits and the collection once and turns it into a ``RetrievalQuery``, so nothing below
checks a request again.
"""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from service.config import Settings
from service.embedding.base import Embedder
from service.errors import InvalidRequest, LimitExceeded
from service.filters.check import check_filter
from service.filters.inference.engine import node_attributes
from service.filters.parse import parse_filter
from service.filters.render import to_text
from service.filters.syntax import Node, conjunction
from service.filters.time_window import ResolvedWindow, resolve_time_window
from service.generation.filter_proposal import ChatFilterProposer
from service.index.lexical import LexicalScoring
from service.index.view import IndexView
from service.retrieval.query import Mode, RetrievalQuery
from service.retrieval.ranking_settings import RankingSettings
from service.usecases.inference import OFF, InferOptions, InferredFilter, infer_for_request

FilterSpec = str | dict[str, Any] | None
TRACE_TOP_ENTRIES = 20
# The query embedding stage's source when the request brought its own vector.
QUERY_VECTOR_SOURCE = "query_vector"


@dataclass(frozen=True, kw_only=True)
class TimeWindow:
    attribute: str
    last: str
    now: str | None = None


@dataclass(frozen=True, kw_only=True)
class SearchOptions:
    """One request's retrieval options as the caller sent them.

    ``scoring`` and ``ranking`` replace the collection's BM25 settings and hybrid steps;
    evaluation and tuning set them to compare settings, the HTTP API never does.
    """

    query: str
    filter: FilterSpec = None
    time_window: TimeWindow | None = None
    top_k: int = 10
    mode: Mode = "hybrid"
    rrf_k: int | None = None
    depth: int = 100
    query_vector: Sequence[float] | None = None
    infer_filter: InferOptions = OFF
    scoring: LexicalScoring | None = None
    ranking: RankingSettings | None = None

    def as_request(self) -> dict[str, Any]:
        """What the trace records of the request; ``depth_used`` is the depth after raising it
        to ``top_k``."""
        return {
            "query": self.query,
            "filter": self.filter,
            "time_window": None if self.time_window is None else vars(self.time_window),
            "top_k": self.top_k,
            "mode": self.mode,
            "rrf_k": self.rrf_k,
            "ranking": None if self.ranking is None else "evaluation's own",
            "depth": self.depth,
            "depth_used": max(self.depth, self.top_k),
            "query_vector": None
            if self.query_vector is None
            else f"{len(self.query_vector)} floats",
            "infer_filter": self.infer_filter.as_request(),
        }


@dataclass(frozen=True)
class FilterParts:
    """The checked pieces the candidate filter is the AND of: the request's own filter, its
    time window and the inferred filter applied; explain tests a chunk against each."""

    request: Node | None = None
    window: Node | None = None
    resolved_window: ResolvedWindow | None = None
    inferred: Node | None = None

    def joined(self) -> Node | None:
        nodes = [node for node in (self.request, self.window, self.inferred) if node is not None]
        return conjunction(nodes) if nodes else None


@dataclass(frozen=True)
class PreparedQuery:
    """The core's query, and what the trace says of how it was made."""

    retrieval: RetrievalQuery
    filter_notes: dict[str, Any]
    embedding_milliseconds: float | None
    embedding_source: str
    inferred: InferredFilter | None
    filter_parts: FilterParts


def check_limits(options: SearchOptions, limits: Settings, dimensions: int) -> None:
    """The request's own checks, before its collection is read."""
    if not options.query.strip() and options.query_vector is None:
        raise InvalidRequest("Field 'query' must not be empty.", field="query")
    if len(options.query) > limits.max_query_chars:
        raise LimitExceeded(
            f"The query may hold at most {limits.max_query_chars} characters.", limit="query_chars"
        )
    for name, value in (("top_k", options.top_k), ("depth", options.depth)):
        if value < 1:
            raise InvalidRequest(f"{name} must be at least 1.", field=name)
    if options.top_k > limits.max_top_k:
        raise LimitExceeded(f"top_k may be at most {limits.max_top_k}.", limit="top_k")
    if options.depth > limits.max_depth:
        raise LimitExceeded(f"depth may be at most {limits.max_depth}.", limit="depth")
    if options.rrf_k is not None and options.rrf_k < 1:
        raise InvalidRequest("rrf_k must be at least 1.", field="rrf_k")
    if options.query_vector is not None:
        _check_query_vector(options.query_vector, dimensions)


def _check_query_vector(vector: Sequence[float], dimensions: int) -> None:
    if len(vector) != dimensions:
        raise InvalidRequest(
            f"query_vector must hold {dimensions} numbers for this embedder.",
            field="query_vector",
        )
    try:
        values = np.asarray(vector, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidRequest("query_vector must hold numbers.", field="query_vector") from None
    if values.ndim != 1 or not np.isfinite(values).all():
        raise InvalidRequest("query_vector must hold finite numbers.", field="query_vector")
    if not values.any():
        raise InvalidRequest("query_vector must not be all zeros.", field="query_vector")


def _parse_now(value: str | None) -> dt.datetime | None:
    if value is None:
        return None
    try:
        parsed = dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        raise InvalidRequest(
            "time_window.now must be an ISO 8601 timestamp with an offset.",
            field="time_window.now",
        ) from None
    if parsed.tzinfo is None:
        raise InvalidRequest(
            "time_window.now needs an offset, such as 2024-05-01T00:00:00Z.",
            field="time_window.now",
        )
    return parsed.astimezone(dt.UTC)


def candidate_filter(options: SearchOptions, view: IndexView) -> tuple[FilterParts, dict[str, Any]]:
    """The checked filter and time window, and what the trace says of them."""
    notes: dict[str, Any] = {}
    request = window_node = resolved = None
    schema = view.facts.schema
    if options.filter is not None and options.filter != "":
        request = check_filter(parse_filter(options.filter), schema)
        notes["filter"] = to_text(request)
    if options.time_window is not None:
        window = options.time_window
        window_node, resolved = resolve_time_window(
            window.attribute, window.last, _parse_now(window.now), schema
        )
        notes["time_window"] = {
            "attribute": window.attribute,
            "last": window.last,
            "start": resolved.start.isoformat(),
            "end": resolved.end.isoformat(),
        }
    return FilterParts(request, window_node, resolved), notes


def prepare_query(
    options: SearchOptions,
    view: IndexView,
    embedder: Embedder,
    groups: frozenset[str] | None,
    *,
    whole_ranking: bool,
    proposer: ChatFilterProposer | None = None,
) -> PreparedQuery:
    """The checked request as the core's query: filter, query terms and query vector.

    ``whole_ranking`` keeps every fused hit up to depth (for packing) instead of ``top_k``.
    With ``infer_filter`` on, the filter inferred from the question is found here (with
    ``proposer`` when it asks for chat-http) and, in ``apply`` mode, ANDed with the request's
    own filter. ``check_limits`` must have passed.
    """
    parts, notes = candidate_filter(options, view)
    node = parts.joined()
    inferred = None
    if options.infer_filter.active:
        inferred = infer_for_request(
            options.query,
            options.infer_filter,
            snapshot=view.snapshot,
            schema=view.facts.schema,
            hints=view.facts.inference_hints,
            groups=groups,
            explicit=node,
            explicit_attributes=frozenset(node_attributes(node) if node is not None else ()),
            proposer=proposer,
        )
        notes.update(inferred.trace())
        if options.infer_filter.mode == "apply" and inferred.node is not None:
            parts = replace(parts, inferred=inferred.node)
            node = parts.joined()
    depth = max(options.depth, options.top_k)
    vector = None
    milliseconds = None
    source = QUERY_VECTOR_SOURCE if options.query_vector is not None else embedder.name
    if options.mode != "lexical":
        started = time.perf_counter()
        if options.query_vector is not None:
            vector = np.asarray(options.query_vector, dtype=np.float32)
        else:
            vector = embedder.embed_query(options.query)
        milliseconds = (time.perf_counter() - started) * 1000.0
    tokens = () if options.mode == "semantic" else tuple(view.analyzer.tokens(options.query))
    ranking = options.ranking or view.facts.ranking
    query = RetrievalQuery(
        mode=options.mode,
        tokens=tokens,
        vector=vector,
        filter=node,
        groups=groups,
        top_k=options.top_k,
        depth=depth,
        rrf_k=options.rrf_k if options.rrf_k is not None else ranking.rrf_k,
        keep=depth if whole_ranking else options.top_k,
        scoring=options.scoring or view.scoring,
        ranking=ranking,
        trace_top=TRACE_TOP_ENTRIES,
    )
    return PreparedQuery(query, notes, milliseconds, source, inferred, parts)
