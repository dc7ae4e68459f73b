"""Request and response schemas of the HTTP API (kept apart from tables and in-memory types)."""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Any, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, PlainValidator, WithJsonSchema
from pydantic_core import PydanticCustomError

from service.usecases.explain import Stage as ExplainStage


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class ErrorBody(BaseModel):
    model_config = ConfigDict(extra="allow")
    code: str
    message: str
    trace_id: str | None = Field(
        None, description="The trace the failed request saved (queries only), for GET /v1/traces"
    )


class ErrorOut(BaseModel):
    error: ErrorBody


def _absent(value: object) -> bool:
    return value is None


class PhrasesIn(Strict):
    true: list[str] = []
    false: list[str] = []


class AttributeSpec(Strict):
    """An attribute's type, and the optional hints that filter inference reads."""

    type: str
    description: str | None = Field(None, exclude_if=_absent)
    aliases: dict[str, list[str]] | None = Field(
        None, exclude_if=_absent, description="Other names for values: {value: [alias, ...]}"
    )
    phrases: PhrasesIn | None = Field(
        None, exclude_if=_absent, description="Phrases meaning true or false (booleans)"
    )
    infer: bool | None = Field(
        None, exclude_if=_absent, description="false keeps the attribute out of inference"
    )


class ChunkingIn(Strict):
    max_tokens: int = 200
    overlap_tokens: int = 40


class RetrievalSettingsIn(Strict):
    bm25: Literal["smoothed", "okapi"] | None = None
    k1: float | None = None
    b: float | None = None
    metric: Literal["cosine", "dot", "euclidean"] | None = None
    stemming: bool | None = None
    stopwords: bool | None = None
    title_weight: int | None = Field(
        None, description="How many times a title's terms count in BM25 (BM25F); 1 to 5"
    )
    section_weight: int | None = Field(
        None, description="How many times a section path's terms count in BM25 (BM25F); 1 to 5"
    )
    lexical_feedback_chunks: int | None = Field(
        None, description="Hybrid: top lexical chunks the query is expanded from (RM3); 0: off"
    )
    lexical_feedback_terms: int | None = Field(None, description="Expansion terms kept (RM3)")
    lexical_feedback_query_weight: float | None = Field(
        None, description="The original query's share of the expanded query (RM3), 0 to 1"
    )
    lexical_feedback_max_share: float | None = Field(
        None,
        description="Expansion terms in more than this share of the live chunks are skipped "
        "(RM3), 0 to 1; 1: none",
    )
    semantic_feedback_chunks: int | None = Field(
        None, description="Hybrid: top semantic chunks added to the query vector (Rocchio); 0: off"
    )
    semantic_feedback_weight: float | None = Field(
        None, description="Weight of their mean vector (Rocchio), 0 to 4"
    )
    feedback_source: Literal["own", "fused"] | None = Field(
        None,
        description="Hybrid: where both feedback steps take their chunks: each ranking's own "
        "top, or the top of the two rankings fused",
    )
    fusion: Literal["rrf", "min_max", "z_score"] | None = Field(
        None, description="Hybrid fusion: reciprocal rank fusion or normalised score fusion"
    )
    rrf_k: int | None = Field(
        None, description="Reciprocal rank fusion's k for requests without one"
    )
    semantic_weight: float | None = Field(
        None, description="The semantic ranking's share of the fusion, 0 to 1 (0.5: even)"
    )
    second_chunk_weight: float | None = Field(
        None, description="Share of a document's second chunk added to its best, 0 to 1; 0: off"
    )


class GraphSettingsIn(Strict):
    links: int | None = Field(None, description="Neighbours per node of the graph")
    build_breadth: int | None = Field(None, description="Candidates kept while linking a node")
    search_breadth: int | None = Field(
        None, description="Candidates kept while searching without a filter"
    )
    max_search_breadth: int | None = Field(
        None, description="Largest breadth a filtered search may use; beyond it, exact search"
    )


class VectorSettingsIn(Strict):
    index: Literal["auto", "exact", "graph"] | None = Field(
        None,
        description="auto (default): a graph from a size where it pays, chosen per query; "
        "exact: never a graph; graph: a graph at any size, used wherever it can be",
    )
    graph: GraphSettingsIn | None = None


class CollectionIn(Strict):
    description: str | None = Field(None, max_length=10_000)
    attributes: dict[str, AttributeSpec] | None = Field(
        None,
        description="The whole schema: an existing attribute left out is a 409 conflict unless "
        "remove_attributes names it. Leave the field out to keep the schema as it is.",
    )
    remove_attributes: list[str] | None = Field(
        None,
        max_length=1000,
        description="Attributes to remove from the schema, from every document and from "
        "cite_attributes.",
    )
    chunking: ChunkingIn | None = None
    cite_attributes: list[str] | None = None
    answer_caution: str | None = Field(None, max_length=10_000)
    retrieval: RetrievalSettingsIn | None = None
    vectors: VectorSettingsIn | None = None


class RebuildOut(BaseModel):
    done: int
    total: int


