"""Search, context and answer: the three retrieval routes and the CLI's search and ask.

Each checks its request once (``search.check_limits`` and ``prepare_query``), runs the one
retrieval entry over the collection's current snapshot, and returns a typed result that the API
renders and the CLI prints; context adds the packer, answer adds a generator. Every stage is
recorded in the trace before the result is returned.
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from service.attributes import to_json_value
from service.errors import GeneratorUnavailable, InvalidRequest, LimitExceeded
from service.generation.base import AnswerSupport, GeneratedAnswer, Generator, cited_sentences
from service.index.collection_index import IndexSnapshot
from service.index.view import IndexView
from service.packing.citing import section_at, section_of_quote
from service.packing.packer import PackCandidate, PackedContext, Passage, pack_context
from service.retrieval.query import Hit, RetrievalResult, retrieve
from service.usecases.answer_support import answer_support
from service.usecases.callers import Caller, Role
from service.usecases.inference import InferredFilter
from service.usecases.runtime import Runtime
from service.usecases.search import (
    QUERY_VECTOR_SOURCE,
    PreparedQuery,
    SearchOptions,
    check_limits,
    prepare_query,
)
from service.usecases.traces import TraceRecorder


@dataclass(frozen=True)
class Ranks:
    lexical: int | None
    semantic: int | None


@dataclass(frozen=True)
class HitView:
    chunk_id: str
    document_id: str
    title: str
    section: str
    text: str
    score: float
    ranks: Ranks
    attributes: Mapping[str, Any]


@dataclass(frozen=True)
class SearchResult:
    hits: tuple[HitView, ...]
    candidates: int
    trace_id: str
    inferred_filter: InferredFilter | None = None


@dataclass(frozen=True)
class ContextResult:
    context: str
    passages: tuple[Passage, ...]
    tokens_used: int
    token_budget: int
    trace_id: str
    inferred_filter: InferredFilter | None = None


@dataclass(frozen=True)
class CitationView:
    marker: int
    document_id: str
    title: str
    section: str
    chunk_ids: tuple[str, ...]
    source_url: str | None
    attributes: Mapping[str, Any]


@dataclass(frozen=True)
class AnswerResult:
    """``answer`` is None when declined, with ``reason`` saying why."""

    answer: str | None
    reason: str | None
    citations: tuple[CitationView, ...]
    passages: tuple[Passage, ...]
    generator: str
    caution: str | None
    trace_id: str
    inferred_filter: InferredFilter | None = None


@dataclass(frozen=True)
class QueryRun:
    """A request checked and run through the retrieval core, as every route and explain run it."""

    view: IndexView
    prepared: PreparedQuery
    result: RetrievalResult


def run_query(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    groups: frozenset[str] | None,
    *,
    whole_ranking: bool,
) -> QueryRun:
    """Check the request against the limits and the caller's collections, then retrieve with
    ``groups`` deciding what is seen (the caller's own, or another key's for explain)."""
    caller.require(Role.READER)
    check_limits(options, runtime.settings, runtime.embedder.dimensions)
    caller.require_collection(collection)
    view = runtime.indexes.view(collection)
    using_chat = options.infer_filter.active and options.infer_filter.using == "chat-http"
    prepared = prepare_query(
        options,
        view,
        runtime.query_embedder,
        groups,
        whole_ranking=whole_ranking,
        proposer=runtime.generators.filter_proposer() if using_chat else None,
    )
    return QueryRun(view, prepared, retrieve(view.snapshot, prepared.retrieval))


def support_for(run: QueryRun, question: str, passages: Sequence[Passage]) -> AnswerSupport | None:
    """What a span-scoring generator reads beside the passages; None for a vector-only query."""
    if not question.strip():
        return None
    query = run.prepared.retrieval
    return answer_support(run.view, passages, query.vector, query.filter)


@dataclass(frozen=True)
class _Retrieval:
    run: QueryRun
    recorder: TraceRecorder

    @property
    def view(self) -> IndexView:
        return self.run.view

    @property
    def result(self) -> RetrievalResult:
        return self.run.result

    @property
    def inferred(self) -> InferredFilter | None:
        return self.run.prepared.inferred


def _retrieve(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    recorder: TraceRecorder,
    *,
    whole_ranking: bool,
) -> _Retrieval:
    """Run the query and record its stages."""
    run = run_query(
        runtime, caller, collection, options, caller.visible_groups, whole_ranking=whole_ranking
    )
    prepared = run.prepared
    for stage in run.result.stages:
        notes = prepared.filter_notes if stage.name == "filter" else {}
        recorder.retrieval_stage(stage, **notes)
        if stage.name == "filter" and prepared.embedding_milliseconds is not None:
            recorder.stage(
                "query_embedding",
                prepared.embedding_milliseconds,
                source=prepared.embedding_source,
            )
    return _Retrieval(run, recorder)


def _finish(runtime: Runtime, caller: Caller, retrieval: _Retrieval, **summary: Any) -> None:
    """Hand the trace to the writer and count the query's stages, candidates and hits, and
    the model's time for the question (unless the request sent its own vector)."""
    recorder = retrieval.recorder
    recorder.save(runtime.traces, caller, **summary)
    metrics = runtime.metrics
    metrics.observe_query(
        recorder.route,
        [(stage["stage"], stage["milliseconds"]) for stage in recorder.stages],
        candidates=retrieval.result.candidates,
        hits=len(retrieval.result.hits),
    )
    for stage in recorder.stages:
        if stage["stage"] == "query_embedding" and stage["source"] != QUERY_VECTOR_SOURCE:
            metrics.observe_embedding("query", 1, stage["milliseconds"] / 1000.0)


