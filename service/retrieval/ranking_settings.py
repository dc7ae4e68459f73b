"""The settings of the steps a hybrid query may take beyond plain fusion (see
``service.retrieval.refinement`` for the methods and their sources). They import nothing of the
service, so a collection's view can carry them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

FusionMethod = Literal["rrf", "min_max", "z_score"]
FUSION_METHODS: tuple[FusionMethod, ...] = ("rrf", "min_max", "z_score")
FeedbackSource = Literal["own", "fused"]
FEEDBACK_SOURCES: tuple[FeedbackSource, ...] = ("own", "fused")


@dataclass(frozen=True, kw_only=True)
class LexicalFeedback:
    """RM3: ``chunks`` feedback chunks, ``terms`` expansion terms, and the original query's
    share ``query_weight`` of the interpolated query. An expansion term in more than
    ``max_share`` of the live chunks is not taken (1 takes every term)."""

    chunks: int = 10
    terms: int = 10
    query_weight: float = 0.5
    max_share: float = 1.0

    def __post_init__(self) -> None:
        if (
            self.chunks < 1
            or self.terms < 1
            or not 0.0 <= self.query_weight <= 1.0
            or not 0.0 <= self.max_share <= 1.0
        ):
            raise ValueError(
                "lexical feedback needs chunks, terms >= 1 and its weight and share from 0 to 1"
            )


@dataclass(frozen=True, kw_only=True)
class SemanticFeedback:
    """Rocchio: the mean vector of the top ``chunks`` is added with ``weight``."""

    chunks: int = 5
    weight: float = 0.5

    def __post_init__(self) -> None:
        if self.chunks < 1 or not self.weight >= 0.0:
            raise ValueError("semantic feedback needs chunks >= 1 and weight >= 0")


@dataclass(frozen=True, kw_only=True)
class RankingSettings:
    """How a hybrid query ranks beyond the two plain rankings; None or 0 switches a step off.

    ``semantic_weight`` is the semantic ranking's share of the fusion (0.5: both count the
    same; plain reciprocal rank fusion is ``fusion="rrf"`` at 0.5); ``rrf_k`` is the fusion's k
    where a request names none. ``feedback_source`` says where both feedback steps take their
    chunks: ``own``, each from its own first ranking; ``fused``, both from the fusion of the two
    first rankings.
    """

    fusion: FusionMethod = "rrf"
    rrf_k: int = 60
    semantic_weight: float = 0.5
    lexical_feedback: LexicalFeedback | None = None
    semantic_feedback: SemanticFeedback | None = None
    feedback_source: FeedbackSource = "own"
    second_chunk_weight: float = 0.0

    def __post_init__(self) -> None:
        if self.fusion not in FUSION_METHODS:
            raise ValueError(f"unknown fusion {self.fusion!r}")
        if self.feedback_source not in FEEDBACK_SOURCES:
            raise ValueError(f"unknown feedback source {self.feedback_source!r}")
        if self.rrf_k < 1:
            raise ValueError("rrf_k must be at least 1")
        if not 0.0 <= self.semantic_weight <= 1.0:
            raise ValueError("semantic_weight must lie in [0, 1]")
        if not 0.0 <= self.second_chunk_weight <= 1.0:
            raise ValueError("second_chunk_weight must lie in [0, 1]")

    def fusion_weights(self) -> tuple[float, float]:
        """Lexical and semantic weights; both 1 at an even split, as plain fusion adds."""
        return 2.0 * (1.0 - self.semantic_weight), 2.0 * self.semantic_weight


PLAIN_FUSION = RankingSettings()
