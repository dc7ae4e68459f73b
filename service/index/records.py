"""The one way a stored or freshly written chunk becomes an index row.

The registry builds rows from the store and from this process's own writes, and the benchmark
builds its collections with the same function, so chunk ids and the indexed text never differ
between the paths that make them.
"""

from __future__ import annotations

from typing import Protocol

import numpy as np

from service.attributes import AttributeValue
from service.index.analyzer import Analyzer
from service.index.collection_index import ChunkRecord


class ChunkFields(Protocol):
    """What a chunk carries wherever it comes from (a stored row or a chunk just made)."""

    @property
    def ordinal(self) -> int: ...
    @property
    def section(self) -> str: ...
    @property
    def text(self) -> str: ...
    @property
    def char_start(self) -> int: ...
    @property
    def char_end(self) -> int: ...
    @property
    def tokens(self) -> int: ...


def chunk_id(document_id: str, ordinal: int) -> str:
    """The contract's chunk id: ``<document id>#<ordinal, four digits or more>``."""
    return f"{document_id}#{ordinal:04d}"


def chunk_record(
    analyzer: Analyzer,
    *,
    document_id: str,
    title: str,
    attributes: dict[str, AttributeValue],
    access: tuple[str, ...],
    chunk: ChunkFields,
    vector: np.ndarray,
    source_url: str | None = None,
    gap_after: str = "",
) -> ChunkRecord:
    return ChunkRecord(
        chunk_id=chunk_id(document_id, chunk.ordinal),
        document_id=document_id,
        ordinal=chunk.ordinal,
        title=title,
        section=chunk.section,
        text=chunk.text,
        char_start=chunk.char_start,
        char_end=chunk.char_end,
        tokens=chunk.tokens,
        lexical_tokens=analyzer.indexed_tokens(title, chunk.section, chunk.text),
        vector=vector,
        attributes=attributes,
        access=access,
        source_url=source_url,
        gap_after=gap_after,
    )
