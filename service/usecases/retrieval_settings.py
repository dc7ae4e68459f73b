"""A collection's ranking settings as stored (``settings.retrieval``): their defaults, their one
check (a caller's bad value is a 422 naming the field), and the typed values the index and the
retrieval core take from them.

Each step beyond plain fusion is switched off by its zero: ``lexical_feedback_chunks``,
``semantic_feedback_chunks`` and ``second_chunk_weight`` at 0, ``fusion`` ``rrf`` with
``semantic_weight`` 0.5, ``title_weight`` and ``section_weight`` at 1, ``feedback_source``
``own`` (each feedback step from its own first ranking, not from their fusion).

The defaults take the two feedback steps, with the parameters their sources made common (RM3:
10 feedback chunks, 10 terms, the original query at 0.5; Rocchio: the 5 best chunks at 0.5),
and leave the rest at plain fusion: on the development collections (Cranfield and MED, see
docs/ranking-quality.md) those two raised nDCG@10 on both, while the other steps helped one
collection only or changed what the lexical mode's scores mean (field weights). Taking both
feedback steps' chunks from the fused first ranking (``feedback_source`` ``fused``) lowered both.
RM3 takes no expansion term found in more than a tenth of the live chunks
(``lexical_feedback_max_share``; 1 takes every term): such terms carry little evidence and cost
the longest posting lists, and leaving them out raised nDCG@10 a little on both collections.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, cast

from service.errors import InvalidRequest
from service.index.analyzer import Analyzer, english_stopwords
from service.index.lexical import DEFAULT_B, DEFAULT_K1, Bm25Variant, LexicalScoring
from service.retrieval.ranking_settings import (
    FEEDBACK_SOURCES,
    FUSION_METHODS,
    FeedbackSource,
    FusionMethod,
    LexicalFeedback,
    RankingSettings,
    SemanticFeedback,
)

DEFAULT_RETRIEVAL: dict[str, Any] = {
    "bm25": "smoothed",
    "k1": DEFAULT_K1,
    "b": DEFAULT_B,
    "metric": "cosine",
    "stemming": True,
    "stopwords": True,
    "title_weight": 1,
    "section_weight": 1,
    "lexical_feedback_chunks": 10,
    "lexical_feedback_terms": 10,
    "lexical_feedback_query_weight": 0.5,
    "lexical_feedback_max_share": 0.1,
    "semantic_feedback_chunks": 5,
    "semantic_feedback_weight": 0.5,
    "feedback_source": "own",
    "fusion": "rrf",
    "rrf_k": 60,
    "semantic_weight": 0.5,
    "second_chunk_weight": 0.0,
}
"""Every setting with its default; a collection stored before a setting existed reads it."""

_NUMBERS: dict[str, tuple[float, float]] = {
    "k1": (0.0, 10.0),
    "b": (0.0, 1.0),
    "lexical_feedback_query_weight": (0.0, 1.0),
    "lexical_feedback_max_share": (0.0, 1.0),
    "semantic_feedback_weight": (0.0, 4.0),
    "semantic_weight": (0.0, 1.0),
    "second_chunk_weight": (0.0, 1.0),
}
_INTEGERS: dict[str, tuple[int, int]] = {
    "title_weight": (1, 5),
    "section_weight": (1, 5),
    "lexical_feedback_chunks": (0, 100),
    "lexical_feedback_terms": (1, 100),
    "semantic_feedback_chunks": (0, 100),
    "rrf_k": (1, 10_000),
}


def checked_retrieval(raw: Mapping[str, Any], current: Mapping[str, Any]) -> dict[str, Any]:
    """The stored settings after a PUT: ``raw`` over ``current`` over the defaults."""
    unknown = set(raw) - set(DEFAULT_RETRIEVAL)
    if unknown:
        name = sorted(unknown)[0]
        raise InvalidRequest(f"retrieval has no setting {name!r}.", field=f"retrieval.{name}")
    merged = {**DEFAULT_RETRIEVAL, **current, **raw}
    _check_choice(merged, "bm25", ("smoothed", "okapi"))
    _check_choice(merged, "metric", ("cosine", "dot", "euclidean"))
    _check_choice(merged, "fusion", FUSION_METHODS)
    _check_choice(merged, "feedback_source", FEEDBACK_SOURCES)
    for name, (low, high) in _NUMBERS.items():
        value = merged[name]
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or not low <= value <= high
        ):
            raise InvalidRequest(
                f"retrieval.{name} must be a number from {low} to {high}.",
                field=f"retrieval.{name}",
            )
        merged[name] = float(value)
    for name, (low_int, high_int) in _INTEGERS.items():
        value = merged[name]
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        if (
            isinstance(value, bool)
            or not isinstance(value, int)
            or not low_int <= value <= high_int
        ):
            raise InvalidRequest(
                f"retrieval.{name} must be a whole number from {low_int} to {high_int}.",
                field=f"retrieval.{name}",
            )
        merged[name] = value
    for name in ("stemming", "stopwords"):
        if not isinstance(merged[name], bool):
            raise InvalidRequest(
                f"retrieval.{name} must be true or false.", field=f"retrieval.{name}"
            )
    return merged


def _check_choice(merged: Mapping[str, Any], name: str, choices: tuple[str, ...]) -> None:
    if merged[name] not in choices:
        raise InvalidRequest(
            f"retrieval.{name} must be one of {', '.join(choices)}.", field=f"retrieval.{name}"
        )


def analyzer_for(retrieval: Mapping[str, Any]) -> Analyzer:
    settings = {**DEFAULT_RETRIEVAL, **retrieval}
    return Analyzer(
        english_stopwords() if settings["stopwords"] else None,
        "english" if settings["stemming"] else None,
        title_weight=int(settings["title_weight"]),
        section_weight=int(settings["section_weight"]),
    )


def lexical_scoring(retrieval: Mapping[str, Any]) -> LexicalScoring:
    settings = {**DEFAULT_RETRIEVAL, **retrieval}
    return LexicalScoring(
        k1=float(settings["k1"]),
        b=float(settings["b"]),
        variant=cast(Bm25Variant, settings["bm25"]),
    )


def ranking_settings(retrieval: Mapping[str, Any]) -> RankingSettings:
    """The hybrid steps of checked settings (``checked_retrieval``)."""
    settings = {**DEFAULT_RETRIEVAL, **retrieval}
    lexical = None
    if settings["lexical_feedback_chunks"] > 0:
        lexical = LexicalFeedback(
            chunks=int(settings["lexical_feedback_chunks"]),
            terms=int(settings["lexical_feedback_terms"]),
            query_weight=float(settings["lexical_feedback_query_weight"]),
            max_share=float(settings["lexical_feedback_max_share"]),
        )
    semantic = None
    if settings["semantic_feedback_chunks"] > 0:
        semantic = SemanticFeedback(
            chunks=int(settings["semantic_feedback_chunks"]),
            weight=float(settings["semantic_feedback_weight"]),
        )
    return RankingSettings(
        fusion=cast(FusionMethod, settings["fusion"]),
        rrf_k=int(settings["rrf_k"]),
        semantic_weight=float(settings["semantic_weight"]),
        lexical_feedback=lexical,
        semantic_feedback=semantic,
        feedback_source=cast(FeedbackSource, settings["feedback_source"]),
        second_chunk_weight=float(settings["second_chunk_weight"]),
    )
