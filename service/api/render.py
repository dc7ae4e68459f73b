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
from service.usecases.inference import InferredFilter
from service.usecases.jobs import JobView


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