def _hit(view: IndexView, row: int, score: float, ranks: Mapping[str, int | None]) -> HitView:
    chunk = view.snapshot.record(row)
    return HitView(
        chunk_id=chunk.chunk_id,
        document_id=chunk.document_id,
        title=chunk.title,
        section=chunk.section,
        text=chunk.text,
        score=score,
        ranks=Ranks(ranks.get("lexical"), ranks.get("semantic")),
        attributes={k: to_json_value(v) for k, v in chunk.attributes.items()},
    )


def search(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    *,
    keep_trace: bool = True,
) -> SearchResult:
    """The search route's result; evaluation passes ``keep_trace=False`` for its many queries."""
    recorder = TraceRecorder("search", collection, options.as_request())
    if not keep_trace:
        retrieval = _retrieve(runtime, caller, collection, options, recorder, whole_ranking=False)
        hits = tuple(_hit(retrieval.view, h.row, h.score, h.ranks) for h in retrieval.result.hits)
        return SearchResult(hits, retrieval.result.candidates, "", retrieval.inferred)
    with recorder.failures_kept(runtime.traces, caller):
        retrieval = _retrieve(runtime, caller, collection, options, recorder, whole_ranking=False)
        hits = tuple(_hit(retrieval.view, h.row, h.score, h.ranks) for h in retrieval.result.hits)
        candidates = retrieval.result.candidates
        _finish(
            runtime,
            caller,
            retrieval,
            outcome="returned",
            hit_count=len(hits),
            hits=[h.chunk_id for h in hits],
            candidates=candidates,
        )
    return SearchResult(hits, candidates, recorder.trace_id, retrieval.inferred)


def check_budget(runtime: Runtime, token_budget: int) -> None:
    if token_budget < 1:
        raise InvalidRequest("token_budget must be at least 1.", field="token_budget")
    if token_budget > runtime.settings.max_token_budget:
        raise LimitExceeded(
            f"token_budget may be at most {runtime.settings.max_token_budget}.",
            limit="token_budget",
        )


def pack_candidates(snapshot: IndexSnapshot, hits: Sequence[Hit]) -> list[PackCandidate]:
    """The packer's view of ranked hits: each chunk's text, place, stored token count and
    vector, read from the snapshot the hits came from (the bench packs the same way)."""
    rows = [hit.row for hit in hits]
    columns = zip(
        snapshot.chunk_ids.take(rows),
        snapshot.document_ids.take(rows),
        snapshot.titles.take(rows),
        snapshot.sections.take(rows),
        snapshot.texts.take(rows),
        snapshot.ordinals[rows].tolist(),
        snapshot.char_starts[rows].tolist(),
        snapshot.char_ends[rows].tolist(),
        snapshot.token_counts[rows].tolist(),
        strict=True,
    )
    vectors = snapshot.vectors.rows
    return [
        PackCandidate(
            chunk_id=chunk_id,
            document_id=document_id,
            title=title,
            section=section,
            text=text,
            ordinal=ordinal,
            char_start=start,
            char_end=end,
            score=hit.score,
            vector=vectors[hit.row],
            tokens=tokens,
        )
        for hit, (chunk_id, document_id, title, section, text, ordinal, start, end, tokens) in zip(
            hits, columns, strict=True
        )
    ]


