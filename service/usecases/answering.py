"""Search, context and answer: the three retrieval routes and the CLI's search and ask.

Each runs the same pipeline: candidate mask (filter AND time window AND access), rankings,
fusion; context adds the packer, answer adds a generator. Every stage is written to the trace
before the response leaves.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, cast

import numpy as np

from service.attributes import to_json_value
from service.errors import GeneratorUnavailable, InvalidRequest, LimitExceeded
from service.generation.base import GeneratedAnswer, Generator
from service.packing.packer import PackCandidate, PackedContext, pack_context
from service.retrieval.ranking import SemanticScan, begin_semantic_ranking
from service.retrieval.retrieve import Mode, RetrievalResult, retrieve
from service.store import repository
from service.usecases.callers import Caller, Role
from service.usecases.indexes import CollectionFacts, IndexView
from service.usecases.runtime import Runtime
from service.usecases.search import (
    SearchOptions,
    as_query_vector,
    build_candidate_filter,
    check_options,
    timed,
)
from service.usecases.traces import TraceRecorder

TRACE_TOP_ENTRIES = 20


@dataclass(frozen=True)
class Retrieval:
    facts: CollectionFacts
    view: IndexView
    result: RetrievalResult
    recorder: TraceRecorder


def _retrieve(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    route: str,
    extra_request: dict[str, Any] | None = None,
    *,
    whole_ranking: bool = False,
) -> Retrieval:
    """Run the pipeline; ``whole_ranking`` keeps every fused hit up to depth, for packing."""
    caller.require(Role.READER)
    check_options(options, runtime.settings, runtime.embedder.dimensions)
    caller.require_collection(collection)
    view = runtime.indexes.view(collection)
    recorder = TraceRecorder(route, collection, {**options.as_request(), **(extra_request or {})})

    started = time.perf_counter()
    candidate_filter = build_candidate_filter(options, view.facts.schema)
    # A trace counts only the rows its caller may see, like every other count.
    mask, visible_rows = view.candidates(candidate_filter.node, caller.visible_groups)
    candidates = int(np.count_nonzero(mask))
    recorder.stage(
        "filter", timed(started), candidates=candidates, rows=visible_rows, **candidate_filter.trace
    )

    semantic_scan: SemanticScan | None = None
    if options.mode != "lexical":
        embed_started = time.perf_counter()
        if options.query_vector is not None:
            query_vector = as_query_vector(options.query_vector)
        else:
            query_vector = runtime.embedder.embed_query(options.query)
        embed_milliseconds = timed(embed_started)
        # Begun before the trace notes and the query's analysis, which then run beside the scan;
        # begun later, inside retrieve, one client's median over HTTP was about 1 ms higher.
        semantic_scan = begin_semantic_ranking(view.snapshot, query_vector, candidates)
        recorder.stage(
            "query_embedding",
            embed_milliseconds,
            source="query_vector" if options.query_vector is not None else runtime.embedder.name,
        )
    query_tokens: list[str] = []
    if options.mode != "semantic":
        query_tokens = view.analyzer.tokens(options.query)
    result = retrieve(
        view.snapshot,
        query_tokens=query_tokens,
        query_vector=None,
        candidate_mask=mask,
        mode=cast(Mode, options.mode),
        top_k=max(options.depth, options.top_k) if whole_ranking else options.top_k,
        depth=max(options.depth, options.top_k),
        rrf_k=options.rrf_k,
        k1=view.k1 if options.k1 is None else options.k1,
        b=view.b if options.b is None else options.b,
        bm25_variant=view.bm25_variant,
        semantic_scan=semantic_scan,
    )
    for stage in result.stages:
        recorder.stage(
            stage.name,
            stage.milliseconds,
            counts=dict(stage.counts),
            top=[view.describe_entry(entry) for entry in stage.top[:TRACE_TOP_ENTRIES]],
        )
    return Retrieval(view.facts, view, result, recorder)


def _hit(view: IndexView, hit: Any) -> dict[str, Any]:
    row = view.row(hit.row)
    return {
        "chunk_id": row.chunk_id,
        "document_id": row.document_id,
        "title": row.title,
        "section": row.section,
        "text": row.text,
        "score": float(hit.score),
        "ranks": {"lexical": hit.ranks.get("lexical"), "semantic": hit.ranks.get("semantic")},
        "attributes": {k: to_json_value(v) for k, v in row.attributes.items()},
    }


def search(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    *,
    keep_trace: bool = True,
) -> dict[str, Any]:
    """The search route's body; evaluation passes ``keep_trace=False`` for its many queries."""
    retrieval = _retrieve(runtime, caller, collection, options, "search")
    hits = [_hit(retrieval.view, hit) for hit in retrieval.result.hits]
    candidates = retrieval.result.candidates
    if not keep_trace:
        return {"hits": hits, "candidates": candidates, "trace_id": ""}
    retrieval.recorder.save(
        runtime, caller, hits=[h["chunk_id"] for h in hits], candidates=candidates
    )
    return {"hits": hits, "candidates": candidates, "trace_id": retrieval.recorder.trace_id}


def _check_budget(runtime: Runtime, token_budget: int) -> None:
    if token_budget < 1:
        raise InvalidRequest("token_budget must be at least 1.", field="token_budget")
    if token_budget > runtime.settings.max_token_budget:
        raise LimitExceeded(
            f"token_budget may be at most {runtime.settings.max_token_budget}.",
            limit="token_budget",
        )


