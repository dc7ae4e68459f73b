"""The evaluation backend over the store: labeled queries through the search use case itself.

``excerpta eval`` without ``--url`` uses it; with ``--url`` it asks a server instead
(``service.evaluation.http_backend``). Both follow ``EvaluationBackend``, so everything that
decides the numbers is shared.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping
from typing import cast

from service.errors import InvalidRequest
from service.evaluation.answers import CitedPlace, ObservedAnswer
from service.evaluation.backends import ChunkHits, DocumentRanking, settings_in_effect
from service.evaluation.inputs import FilterSpec
from service.evaluation.runner import InferRequest
from service.filters.check import check_filter
from service.filters.parse import parse_filter
from service.index.lexical import LexicalScoring
from service.retrieval.query import Mode
from service.retrieval.ranking_settings import RankingSettings
from service.store import repository
from service.store.filter_sql import compile_filter
from service.usecases import answering
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import attribute_schema, get_collection, load_collection
from service.usecases.inference import OFF, infer_options
from service.usecases.retrieval_settings import (
    checked_retrieval,
    lexical_scoring,
    ranking_settings,
)
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions

DEFAULT_TOKEN_BUDGET = 1000
"""The answer route's own default budget."""

MAX_CHUNKS = 20_000
"""The most chunks one ranking asks for, where the runtime's top_k and depth limits allow it
(``excerpta eval`` raises them to this)."""


class StoreBackend:
    def __init__(self, runtime: Runtime, collection: str) -> None:
        self.runtime = runtime
        self.collection = collection
        self._vectors: dict[str, list[float]] = {}
        self._settings: dict[
            tuple[tuple[str, str], ...], tuple[LexicalScoring | None, RankingSettings | None]
        ] = {}

    def _query_vector(self, text: str, mode: str) -> list[float] | None:
        """The text's query vector, embedded once for all the searches and systems that ask."""
        if mode == "lexical":
            return None
        if text not in self._vectors:
            self._vectors[text] = self.runtime.embedder.embed_query(text).tolist()
        return self._vectors[text]

    def rank_documents(
        self,
        text: str,
        *,
        mode: str,
        filter: FilterSpec,
        depth: int,
        settings: Mapping[str, object],
        infer: InferRequest | None = None,
    ) -> list[tuple[str, float]]:
        infer_filter = OFF if infer is None else infer_options(infer)
        vector = self._query_vector(text, mode)
        scoring, ranking = self._overrides(settings)
        rrf_k = settings.get("rrf_k")

        def run(chunks: int) -> ChunkHits:
            options = SearchOptions(
                query=text,
                filter=filter,
                mode=cast(Mode, mode),
                top_k=chunks,
                depth=chunks,
                rrf_k=None if rrf_k is None else int(rrf_k),  # type: ignore[call-overload]
                query_vector=vector,
                infer_filter=infer_filter,
                scoring=scoring,
                ranking=ranking,
            )
            result = answering.search(
                self.runtime, LOCAL_ADMIN, self.collection, options, keep_trace=False
            )
            return [(hit.document_id, hit.score) for hit in result.hits]

        limits = self.runtime.settings
        chunk_limit = min(MAX_CHUNKS, limits.max_top_k, limits.max_depth)
        return DocumentRanking(run, chunk_limit).rank(depth)

    def _overrides(
        self, settings: Mapping[str, object]
    ) -> tuple[LexicalScoring | None, RankingSettings | None]:
        """BM25 settings and hybrid steps varied by the evaluation, over the collection's own
        for the rest (None where the system varies none of them)."""
        key = tuple(sorted((name, repr(value)) for name, value in settings.items()))
        if key not in self._settings:
            varied = {name: value for name, value in settings.items() if name != "rrf_k"}
            if not varied:
                self._settings[key] = (None, None)
            else:
                stored = get_collection(self.runtime, LOCAL_ADMIN, self.collection)["retrieval"]
                try:
                    merged = checked_retrieval(varied, stored)
                except InvalidRequest as exc:
                    raise ValueError(exc.message) from exc
                self._settings[key] = (lexical_scoring(merged), ranking_settings(merged))
        return self._settings[key]

    def documents_failing_filter(self, filter: FilterSpec, doc_ids: Collection[str]) -> set[str]:
        passing = self.documents_passing(filter)
        return {doc for doc in doc_ids if doc not in passing}

    def documents_passing(self, filter: FilterSpec) -> set[str]:
        with self.runtime.transaction() as session:
            row = load_collection(session, LOCAL_ADMIN, self.collection)
            if filter is None:
                condition = None
            else:
                schema = attribute_schema(row)
                condition = compile_filter(check_filter(parse_filter(filter), schema), schema)
            return {
                ext
                for _, ext in repository.matching_document_ids(
                    session, row.id, groups=None, condition=condition
                )
            }

    def inferred_filter(
        self, text: str, *, infer: InferRequest, filter: FilterSpec
    ) -> dict[str, object] | None:
        """What a search with ``filter`` infers from the text (lexical: nothing to embed)."""
        options = SearchOptions(
            query=text,
            filter=filter,
            mode="lexical",
            top_k=1,
            depth=1,
            infer_filter=infer_options(infer),
        )
        result = answering.search(
            self.runtime, LOCAL_ADMIN, self.collection, options, keep_trace=False
        )
        return None if result.inferred_filter is None else result.inferred_filter.as_json()

    def describe_settings(self, settings: Mapping[str, object]) -> dict[str, object]:
        view = get_collection(self.runtime, LOCAL_ADMIN, self.collection)
        return settings_in_effect(view, settings)


class StoreAnswers:
    """Labelled questions through the answer use case itself, as the local admin."""

    def __init__(
        self,
        runtime: Runtime,
        collection: str,
        *,
        token_budget: int = DEFAULT_TOKEN_BUDGET,
        generator: str | None = None,
    ) -> None:
        self.runtime = runtime
        self.collection = collection
        self.token_budget = token_budget
        self.generator = generator

    def answer(self, text: str, *, filter: FilterSpec) -> ObservedAnswer:
        result = answering.answer(
            self.runtime,
            LOCAL_ADMIN,
            self.collection,
            SearchOptions(query=text, filter=filter),
            self.token_budget,
            self.generator,
        )
        return ObservedAnswer(
            result.answer,
            result.reason,
            tuple(CitedPlace(c.document_id, c.section) for c in result.citations),
        )

    def describe(self) -> dict[str, object]:
        return {
            "collection": self.collection,
            "generator": self.runtime.generators.get(self.generator).name,
            "token_budget": self.token_budget,
            "mode": "hybrid",
        }