def pack_hits(
    runtime: Runtime,
    snapshot: IndexSnapshot,
    hits: Sequence[Hit],
    token_budget: int,
    token_margin: float,
) -> PackedContext:
    """The packer over ranked hits, as context and answer run it (explain too)."""
    # Merged spans come from the snapshot that ranked the chunks, never from the store, which
    # may hold a newer version of the document by now.
    return pack_context(
        pack_candidates(snapshot, hits),
        token_budget=token_budget,
        count_tokens=runtime.embedder.tokens.count,
        token_margin=token_margin,
        document_span=snapshot.document_span,
    )


def _pack(
    runtime: Runtime, retrieval: _Retrieval, token_budget: int, token_margin: float
) -> PackedContext:
    """Pack the fused ranking, best first, into the budget."""
    started = time.perf_counter()
    packed = pack_hits(
        runtime, retrieval.view.snapshot, retrieval.result.hits, token_budget, token_margin
    )
    retrieval.recorder.stage(
        "packing",
        (time.perf_counter() - started) * 1000.0,
        counts={
            "considered": len(packed.considered),
            "passages": len(packed.passages),
            "tokens_used": packed.tokens_used,
            "token_budget": token_budget,
            "token_margin": token_margin,
        },
        chunks=[
            {
                "chunk_id": o.chunk_id,
                "outcome": o.outcome,
                "marker": o.marker,
                "score": o.score,
                "duplicate_of": o.duplicate_of,
            }
            for o in packed.considered
        ],
    )
    return packed


def _context_result(
    packed: PackedContext, trace_id: str, inferred: InferredFilter | None
) -> ContextResult:
    return ContextResult(
        context=packed.context,
        passages=packed.passages,
        tokens_used=packed.tokens_used,
        token_budget=packed.token_budget,
        trace_id=trace_id,
        inferred_filter=inferred,
    )


def build_context(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    token_budget: int,
) -> ContextResult:
    recorder = TraceRecorder(
        "context", collection, {**options.as_request(), "token_budget": token_budget}
    )
    with recorder.failures_kept(runtime.traces, caller):
        check_budget(runtime, token_budget)
        retrieval = _retrieve(runtime, caller, collection, options, recorder, whole_ranking=True)
        packed = _pack(runtime, retrieval, token_budget, 1.0)
        _finish(
            runtime,
            caller,
            retrieval,
            outcome="returned",
            hit_count=_chunk_count(packed.passages),
            tokens_used=packed.tokens_used,
        )
    return _context_result(packed, recorder.trace_id, retrieval.inferred)


def _chunk_count(passages: Sequence[Passage]) -> int:
    return sum(len(passage.chunk_ids) for passage in passages)


def answer(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    token_budget: int,
    generator_name: str | None,
) -> AnswerResult:
    generator = runtime.generators.get(generator_name)
    recorder = TraceRecorder(
        "answer",
        collection,
        {**options.as_request(), "token_budget": token_budget, "generator": generator.name},
    )
    with recorder.failures_kept(runtime.traces, caller):
        check_budget(runtime, token_budget)
        return _answer(runtime, caller, collection, options, token_budget, generator, recorder)