def _pack(
    runtime: Runtime, retrieval: Retrieval, token_budget: int, token_margin: float
) -> PackedContext:
    """Pack the fused ranking, best first, into the budget."""
    view = retrieval.view
    started = time.perf_counter()
    candidates = []
    for hit in retrieval.result.hits:
        row = view.row(hit.row)
        candidates.append(
            PackCandidate(
                chunk_id=row.chunk_id,
                document_id=row.document_id,
                title=row.title,
                section=row.section,
                text=row.text,
                ordinal=row.ordinal,
                char_start=row.char_start,
                char_end=row.char_end,
                score=float(hit.score),
                vector=view.vector(hit.row),
            )
        )
    collection_id = retrieval.facts.collection_id

    texts: dict[str, str | None] = {}

    def document_span(document_id: str, start: int, end: int) -> str | None:
        """The document's text over a merged span, read once per document and request."""
        if document_id not in texts:
            with runtime.transaction() as session:
                found = repository.documents_by_external_id(session, collection_id, [document_id])
                document = found.get(document_id)
                texts[document_id] = None if document is None else document.text
        text = texts[document_id]
        return None if text is None else text[start:end]

    packed = pack_context(
        candidates,
        token_budget=token_budget,
        count_tokens=runtime.embedder.tokens.count,
        token_margin=token_margin,
        document_span=document_span,
    )
    retrieval.recorder.stage(
        "packing",
        timed(started),
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
            }
            for o in packed.considered
        ],
    )
    return packed


def _passages(packed: PackedContext) -> list[dict[str, Any]]:
    return [
        {
            "marker": p.marker,
            "document_id": p.document_id,
            "title": p.title,
            "section": p.section,
            "chunk_ids": list(p.chunk_ids),
            "text": p.text,
            "tokens": p.tokens,
            "char_start": p.char_start,
            "char_end": p.char_end,
        }
        for p in packed.passages
    ]


def _context_body(packed: PackedContext, trace_id: str) -> dict[str, Any]:
    return {
        "context": packed.context,
        "passages": _passages(packed),
        "tokens_used": packed.tokens_used,
        "token_budget": packed.token_budget,
        "trace_id": trace_id,
    }


def build_context(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    token_budget: int,
) -> dict[str, Any]:
    _check_budget(runtime, token_budget)
    retrieval = _retrieve(
        runtime,
        caller,
        collection,
        options,
        "context",
        {"token_budget": token_budget},
        whole_ranking=True,
    )
    packed = _pack(runtime, retrieval, token_budget, 1.0)
    retrieval.recorder.save(runtime, caller, tokens_used=packed.tokens_used)
    return _context_body(packed, retrieval.recorder.trace_id)


def answer(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    options: SearchOptions,
    token_budget: int,
    generator_name: str | None,
) -> dict[str, Any]:
    _check_budget(runtime, token_budget)
    generator = runtime.generators.get(generator_name)
    retrieval = _retrieve(
        runtime,
        caller,
        collection,
        options,
        "answer",
        {"token_budget": token_budget, "generator": generator.name},
        whole_ranking=True,
    )
    facts = retrieval.facts
    recorder = retrieval.recorder
    body: dict[str, Any] = {
        "answer": None,
        "citations": [],
        "passages": [],
        "generator": generator.name,
        "caution": facts.answer_caution,
        "trace_id": recorder.trace_id,
    }
    if retrieval.result.candidates == 0 or not retrieval.result.hits:
        body["reason"] = "no_candidates"
        recorder.save(runtime, caller, reason="no_candidates")
        return body
    packed = _pack(runtime, retrieval, token_budget, generator.token_margin)
    body["passages"] = _passages(packed)
    try:
        generated = _generate(generator, options.query, packed, recorder)
    except GeneratorUnavailable as exc:
        recorder.save(runtime, caller, generator_error=exc.message)
        raise GeneratorUnavailable(
            exc.message, context=_context_body(packed, recorder.trace_id)
        ) from exc
    if generated.answer is None:
        body["reason"] = generated.reason or "insufficient_evidence"
        recorder.save(runtime, caller, reason=body["reason"])
        return body
    body["answer"] = generated.answer
    body["citations"] = _citations(runtime, facts, packed, generated)
    recorder.save(runtime, caller, markers=list(generated.markers_used))
    return body


def _generate(
    generator: Generator, question: str, packed: PackedContext, recorder: TraceRecorder
) -> GeneratedAnswer:
    started = time.perf_counter()
    try:
        generated = generator.generate(question, packed.passages)
    except GeneratorUnavailable as exc:
        recorder.stage("generation", timed(started), generator=generator.name, error=exc.message)
        raise
    recorder.stage(
        "generation",
        timed(started),
        generator=generator.name,
        evidence_score=generated.evidence_score,
        markers_used=list(generated.markers_used),
        notes=list(generated.notes),
        declined=generated.answer is None,
    )
    return generated


def _citations(
    runtime: Runtime, facts: CollectionFacts, packed: PackedContext, generated: GeneratedAnswer
) -> list[dict[str, Any]]:
    by_marker = {p.marker: p for p in packed.passages}
    used = [by_marker[m] for m in sorted(set(generated.markers_used)) if m in by_marker]
    with runtime.transaction() as session:
        documents = repository.documents_by_external_id(
            session, facts.collection_id, sorted({p.document_id for p in used})
        )
    citations = []
    for passage in used:
        document = documents.get(passage.document_id)
        attributes = {} if document is None else document.attributes
        citations.append(
            {
                "marker": passage.marker,
                "document_id": passage.document_id,
                "title": passage.title,
                "section": passage.section,
                "chunk_ids": list(passage.chunk_ids),
                "source_url": None if document is None else document.source_url,
                "attributes": {
                    name: attributes[name] for name in facts.cite_attributes if name in attributes
                },
            }
        )
    return citations
