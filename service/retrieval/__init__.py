"""Candidate masks, lexical and semantic rankings of the candidates, and their fusion."""

from service.retrieval.access import access_mask
from service.retrieval.ranking import Ranking, fuse_rrf, lexical_ranking, semantic_ranking
from service.retrieval.retrieve import (
    Hit,
    Mode,
    RetrievalResult,
    StageTrace,
    TraceEntry,
    retrieve,
)

__all__ = [
    "Hit",
    "Mode",
    "Ranking",
    "RetrievalResult",
    "StageTrace",
    "TraceEntry",
    "access_mask",
    "fuse_rrf",
    "lexical_ranking",
    "retrieve",
    "semantic_ranking",
]
