"""What the evaluation backends share: chunk hits seen as a ranking of documents, and the
settings a system ran with.

Search ranks chunks; the measures rank documents. A document's place is that of its best
chunk, so a backend asks for more chunks until enough distinct documents are ranked.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

ChunkHits = Sequence[tuple[str, float]]
"""One search's hits as (document id, score), best first."""


def documents_from_hits(hits: ChunkHits, depth: int) -> list[tuple[str, float]]:
    """Documents in the order of their best chunk, with that chunk's score."""
    ranked: dict[str, float] = {}
    for document_id, score in hits:
        ranked.setdefault(document_id, float(score))
        if len(ranked) >= depth:
            break
    return list(ranked.items())


class DocumentRanking:
    """Asks ``search`` (chunks wanted -> hits) for more chunks until ``depth`` distinct
    documents are ranked or none are left."""

    def __init__(self, search: Callable[[int], ChunkHits], chunk_limit: int) -> None:
        self._search = search
        self._chunk_limit = chunk_limit

    def rank(self, depth: int) -> list[tuple[str, float]]:
        chunks = min(depth * 2, self._chunk_limit)
        while True:
            hits = self._search(chunks)
            documents = documents_from_hits(hits, depth)
            exhausted = len(hits) < chunks or chunks >= self._chunk_limit
            if len(documents) >= depth or exhausted:
                return documents
            chunks = min(chunks * 2, self._chunk_limit)


def settings_in_effect(
    collection: Mapping[str, Any], settings: Mapping[str, object]
) -> dict[str, object]:
    """A system's settings: its own ``--set`` values over the collection's (as the API shows
    a collection)."""
    retrieval = {**collection["retrieval"], **settings}
    return {
        **retrieval,
        "rrf_k": settings.get("rrf_k", collection["retrieval"].get("rrf_k", 60)),
        "chunking": collection["chunking"],
        "embedder": collection["embedder"],
        "tokenizer": collection["tokenizer"],
    }