class CollectionOut(BaseModel):
    name: str
    description: str
    attributes: dict[str, AttributeSpec]
    chunking: ChunkingIn
    cite_attributes: list[str]
    answer_caution: str | None
    retrieval: dict[str, Any]
    vectors: dict[str, Any]
    tokenizer: str
    embedder: str
    documents: int
    chunks: int
    revision: int
    created_at: dt.datetime
    updated_at: dt.datetime
    rebuild: RebuildOut | None = None


class CollectionListOut(BaseModel):
    collections: list[CollectionOut]


class DocumentBatchIn(Strict):
    documents: list[Any] = Field(
        description=(
            "Documents: {id, title?, text, media_type?, source_url?, attributes?, access?}. "
            "Each is validated by the service so every invalid one is reported with its reason."
        )
    )
    wait: bool = Field(
        True,
        description=(
            "true: answer once the batch's job is done, with its results; false: answer 202 "
            "with the job's id at once (follow it at /v1/jobs/{job_id})."
        ),
    )


class JobAcceptedOut(BaseModel):
    job_id: str
    status: Literal["queued", "running", "done", "failed", "cancelled"]


class JobCountsOut(BaseModel):
    documents: int
    documents_done: int
    chunks: int
    embedded: int
    cached: int


class JobDocumentResult(BaseModel):
    """A written document (upsert: every field), a deleted one (delete: id and status), or the
    switch of a re-chunked collection (rechunk: status and the chunks it holds now)."""

    id: str | None = None
    index: int | None = None
    status: Literal["created", "updated", "unchanged", "deleted", "switched"]
    chunks: int | None = None


class JobDocumentError(BaseModel):
    model_config = ConfigDict(extra="allow")
    id: str | None
    index: int
    reason: str
    message: str


class JobOut(BaseModel):
    job_id: str
    collection: str
    kind: Literal["upsert", "delete", "rechunk"]
    state: Literal["queued", "running", "done", "failed", "cancelled"]
    key: str
    counts: JobCountsOut
    results: list[JobDocumentResult]
    errors: list[JobDocumentError]
    error: ErrorBody | None
    cancel_requested: bool
    worker: str | None
    created_at: dt.datetime
    started_at: dt.datetime | None
    finished_at: dt.datetime | None


class JobListOut(BaseModel):
    jobs: list[JobOut]


class DocumentResult(BaseModel):
    id: str
    status: Literal["created", "updated", "unchanged"]
    chunks: int


class DocumentBatchOut(BaseModel):
    results: list[DocumentResult]


class ChunkOut(BaseModel):
    chunk_id: str
    ordinal: int
    text: str
    char_start: int
    char_end: int
    tokens: int
    section: str


class DocumentOut(BaseModel):
    id: str
    title: str
    media_type: str
    source_url: str | None
    content_hash: str
    attributes: dict[str, Any]
    access: list[str]
    created_at: dt.datetime
    updated_at: dt.datetime
    text: str
    chunks: list[ChunkOut]


class DocumentSummary(BaseModel):
    id: str
    title: str
    media_type: str
    source_url: str | None
    attributes: dict[str, Any]
    access: list[str]
    updated_at: dt.datetime


class DocumentListOut(BaseModel):
    documents: list[DocumentSummary]
    total: int
    next_after: str | None


class DeletedOut(BaseModel):
    deleted: int


class TimeWindowIn(Strict):
    attribute: str
    last: str
    now: str | None = None


def _filter_value(value: Any) -> Any:
    if value is None or isinstance(value, str | dict):
        return value
    raise PydanticCustomError("filter_type", "a filter is a CQL2 text string or a CQL2 JSON object")


FilterValue = Annotated[
    str | dict[str, Any] | None,
    PlainValidator(_filter_value),
    WithJsonSchema({"anyOf": [{"type": "string"}, {"type": "object"}, {"type": "null"}]}),
]


def _not_a_boolean(value: Any) -> Any:
    # JSON's true and false would otherwise be read as 1 and 0.
    if isinstance(value, bool):
        raise PydanticCustomError("int_type", "Input should be an integer, not true or false")
    return value


Count = Annotated[int, BeforeValidator(_not_a_boolean)]


InferMode = Literal["off", "suggest", "apply"]


class InferFilterIn(Strict):
    mode: InferMode
    now: str | None = Field(
        None, description="ISO 8601 instant with an offset that relative times resolve against"
    )
    using: Literal["deterministic", "chat-http"] = "deterministic"


class SearchIn(Strict):
    query: str = Field(min_length=1)
    filter: FilterValue = None
    time_window: TimeWindowIn | None = None
    top_k: Count = Field(10, ge=1)
    mode: Literal["hybrid", "lexical", "semantic"] = "hybrid"
    rrf_k: Count | None = Field(
        None,
        ge=1,
        le=10_000,
        description="Reciprocal rank fusion's k; the collection's (60 unless set)",
    )
    depth: Count = Field(100, ge=1)
    query_vector: list[float] | None = None
    infer_filter: InferMode | InferFilterIn = Field(
        "off",
        description="Infer a filter from the query: suggest reports it, apply also ANDs it with"
        " the request's filter",
    )


class ContextIn(SearchIn):
    token_budget: Count = Field(1000, ge=1)


