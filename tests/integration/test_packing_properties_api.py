"""Properties of /context on the demo collection, over hypothesis-chosen budgets and queries.

For every budget and query: ``tokens_used`` is within the budget and is the model tokenizer's
count (no special tokens) of ``context``; each passage's text follows its ``[n]`` marker; no
passage repeats text (one document's passages cover disjoint spans, each passage is exactly its
span of the document's normalized text, and no two passages hold the same text).
"""

from __future__ import annotations

import itertools
import json
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.api_helpers import Api
from tests.integration.conftest import DEMO_COLLECTION, DEMO_CORPUS

pytestmark = pytest.mark.model

QUESTIONS = [
    json.loads(line)["text"]
    for line in (DEMO_CORPUS / "questions.jsonl").read_text(encoding="utf-8").splitlines()
    if line.strip()
]
WORDS = ["brake", "battery", "warranty", "frame", "torque", "recall", "tyre", "chain", "motor"]
FILTERS = [None, "model_year = 2023", "doc_type = 'warranty'", "safety_recall = true"]

queries = st.one_of(
    st.sampled_from(QUESTIONS),
    st.lists(st.sampled_from(WORDS), min_size=1, max_size=4).map(" ".join),
)


@pytest.fixture(scope="module")
def document_texts(demo_api: Api) -> dict[str, str]:
    listing = demo_api.get(f"/v1/collections/{DEMO_COLLECTION}/documents", params={"limit": 1000})
    return {
        d["id"]: demo_api.get(f"/v1/collections/{DEMO_COLLECTION}/documents/{d['id']}").json()[
            "text"
        ]
        for d in listing.json()["documents"]
    }


@settings(max_examples=30, deadline=None)
@given(
    budget=st.integers(min_value=1, max_value=1500),
    query=queries,
    filter_text=st.sampled_from(FILTERS),
)
def test_context_fits_its_budget_and_every_passage_follows_its_marker_once(
    demo_api: Api,
    reference_model: Any,
    document_texts: dict[str, str],
    budget: int,
    query: str,
    filter_text: str | None,
) -> None:
    body: dict[str, Any] = {"query": query, "token_budget": budget, "top_k": 10}
    if filter_text is not None:
        body["filter"] = filter_text
    response = demo_api.post(f"/v1/collections/{DEMO_COLLECTION}/context", json=body)
    assert response.status_code == 200, response.text
    packed = response.json()
    context, passages = packed["context"], packed["passages"]

    counted = len(reference_model.tokenizer.encode(context, add_special_tokens=False))
    assert packed["token_budget"] == budget
    assert packed["tokens_used"] == counted <= budget
    assert [p["marker"] for p in passages] == list(range(1, len(passages) + 1))

    position = 0
    for passage in passages:
        marker_at = context.find(f"[{passage['marker']}] ", position)
        assert marker_at >= position, passage["marker"]
        text_at = context.find(passage["text"], marker_at)
        assert text_at > marker_at, passage["marker"]
        position = text_at + len(passage["text"])
        document = document_texts[passage["document_id"]]
        assert document[passage["char_start"] : passage["char_end"]] == passage["text"]

    texts = [p["text"] for p in passages]
    assert len(set(texts)) == len(texts)
    spans: dict[str, list[tuple[int, int]]] = {}
    for passage in passages:
        spans.setdefault(passage["document_id"], []).append(
            (passage["char_start"], passage["char_end"])
        )
    for document_spans in spans.values():
        ordered = sorted(document_spans)
        assert all(a_end <= b_start for (_, a_end), (b_start, _) in itertools.pairwise(ordered))
    if budget >= 400:
        assert passages, "a budget this size always has room for a passage"
