"""``excerpta eval``: labeled queries through the store directly or a running server."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Collection, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any, cast

import httpx

from service.evaluation.inputs import FilterSpec, read_qrels, read_queries
from service.evaluation.report import write_report
from service.evaluation.runner import evaluate, systems_from_options
from service.filters.check import check_filter
from service.filters.parse import parse_filter
from service.index.lexical import LexicalScoring
from service.retrieval.query import Mode
from service.store import repository
from service.store.filter_sql import compile_filter
from service.usecases import answering
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import attribute_schema, get_collection, load_collection
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions

MAX_CHUNKS = 20_000


ChunkHits = list[tuple[str, float]]


def documents_from_hits(hits: ChunkHits, depth: int) -> list[tuple[str, float]]:
    """Documents in the order of their best chunk, with that chunk's score."""
    ranked: dict[str, float] = {}
    for document_id, score in hits:
        ranked.setdefault(document_id, float(score))
        if len(ranked) >= depth:
            break
    return list(ranked.items())


class _DocumentRanking:
    """Asks for more chunks until ``depth`` distinct documents are ranked or none are left.

    ``search`` returns the best chunks as ``(document id, score)``, best first.
    """

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


class StoreBackend:
    def __init__(self, runtime: Runtime, collection: str) -> None:
        self.runtime = runtime
        self.collection = collection

    def rank_documents(
        self,
        text: str,
        *,
        mode: str,
        filter: FilterSpec,
        depth: int,
        settings: Mapping[str, object],
    ) -> list[tuple[str, float]]:
        def run(chunks: int) -> ChunkHits:
            options = SearchOptions(
                query=text,
                filter=filter,
                mode=cast(Mode, mode),
                top_k=chunks,
                depth=chunks,
                rrf_k=int(settings.get("rrf_k", 60)),  # type: ignore[call-overload]
                scoring=self._scoring(settings),
            )
            result = answering.search(
                self.runtime, LOCAL_ADMIN, self.collection, options, keep_trace=False
            )
            return [(hit.document_id, hit.score) for hit in result.hits]

        return _DocumentRanking(run, MAX_CHUNKS).rank(depth)

    def _scoring(self, settings: Mapping[str, object]) -> LexicalScoring | None:
        """BM25 settings varied by the evaluation, over the collection's own for the rest."""
        if "k1" not in settings and "b" not in settings:
            return None
        scoring = self.runtime.indexes.view(self.collection).scoring
        return replace(
            scoring,
            k1=float(settings.get("k1", scoring.k1)),  # type: ignore[arg-type]
            b=float(settings.get("b", scoring.b)),  # type: ignore[arg-type]
        )

    def documents_failing_filter(self, filter: FilterSpec, doc_ids: Collection[str]) -> set[str]:
        with self.runtime.transaction() as session:
            row = load_collection(session, LOCAL_ADMIN, self.collection)
            if filter is None:
                condition = None
            else:
                schema = attribute_schema(row)
                condition = compile_filter(check_filter(parse_filter(filter), schema), schema)
            passing = {
                ext
                for _, ext in repository.matching_document_ids(
                    session, row.id, groups=None, condition=condition
                )
            }
        return {doc for doc in doc_ids if doc not in passing}

    def describe_settings(self, settings: Mapping[str, object]) -> dict[str, object]:
        view = get_collection(self.runtime, LOCAL_ADMIN, self.collection)
        return _describe(view, settings)


def _describe(view: Mapping[str, Any], settings: Mapping[str, object]) -> dict[str, object]:
    retrieval = dict(view["retrieval"])
    return {
        "bm25": retrieval.get("bm25"),
        "k1": settings.get("k1", retrieval.get("k1")),
        "b": settings.get("b", retrieval.get("b")),
        "rrf_k": settings.get("rrf_k", 60),
        "metric": retrieval.get("metric"),
        "chunking": view["chunking"],
        "embedder": view["embedder"],
        "tokenizer": view["tokenizer"],
    }


