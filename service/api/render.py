"""The retrieval results in the contract's JSON shapes; the API sends them and the CLI's
``--json`` prints them, so both say the same thing."""

from __future__ import annotations

from typing import Any

from service.packing.packer import Passage
from service.usecases.answering import (
    AnswerResult,
    CitationView,
    ContextResult,
    HitView,
    SearchResult,
)
from service.usecases.explain import ChunkExplanation, Explanation, RankingCut, Standing
from service.usecases.inference import InferredFilter
from service.usecases.jobs import JobView
from service.usecases.traces import TracePage, TraceSummary


def hit_json(hit: HitView) -> dict[str, Any]:
    return {
        "chunk_id": hit.chunk_id,
        "document_id": hit.document_id,
        "title": hit.title,
        "section": hit.section,
        "text": hit.text,
        "score": hit.score,
        "ranks": {"lexical": hit.ranks.lexical, "semantic": hit.ranks.semantic},
        "attributes": dict(hit.attributes),
    }


def inferred_json(inferred: InferredFilter | None) -> dict[str, Any] | None:
    return None if inferred is None else inferred.as_json()


def search_json(result: SearchResult) -> dict[str, Any]:
    return {
        "hits": [hit_json(hit) for hit in result.hits],
        "candidates": result.candidates,
        "trace_id": result.trace_id,
        "inferred_filter": inferred_json(result.inferred_filter),
    }


def passage_json(passage: Passage) -> dict[str, Any]:
    return {
        "marker": passage.marker,
        "document_id": passage.document_id,
        "title": passage.title,
        "section": passage.section or "",
        "sections": list(passage.section_paths),
        "chunk_ids": list(passage.chunk_ids),
        "text": passage.text,
        "tokens": passage.tokens,
        "char_start": passage.char_start,
        "char_end": passage.char_end,
    }


def context_json(result: ContextResult) -> dict[str, Any]:
    return {
        "context": result.context,
        "passages": [passage_json(p) for p in result.passages],
        "tokens_used": result.tokens_used,
        "token_budget": result.token_budget,
        "trace_id": result.trace_id,
        "inferred_filter": inferred_json(result.inferred_filter),
    }


def citation_json(citation: CitationView) -> dict[str, Any]:
    return {
        "marker": citation.marker,
        "document_id": citation.document_id,
        "title": citation.title,
        "section": citation.section,
        "chunk_ids": list(citation.chunk_ids),
        "source_url": citation.source_url,
        "attributes": dict(citation.attributes),
    }


def answer_json(result: AnswerResult) -> dict[str, Any]:
    body: dict[str, Any] = {
        "answer": result.answer,
        "citations": [citation_json(c) for c in result.citations],
        "passages": [passage_json(p) for p in result.passages],
        "generator": result.generator,
        "caution": result.caution,
        "trace_id": result.trace_id,
        "inferred_filter": inferred_json(result.inferred_filter),
    }
    if result.reason is not None:
        body["reason"] = result.reason
    return body


def trace_summary_json(summary: TraceSummary) -> dict[str, Any]:
    return {
        "trace_id": summary.trace_id,
        "created_at": summary.created_at.isoformat(),
        "route": summary.route,
        "collection": summary.collection,
        "query": summary.query,
        "candidates": summary.candidates,
        "hits": summary.hits,
        "outcome": summary.outcome,
        "reason": summary.reason,
        "milliseconds": summary.milliseconds,
    }


def trace_page_json(page: TracePage) -> dict[str, Any]:
    return {
        "traces": [trace_summary_json(summary) for summary in page.traces],
        "next_cursor": page.next_cursor,
    }


def _standing_json(standing: Standing) -> dict[str, Any]:
    return {"rank": standing.rank, "score": standing.score}


def _cut_json(cut: RankingCut) -> dict[str, Any]:
    return {
        "stage": cut.stage,
        "cut_at": cut.cut_at,
        "chunk_id": cut.chunk_id,
        "rank": cut.rank,
        "score": cut.score,
    }


def _chunk_explanation_json(chunk: ChunkExplanation) -> dict[str, Any]:
    clause, packing, answer = chunk.clause, chunk.packing, chunk.answer
    return {
        "chunk_id": chunk.chunk_id,
        "ordinal": chunk.ordinal,
        "section": chunk.section,
        "stage": chunk.stage,
        "outcome": chunk.outcome,
        "reason": chunk.reason,
        "clause": None
        if clause is None
        else {
            "source": clause.source,
            "clause": clause.clause,
            "result": clause.result,
            "values": dict(clause.values),
        },
        "ranks": None
        if chunk.ranks is None
        else {name: _standing_json(standing) for name, standing in chunk.ranks.items()},
        "packing": None
        if packing is None
        else {
            "outcome": packing.outcome,
            "marker": packing.marker,
            "duplicate_of": packing.duplicate_of,
            "passage_chunk_ids": list(packing.passage_chunk_ids),
            "tokens": packing.tokens,
        },
        "answer": None
        if answer is None
        else {
            "answered": answer.answered,
            "reason": answer.reason,
            "cited": answer.cited,
            "spans": None
            if answer.spans is None
            else [
                {"marker": s.marker, "text": s.text, "score": s.score, "chosen": s.chosen}
                for s in answer.spans
            ],
        },
    }


def explanation_json(explanation: Explanation) -> dict[str, Any]:
    return {
        "collection": explanation.collection,
        "document_id": explanation.document_id,
        "route": explanation.route,
        "mode": explanation.mode,
        "as_key": explanation.as_key,
        "candidates": explanation.candidates,
        "top_k": explanation.top_k,
        "depth": explanation.depth,
        "token_budget": explanation.token_budget,
        "cuts": [_cut_json(cut) for cut in explanation.cuts],
        "inferred_filter": inferred_json(explanation.inferred_filter),
        "chunks": [_chunk_explanation_json(chunk) for chunk in explanation.chunks],
    }


def job_json(job: JobView) -> dict[str, Any]:
    return {
        "job_id": job.id,
        "collection": job.collection,
        "kind": job.kind,
        "state": job.state,
        "key": job.key,
        "counts": {
            "documents": job.counts.documents,
            "documents_done": job.counts.documents_done,
            "chunks": job.counts.chunks,
            "embedded": job.counts.embedded,
            "cached": job.counts.cached,
        },
        "results": list(job.results),
        "errors": list(job.errors),
        "error": job.failure,
        "cancel_requested": job.cancel_requested,
        "worker": job.worker,
        "created_at": job.created_at,
        "started_at": job.started_at,
        "finished_at": job.finished_at,
    }
