"""The in-memory index of a collection: analyzer, BM25 postings, vectors, snapshots."""

from service.index.analyzer import Analyzer, english_stopwords
from service.index.collection_index import (
    ChunkRecord,
    CollectionIndex,
    IndexedChunk,
    IndexSnapshot,
)
from service.index.lexical import Bm25Variant, LexicalIndex
from service.index.vectors import Metric, VectorMatrix

__all__ = [
    "Analyzer",
    "Bm25Variant",
    "ChunkRecord",
    "CollectionIndex",
    "IndexSnapshot",
    "IndexedChunk",
    "LexicalIndex",
    "Metric",
    "VectorMatrix",
    "english_stopwords",
]