class HttpBackend:
    """The same questions through a running server's API."""

    def __init__(self, url: str, key: str | None, collection: str) -> None:
        headers = {"Authorization": f"Bearer {key}"} if key else {}
        self.client = httpx.Client(base_url=url.rstrip("/"), headers=headers, timeout=60.0)
        self.collection = collection

    def _get(self, path: str, **params: Any) -> dict[str, Any]:
        response = self.client.get(path, params=params)
        response.raise_for_status()
        body: dict[str, Any] = response.json()
        return body

    def rank_documents(
        self,
        text: str,
        *,
        mode: str,
        filter: FilterSpec,
        depth: int,
        settings: Mapping[str, object],
    ) -> list[tuple[str, float]]:
        if "k1" in settings or "b" in settings:
            raise ValueError("--set k1/b works only on the store directly, not with --url")

        def run(chunks: int) -> ChunkHits:
            body: dict[str, Any] = {
                "query": text,
                "mode": mode,
                "top_k": chunks,
                "depth": chunks,
                "rrf_k": settings.get("rrf_k", 60),
            }
            if filter is not None:
                body["filter"] = filter
            response = self.client.post(f"/v1/collections/{self.collection}/search", json=body)
            response.raise_for_status()
            hits = response.json()["hits"]
            return [(hit["document_id"], float(hit["score"])) for hit in hits]

        return _DocumentRanking(run, 1000).rank(depth)

    def documents_failing_filter(self, filter: FilterSpec, doc_ids: Collection[str]) -> set[str]:
        import json

        passing: set[str] = set()
        after: str | None = None
        while True:
            params: dict[str, Any] = {"limit": 1000}
            if filter is not None:
                params["filter"] = filter if isinstance(filter, str) else json.dumps(filter)
            if after is not None:
                params["after"] = after
            page = self._get(f"/v1/collections/{self.collection}/documents", **params)
            passing.update(d["id"] for d in page["documents"])
            after = page["next_after"]
            if after is None:
                break
        return {doc for doc in doc_ids if doc not in passing}

    def describe_settings(self, settings: Mapping[str, object]) -> dict[str, object]:
        return _describe(self._get(f"/v1/collections/{self.collection}"), settings)


def add_eval_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("collection")
    parser.add_argument("--queries", required=True, help="TSV (qid<TAB>text) or JSONL")
    parser.add_argument("--qrels", required=True, help="TREC qrels: qid 0 docid grade")
    parser.add_argument("--modes", default="lexical,semantic,hybrid")
    parser.add_argument("--k", type=int, default=10)
    parser.add_argument("--depth", type=int, default=100)
    parser.add_argument("--filter", help="a CQL2 filter applied to every query")
    parser.add_argument(
        "--set", action="append", default=[], metavar="NAME=V1,V2", help="vary rrf_k, k1 or b"
    )
    parser.add_argument("--out", default="eval-report", help="directory for the report")
    parser.add_argument("--url", help="evaluate through a running server instead of the store")
    parser.add_argument("--key", help="API key for --url (or EXCERPTA_KEY)")
    parser.add_argument("--no-progress", action="store_true")


def _set_options(values: list[str]) -> dict[str, list[str]]:
    options: dict[str, list[str]] = {}
    for value in values:
        name, sep, raw = value.partition("=")
        if not sep or not raw:
            raise ValueError(f"--set takes NAME=V1,V2, not {value!r}")
        options[name.strip()] = [v.strip() for v in raw.split(",") if v.strip()]
    return options


def run_eval_command(
    args: argparse.Namespace, make_runtime: Callable[[argparse.Namespace], Runtime]
) -> int:
    import os

    try:
        queries = read_queries(args.queries)
        qrels = read_qrels(args.qrels)
        systems = systems_from_options(args.modes.split(","), _set_options(args.set))
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    filter_value: FilterSpec = args.filter
    runtime: Runtime | None = None
    backend: StoreBackend | HttpBackend
    if args.url:
        backend = HttpBackend(args.url, args.key or os.environ.get("EXCERPTA_KEY"), args.collection)
    else:
        runtime = make_runtime(args)
        runtime.settings.max_top_k = MAX_CHUNKS
        runtime.settings.max_depth = MAX_CHUNKS
        backend = StoreBackend(runtime, args.collection)
    try:
        result = evaluate(
            backend,
            queries,
            qrels,
            systems=systems,
            k=args.k,
            depth=args.depth,
            global_filter=filter_value,
            progress=not args.no_progress,
        )
    finally:
        if runtime is not None:
            runtime.close()
    files = write_report(result, Path(args.out), title=f"Retrieval evaluation: {args.collection}")
    print(f"report written to {files.report}")
    for system in result.systems:
        cells = ", ".join(f"{name} {system.summary[name].mean:.4f}" for name in result.measures)
        print(f"  {system.system.label}: {cells}")
    return 0
