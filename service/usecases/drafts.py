"""Documents on their way into the store: validated, parsed, chunked and embedded.

Ingest and the background re-chunking share these steps, and the index registry applies a
write's drafts directly; none of them needs the runtime, only the embedder (and a session for
the embedding cache: read while a batch is prepared, written by the write itself).
"""

from __future__ import annotations

import hashlib
import json
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from service.attributes import AttributeValue
from service.embedding.base import Embedder, text_hash
from service.ingest.chunking import chunk_document
from service.ingest.embedding_text import embedding_input
from service.ingest.parsing import parse_document
from service.store import repository
from service.store.tables import DocumentRow


@dataclass(frozen=True)
class PreparedDocument:
    """A validated document: normalised values plus the hash that makes re-sends no-ops."""

    index: int
    external_id: str
    title: str
    media_type: str
    source_url: str | None
    source_text: str
    attributes: dict[str, AttributeValue]
    attributes_json: dict[str, Any]
    access: tuple[str, ...]
    content_hash: str


@dataclass(frozen=True)
class ChunkDraft:
    ordinal: int
    text: str
    char_start: int
    char_end: int
    tokens: int
    section: str
    embedded_text: str
    embedded_text_hash: str


@dataclass(frozen=True)
class MaterialisedDocument:
    prepared: PreparedDocument
    text: str
    sections: list[list[Any]]
    chunks: tuple[ChunkDraft, ...]


def content_hash(
    *,
    title: str,
    text: str,
    media_type: str,
    source_url: str | None,
    attributes_json: Mapping[str, Any],
    access: Sequence[str],
) -> str:
    """What makes two sends of a document the same: every field the caller wrote, normalised."""
    canonical = json.dumps(
        [title, text, media_type, source_url, dict(attributes_json), list(access)],
        ensure_ascii=False,
        sort_keys=True,
    )
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def materialise(
    embedder: Embedder, prepared: PreparedDocument, chunking: Mapping[str, int]
) -> MaterialisedDocument:
    """Parse and chunk a document and compute the text each chunk is embedded as."""
    parsed = parse_document(prepared.source_text, prepared.media_type)
    counter = embedder.tokens
    spans = chunk_document(
        parsed,
        counter,
        max_tokens=chunking["max_tokens"],
        overlap_tokens=chunking["overlap_tokens"],
    )
    drafts = []
    for span in spans:
        embedded = embedding_input(
            prepared.title,
            span.section,
            span.text,
            counter,
            embedder.window - embedder.special_tokens,
        )
        drafts.append(
            ChunkDraft(
                ordinal=span.ordinal,
                text=span.text,
                char_start=span.char_start,
                char_end=span.char_end,
                tokens=span.tokens,
                section=span.section,
                embedded_text=embedded,
                embedded_text_hash=text_hash(embedded),
            )
        )
    sections = [[s.start, s.end, list(s.path)] for s in parsed.sections]
    return MaterialisedDocument(prepared, parsed.text, sections, tuple(drafts))


@dataclass(frozen=True)
class Vectors:
    """A batch's vectors: ``cached`` as the store holds them, ``fresh`` just made by the model
    in ``model_seconds``."""

    cached: dict[str, np.ndarray]
    fresh: dict[str, np.ndarray]
    model_seconds: float = 0.0

    def stored(self, session: Session, embedder: str) -> dict[str, np.ndarray]:
        """Store the fresh vectors inside a write and return every vector as the store keeps it.

        Each goes in with "insert, or keep the row already there" and is read back: when another
        writer stored the same text at the same moment, every index uses the one vector kept.
        """
        if not self.fresh:
            return self.cached
        repository.store_embeddings(session, embedder, self.fresh)
        return {**self.cached, **repository.cached_embeddings(session, embedder, list(self.fresh))}


def embed_drafts(embedder: Embedder, session: Session, drafts: Sequence[ChunkDraft]) -> Vectors:
    """Vectors for every draft: from the cache (read in ``session``) where the text was seen,
    else from the model; the new ones are stored later, by the write (``Vectors.stored``)."""
    cached = repository.cached_embeddings(
        session, embedder.name, [d.embedded_text_hash for d in drafts]
    )
    missing: dict[str, str] = {}
    for draft in drafts:
        if draft.embedded_text_hash not in cached:
            missing.setdefault(draft.embedded_text_hash, draft.embedded_text)
    started = time.perf_counter()
    fresh = embedder.embed_documents(list(missing.values())) if missing else ()
    return Vectors(cached, dict(zip(missing, fresh, strict=True)), time.perf_counter() - started)


def prepared_from_row(row: DocumentRow) -> PreparedDocument:
    """The stored form of a document, for re-chunking without the caller."""
    return PreparedDocument(
        index=0,
        external_id=row.external_id,
        title=row.title,
        media_type=row.media_type,
        source_url=row.source_url,
        source_text=row.source_text,
        attributes={},
        attributes_json=dict(row.attributes),
        access=tuple(row.access),
        content_hash=row.content_hash,
    )


def chunk_rows(material: MaterialisedDocument) -> list[dict[str, Any]]:
    return [
        {
            "ordinal": c.ordinal,
            "text": c.text,
            "char_start": c.char_start,
            "char_end": c.char_end,
            "tokens": c.tokens,
            "section": c.section,
            "embedded_text_hash": c.embedded_text_hash,
        }
        for c in material.chunks
    ]
