"""The evaluation backend that asks a running server, through its HTTP API.

It answers the same three questions as the store backend (``service.usecases.evaluate``), so the
numbers of the two agree for the same collection; per-query BM25 and ranking settings are not
part of the API, so only ``rrf_k`` may vary here.
"""

from __future__ import annotations

import json
from collections.abc import Collection, Mapping
from typing import Any

import httpx

from service.evaluation.answers import CitedPlace, ObservedAnswer
from service.evaluation.backends import ChunkHits, DocumentRanking, settings_in_effect
from service.evaluation.inputs import FilterSpec
from service.evaluation.runner import SETTING_MODES, InferRequest
from service.server_client import ServerClient

# The server's own limit on top_k and depth, by default.
CHUNK_LIMIT = 1000
PAGE = 1000
SERVER_ONLY_SETTINGS = tuple(name for name in SETTING_MODES if name != "rrf_k")


class HttpBackend:
    def __init__(
        self,
        url: str,
        key: str | None,
        collection: str,
        *,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        self.client = ServerClient(url, key, transport=transport)
        self.collection = collection

    def close(self) -> None:
        self.client.close()

    def send(self, method: str, path: str, **options: Any) -> dict[str, Any]:
        return self.client.send(method, path, **options)

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
        unsupported = [name for name in SERVER_ONLY_SETTINGS if name in settings]
        if unsupported:
            raise ValueError(
                f"--set {unsupported[0]} works only on the store directly, not through a server"
            )

        def run(chunks: int) -> ChunkHits:
            request: dict[str, Any] = {
                "query": text,
                "mode": mode,
                "top_k": chunks,
                "depth": chunks,
            }
            if "rrf_k" in settings:
                request["rrf_k"] = settings["rrf_k"]
            if filter is not None:
                request["filter"] = filter
            if infer is not None:
                request["infer_filter"] = dict(infer)
            body = self.send("POST", f"/v1/collections/{self.collection}/search", json=request)
            return [(hit["document_id"], float(hit["score"])) for hit in body["hits"]]

        return DocumentRanking(run, CHUNK_LIMIT).rank(depth)

    def inferred_filter(
        self, text: str, *, infer: InferRequest, filter: FilterSpec
    ) -> dict[str, object] | None:
        request: dict[str, Any] = {
            "query": text,
            "mode": "lexical",
            "top_k": 1,
            "infer_filter": dict(infer),
        }
        if filter is not None:
            request["filter"] = filter
        body = self.send("POST", f"/v1/collections/{self.collection}/search", json=request)
        inferred: dict[str, object] | None = body["inferred_filter"]
        return inferred

    def documents_failing_filter(self, filter: FilterSpec, doc_ids: Collection[str]) -> set[str]:
        passing = self.documents_passing(filter)
        return {doc for doc in doc_ids if doc not in passing}

    def documents_passing(self, filter: FilterSpec) -> set[str]:
        passing: set[str] = set()
        after: str | None = None
        while True:
            params: dict[str, Any] = {"limit": PAGE}
            if filter is not None:
                params["filter"] = filter if isinstance(filter, str) else json.dumps(filter)
            if after is not None:
                params["after"] = after
            page = self.send("GET", f"/v1/collections/{self.collection}/documents", params=params)
            passing.update(d["id"] for d in page["documents"])
            after = page["next_after"]
            if after is None:
                break
        return passing

    def describe_settings(self, settings: Mapping[str, object]) -> dict[str, object]:
        return settings_in_effect(self.send("GET", f"/v1/collections/{self.collection}"), settings)


class HttpAnswers:
    """Labelled questions through a running server's answer route."""

    def __init__(
        self,
        backend: HttpBackend,
        *,
        token_budget: int,
        generator: str | None = None,
    ) -> None:
        self.backend = backend
        self.token_budget = token_budget
        self.generator = generator

    def answer(self, text: str, *, filter: FilterSpec) -> ObservedAnswer:
        request: dict[str, Any] = {"query": text, "token_budget": self.token_budget}
        if filter is not None:
            request["filter"] = filter
        if self.generator is not None:
            request["generator"] = self.generator
        body = self.backend.send(
            "POST", f"/v1/collections/{self.backend.collection}/answer", json=request
        )
        return ObservedAnswer(
            body["answer"],
            body.get("reason"),
            tuple(
                CitedPlace(citation["document_id"], citation.get("section") or "")
                for citation in body["citations"]
            ),
        )

    def describe(self) -> dict[str, object]:
        return {
            "collection": self.backend.collection,
            "generator": self.generator or "server default",
            "token_budget": self.token_budget,
            "mode": "hybrid",
            "url": self.backend.client.base_url,
        }
