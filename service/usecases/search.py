"""Search options, their checks, and the candidate set: filter AND time window AND access."""

from __future__ import annotations

import datetime as dt
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.attributes import Schema
from service.config import Settings
from service.errors import InvalidRequest, LimitExceeded
from service.filters.check import check_filter
from service.filters.parse import parse_filter
from service.filters.render import to_text
from service.filters.syntax import Node, conjunction
from service.filters.time_window import resolve_time_window

MODES = ("hybrid", "lexical", "semantic")


@dataclass(frozen=True, kw_only=True)
class TimeWindow:
    attribute: str
    last: str
    now: str | None = None


@dataclass(frozen=True, kw_only=True)
class SearchOptions:
    """One request's retrieval options, checked once at the edge by ``check_options``."""

    query: str
    filter: str | dict[str, Any] | None = None
    time_window: TimeWindow | None = None
    top_k: int = 10
    mode: str = "hybrid"
    rrf_k: int = 60
    depth: int = 100
    query_vector: list[float] | None = None
    # Evaluation may vary BM25's parameters per run; the HTTP API never sets these.
    k1: float | None = None
    b: float | None = None

    def as_request(self) -> dict[str, Any]:
        return {
            "query": self.query,
            "filter": self.filter,
            "time_window": None if self.time_window is None else vars(self.time_window),
            "top_k": self.top_k,
            "mode": self.mode,
            "rrf_k": self.rrf_k,
            "depth": max(self.depth, self.top_k),
            "query_vector": None
            if self.query_vector is None
            else f"{len(self.query_vector)} floats",
        }


def check_options(options: SearchOptions, limits: Settings, dimensions: int) -> None:
    if not options.query.strip() and options.query_vector is None:
        raise InvalidRequest("The query must not be empty.", field="query")
    if len(options.query) > limits.max_query_chars:
        raise LimitExceeded(
            f"The query may hold at most {limits.max_query_chars} characters.", limit="query_chars"
        )
    if options.mode not in MODES:
        raise InvalidRequest("mode must be hybrid, lexical or semantic.", field="mode")
    if options.top_k < 1:
        raise InvalidRequest("top_k must be at least 1.", field="top_k")
    if options.top_k > limits.max_top_k:
        raise LimitExceeded(f"top_k may be at most {limits.max_top_k}.", limit="top_k")
    if options.depth < 1:
        raise InvalidRequest("depth must be at least 1.", field="depth")
    if options.depth > limits.max_depth:
        raise LimitExceeded(f"depth may be at most {limits.max_depth}.", limit="depth")
    if options.rrf_k < 1:
        raise InvalidRequest("rrf_k must be at least 1.", field="rrf_k")
    if options.query_vector is not None:
        if len(options.query_vector) != dimensions:
            raise InvalidRequest(
                f"query_vector must hold {dimensions} numbers for this embedder.",
                field="query_vector",
            )
        try:
            values = np.asarray(options.query_vector, dtype=np.float64)
        except (TypeError, ValueError):
            raise InvalidRequest("query_vector must hold numbers.", field="query_vector") from None
        if values.ndim != 1 or not np.isfinite(values).all():
            raise InvalidRequest("query_vector must hold finite numbers.", field="query_vector")


@dataclass(frozen=True)
class CandidateFilter:
    """The checked filter tree (None when there is none) and what the trace says of it."""

    node: Node | None
    trace: dict[str, Any]


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


def build_candidate_filter(options: SearchOptions, schema: Schema) -> CandidateFilter:
    trace: dict[str, Any] = {}
    nodes: list[Node] = []
    if options.filter is not None and options.filter != "":
        node = check_filter(parse_filter(options.filter), schema)
        nodes.append(node)
        trace["filter"] = to_text(node)
    if options.time_window is not None:
        window = options.time_window
        node, resolved = resolve_time_window(
            window.attribute, window.last, _parse_now(window.now), schema
        )
        nodes.append(node)
        trace["time_window"] = {
            "attribute": window.attribute,
            "last": window.last,
            "start": resolved.start.isoformat() if resolved.start else None,
            "end": resolved.end.isoformat() if resolved.end else None,
        }
    if not nodes:
        return CandidateFilter(None, trace)
    return CandidateFilter(conjunction(nodes), trace)


def timed(start: float) -> float:
    return (time.perf_counter() - start) * 1000.0


def as_query_vector(values: list[float]) -> np.ndarray:
    return np.asarray(values, dtype=np.float32)