class AnswerIn(ContextIn):
    generator: str | None = None


class Ranks(BaseModel):
    lexical: int | None = None
    semantic: int | None = None


class HitOut(BaseModel):
    chunk_id: str
    document_id: str
    title: str
    section: str
    text: str
    score: float
    ranks: Ranks
    attributes: dict[str, Any]


class InferredClauseOut(BaseModel):
    attribute: str
    op: str
    value: Any
    evidence: str
    source: str
    cql2_text: str


class DroppedClauseOut(BaseModel):
    clause: InferredClauseOut
    reason: str


class InferredFilterOut(BaseModel):
    cql2_text: str | None
    cql2_json: Any
    clauses: list[InferredClauseOut]
    dropped: list[DroppedClauseOut]
    using: Literal["deterministic", "chat-http"]
    fallback: str | None = None


class SearchOut(BaseModel):
    hits: list[HitOut]
    candidates: int
    trace_id: str
    inferred_filter: InferredFilterOut | None = None


class PassageOut(BaseModel):
    marker: int
    document_id: str
    title: str
    section: str
    sections: list[str]
    chunk_ids: list[str]
    text: str
    tokens: int
    char_start: int
    char_end: int


class ContextOut(BaseModel):
    context: str
    passages: list[PassageOut]
    tokens_used: int
    token_budget: int
    trace_id: str
    inferred_filter: InferredFilterOut | None = None


class CitationOut(BaseModel):
    marker: int
    document_id: str
    title: str
    section: str
    chunk_ids: list[str]
    source_url: str | None
    attributes: dict[str, Any]


class AnswerOut(BaseModel):
    answer: str | None
    reason: Literal["no_candidates", "insufficient_evidence"] | None = None
    citations: list[CitationOut]
    passages: list[PassageOut]
    generator: str
    caution: str | None = None
    trace_id: str
    inferred_filter: InferredFilterOut | None = None


class ExplainIn(AnswerIn):
    route: Literal["search", "context", "answer"] = Field(
        "search",
        description="Which request to explain; token_budget and generator apply to "
        "context and answer",
    )
    document_id: str | None = Field(None, description="Follow every chunk of this document")
    chunk_id: str | None = Field(None, description="Or follow this one chunk")
    as_key: str | None = Field(
        None, description="Admins only: explain as the key of this name sees the collection"
    )


class StandingOut(BaseModel):
    rank: int | None
    score: float | None


class RankingCutOut(BaseModel):
    stage: ExplainStage
    cut_at: int
    chunk_id: str | None
    rank: int | None
    score: float | None


class ClauseOut(BaseModel):
    source: Literal["filter", "time_window", "inferred_filter"]
    clause: str
    result: Literal["false", "unknown"]
    values: dict[str, Any]


class PackingOut(BaseModel):
    outcome: Literal["included", "merged", "budget", "duplicate"]
    marker: int | None
    duplicate_of: str | None
    passage_chunk_ids: list[str]
    tokens: int


class ConsideredSpanOut(BaseModel):
    marker: int
    text: str
    score: float
    chosen: bool


class AnswerFindingOut(BaseModel):
    answered: bool
    reason: str | None
    cited: bool
    spans: list[ConsideredSpanOut] | None


class ChunkExplanationOut(BaseModel):
    chunk_id: str
    ordinal: int
    section: str
    stage: ExplainStage | None = Field(
        description="The first stage that left the chunk out; null when it reached the response"
    )
    outcome: str
    reason: str
    clause: ClauseOut | None
    ranks: dict[str, StandingOut] | None
    packing: PackingOut | None
    answer: AnswerFindingOut | None


class ExplainOut(BaseModel):
    collection: str
    document_id: str
    route: Literal["search", "context", "answer"]
    mode: Literal["hybrid", "lexical", "semantic"]
    as_key: str | None
    candidates: int
    top_k: int
    depth: int
    token_budget: int | None
    cuts: list[RankingCutOut]
    inferred_filter: InferredFilterOut | None
    chunks: list[ChunkExplanationOut]


class TraceOut(BaseModel):
    model_config = ConfigDict(extra="allow")
    trace_id: str
    route: str
    collection: str
    created_at: dt.datetime
    request: dict[str, Any]
    stages: list[dict[str, Any]]


class TraceSummaryOut(BaseModel):
    trace_id: str
    created_at: dt.datetime
    route: Literal["search", "context", "answer"]
    collection: str
    query: str | None
    candidates: int | None = Field(description="Chunks that passed access, filter and time window")
    hits: int | None = Field(
        description="Chunks the response gave: search hits, or the chunks of its passages"
    )
    outcome: Literal["returned", "answered", "declined", "failed"] | None
    reason: str | None = Field(
        description="Why an answer was declined, or the error code of a failed request"
    )
    milliseconds: float | None


class TraceListOut(BaseModel):
    traces: list[TraceSummaryOut]
    next_cursor: str | None = Field(description="Pass as cursor for the next page; null at the end")


class HealthOut(BaseModel):
    status: str
    # Why the server is not ready, in one sentence; absent when it is.
    reason: str | None = None
