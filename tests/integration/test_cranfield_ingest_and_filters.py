"""Cranfield through ``excerpta ingest``, and filters that select exactly what corpus.jsonl says.

corpus.jsonl is the converted source (its ``year`` is the first 19xx year of the bibliographic
line, null for 201 documents), read here independently of the ingest path.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from service.usecases import collections
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from tests.api_helpers import Api
from tests.integration.conftest import CRANFIELD_COLLECTION, CliRun, StoredChunk

pytestmark = [pytest.mark.model, pytest.mark.cranfield]

EMPTY_DOCUMENTS = {"471", "995"}

Year = int | None
FILTERS: dict[str, Callable[[Year], bool]] = {
    "year BETWEEN 1960 AND 1965": lambda y: y is not None and 1960 <= y <= 1965,
    "NOT (year BETWEEN 1960 AND 1965)": lambda y: y is not None and not 1960 <= y <= 1965,
    "year IS NULL": lambda y: y is None,
    "NOT (year IS NULL)": lambda y: y is not None,
}
"""Each filter and, per CQL2's three-valued logic, which years it selects (NULL never matches
a comparison, also under NOT)."""


def expected_documents(
    corpus: dict[str, dict[str, Any]], selects: Callable[[Year], bool]
) -> set[str]:
    return {
        doc_id
        for doc_id, r in corpus.items()
        if doc_id not in EMPTY_DOCUMENTS and selects(r["year"])
    }


def listed_ids(api: Api, filter_text: str) -> list[str]:
    ids: list[str] = []
    after: str | None = None
    while True:
        params: dict[str, Any] = {"filter": filter_text, "limit": 1000}
        if after is not None:
            params["after"] = after
        response = api.get(f"/v1/collections/{CRANFIELD_COLLECTION}/documents", params=params)
        assert response.status_code == 200, response.text
        page = response.json()
        ids.extend(d["id"] for d in page["documents"])
        after = page["next_after"]
        if after is None:
            return ids


def test_cranfield_ingests_through_the_cli_with_its_two_empty_documents_reported(
    cranfield_ingest: CliRun,
    cranfield_dir: Path,
    cranfield_runtime: Runtime,
    cranfield_corpus: dict[str, dict[str, Any]],
) -> None:
    assert cranfield_ingest.code == 1
    assert "1398 documents written, 2 failed" in cranfield_ingest.stdout
    reported = [line for line in cranfield_ingest.stderr.splitlines() if "documents.jsonl:" in line]
    assert len(reported) == 2, cranfield_ingest.stderr[-2000:]
    source_lines = (cranfield_dir / "documents.jsonl").read_text(encoding="utf-8").splitlines()
    reported_ids = set()
    for line in reported:
        line_number = int(line.split("documents.jsonl:", 1)[1].split(":", 1)[0])
        reported_ids.add(json.loads(source_lines[line_number - 1])["id"])
        assert "at least one word" in line
    assert reported_ids == EMPTY_DOCUMENTS

    view = collections.get_collection(cranfield_runtime, LOCAL_ADMIN, CRANFIELD_COLLECTION)
    assert view["documents"] == 1398 == len(cranfield_corpus) - len(EMPTY_DOCUMENTS)
    assert view["embedder"] == "minilm"
    assert view["attributes"] == {
        "year": {"type": "integer"},
        "authors": {"type": "keyword"},
        "source": {"type": "keyword"},
    }
    assert view["chunking"] == json.loads((cranfield_dir / "schema.json").read_text())["chunking"]


def test_the_corpus_holds_both_dated_and_undated_documents(
    cranfield_corpus: dict[str, dict[str, Any]],
) -> None:
    assert sum(1 for r in cranfield_corpus.values() if r["year"] is None) == 201
    in_range = expected_documents(cranfield_corpus, FILTERS["year BETWEEN 1960 AND 1965"])
    assert 0 < len(in_range) < 1398 - 201


@pytest.mark.parametrize("filter_text", list(FILTERS))
def test_a_year_filter_lists_exactly_the_documents_the_corpus_file_says(
    filter_text: str, cranfield_api: Api, cranfield_corpus: dict[str, dict[str, Any]]
) -> None:
    listed = listed_ids(cranfield_api, filter_text)
    assert len(listed) == len(set(listed))
    assert set(listed) == expected_documents(cranfield_corpus, FILTERS[filter_text])


@pytest.mark.parametrize("filter_text", list(FILTERS))
def test_a_year_filter_makes_candidates_of_exactly_those_documents_chunks(
    filter_text: str,
    cranfield_api: Api,
    cranfield_corpus: dict[str, dict[str, Any]],
    cranfield_chunks: list[StoredChunk],
) -> None:
    chunks_per_document = Counter(c.document_id for c in cranfield_chunks)
    expected = expected_documents(cranfield_corpus, FILTERS[filter_text])
    for mode in ("lexical", "semantic"):
        response = cranfield_api.post(
            f"/v1/collections/{CRANFIELD_COLLECTION}/search",
            json={"query": "boundary layer", "filter": filter_text, "mode": mode, "top_k": 5},
        )
        assert response.status_code == 200, response.text
        body = response.json()
        assert body["candidates"] == sum(chunks_per_document[d] for d in expected)
        assert {hit["document_id"] for hit in body["hits"]} <= expected