def _answer(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    token_budget: int,
    generator: Generator,
    recorder: TraceRecorder,
) -> AnswerResult:
    retrieval = _retrieve(runtime, caller, collection, options, recorder, whole_ranking=True)
    facts = retrieval.view.facts

    def declined(reason: str, passages: tuple[Passage, ...] = ()) -> AnswerResult:
        _finish(
            runtime,
            caller,
            retrieval,
            outcome="declined",
            hit_count=_chunk_count(passages),
            reason=reason,
        )
        runtime.metrics.observe_answer(reason)
        return AnswerResult(
            answer=None,
            reason=reason,
            citations=(),
            passages=passages,
            generator=generator.name,
            caution=facts.answer_caution,
            trace_id=recorder.trace_id,
            inferred_filter=retrieval.inferred,
        )

    if retrieval.result.candidates == 0 or not retrieval.result.hits:
        return declined("no_candidates")
    packed = _pack(runtime, retrieval, token_budget, generator.token_margin)
    try:
        generated = _generate(generator, options.query, packed, retrieval)
    except GeneratorUnavailable as exc:
        _finish(
            runtime,
            caller,
            retrieval,
            outcome="failed",
            hit_count=None,
            reason=exc.code,
            generator_error=exc.message,
        )
        raise GeneratorUnavailable(
            exc.message, context=_context_result(packed, recorder.trace_id, retrieval.inferred)
        ) from exc
    if generated.answer is None:
        return declined(generated.reason or "insufficient_evidence", packed.passages)
    _finish(
        runtime,
        caller,
        retrieval,
        outcome="answered",
        hit_count=_chunk_count(packed.passages),
        markers=list(generated.markers_used),
    )
    runtime.metrics.observe_answer(None)
    return AnswerResult(
        answer=generated.answer,
        reason=None,
        citations=_citations(retrieval.view, packed, generated),
        passages=packed.passages,
        generator=generator.name,
        caution=facts.answer_caution,
        trace_id=recorder.trace_id,
        inferred_filter=retrieval.inferred,
    )


def _generate(
    generator: Generator, question: str, packed: PackedContext, retrieval: _Retrieval
) -> GeneratedAnswer:
    """Run the generator and record its stage: for one that scores spans, the spans it
    considered with each part of their scores, its threshold and why it answered or not."""
    recorder = retrieval.recorder
    started = time.perf_counter()
    try:
        generated = generator.generate(
            question, packed.passages, support_for(retrieval.run, question, packed.passages)
        )
    except GeneratorUnavailable as exc:
        recorder.stage(
            "generation",
            (time.perf_counter() - started) * 1000.0,
            generator=generator.name,
            error=exc.message,
        )
        raise
    recorder.stage(
        "generation",
        (time.perf_counter() - started) * 1000.0,
        generator=generator.name,
        evidence_score=generated.evidence_score,
        markers_used=list(generated.markers_used),
        notes=list(generated.notes),
        declined=generated.answer is None,
        **(
            {
                "threshold": generated.threshold,
                "decision": generated.decision,
                "candidates": [span.as_trace() for span in generated.considered],
            }
            if generated.threshold is not None
            else {}
        ),
    )
    return generated


def _citations(
    view: IndexView, packed: PackedContext, generated: GeneratedAnswer
) -> tuple[CitationView, ...]:
    """Citations of the markers used, each document's source and attributes as of the snapshot
    the passages came from, and the section its first quote lies in: for a generator that
    reports the spans it quoted, where that span starts in the document (exact, also for a
    table row quoted with its header or a sentence widened past the passage); otherwise where
    the first sentence citing it is found in the passage's words."""
    by_marker = {p.marker: p for p in packed.passages}
    used = [by_marker[m] for m in sorted(set(generated.markers_used)) if m in by_marker]
    quotes = cited_sentences(generated.answer or "")
    first_quoted: dict[int, int] = {}
    for span in generated.quoted:  # in the answer's order
        first_quoted.setdefault(span.marker, span.start)
    snapshot = view.snapshot
    cited = view.facts.cite_attributes
    citations = []
    for passage in used:
        rows = snapshot.rows_of(passage.document_id)
        attributes = snapshot.attributes[int(rows[0])] if len(rows) else {}
        citations.append(
            CitationView(
                marker=passage.marker,
                document_id=passage.document_id,
                title=passage.title,
                section=(
                    section_at(passage, first_quoted[passage.marker])
                    if passage.marker in first_quoted
                    else section_of_quote(passage, quotes.get(passage.marker, ("",))[0])
                ),
                chunk_ids=passage.chunk_ids,
                source_url=snapshot.source_url(passage.document_id),
                attributes={
                    name: to_json_value(attributes[name]) for name in cited if name in attributes
                },
            )
        )
    return tuple(citations)
