"""Sections through the API: a passage names the heading in force where it starts and lists
every section it reaches; a citation names the section its cited sentence is in, for Markdown,
plain text with upper-case headings and HTML pages with navigation alike.

The documents are invented warranty terms in the demo's scenario; the answer comes from a
scripted chat endpoint, so the cited sentence is known.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.usecases.runtime import Runtime
from tests.api_helpers import Api, make_key
from tests.chat_endpoint import FakeEndpoint, Step

SCHEMA: dict[str, Any] = {
    "attributes": {},
    "chunking": {"max_tokens": 24, "overlap_tokens": 0},
}
FRAME = "Tarnwick warrants the frame for five years from the date of purchase."
TRANSFER = "The frame warranty covers the original owner only."
DOCUMENTS = {
    "text/markdown": (
        f"# Frame warranty\n\n{FRAME}\n\n# Transfer to a new owner\n\n{TRANSFER}\n",
        ("Frame warranty", "Transfer to a new owner"),
    ),
    "text/plain": (
        f"FRAME WARRANTY\n\n{FRAME}\n\nTRANSFER TO A NEW OWNER\n\n{TRANSFER}\n",
        ("FRAME WARRANTY", "TRANSFER TO A NEW OWNER"),
    ),
    "text/html": (
        "<html><body><nav><a href='/'>Tarnwick documentation</a></nav><main>"
        f"<h1>Frame warranty</h1><p>{FRAME}</p>"
        f"<h1>Transfer to a new owner</h1><p>{TRANSFER}</p>"
        "</main><footer>Tarnwick Cycle Works</footer></body></html>",
        ("Frame warranty", "Transfer to a new owner"),
    ),
}
QUERY = {"query": "frame warranty original owner", "token_budget": 1000}


@pytest.fixture
def endpoint() -> Iterator[FakeEndpoint]:
    with FakeEndpoint() as running:
        yield running


@pytest.fixture(params=list(DOCUMENTS))
def media_type(request: pytest.FixtureRequest) -> str:
    return str(request.param)


@pytest.fixture
def warranty(
    make_runtime: Callable[..., Runtime], endpoint: FakeEndpoint, media_type: str
) -> Iterator[Api]:
    """A collection holding the one warranty document written as ``media_type``."""
    runtime = make_runtime(chat_url=endpoint.url, chat_model="tiny-chat")
    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert api.put("/v1/collections/terms", json=SCHEMA).status_code == 201
        text = DOCUMENTS[media_type][0]
        document = {"id": "warranty-us-2019", "text": text, "media_type": media_type}
        response = api.post("/v1/collections/terms/documents", json={"documents": [document]})
        assert response.status_code == 200, response.text
        yield api


def test_every_chunk_has_its_heading_and_page_navigation_is_no_chunk(
    warranty: Api, media_type: str
) -> None:
    document = warranty.get("/v1/collections/terms/documents/warranty-us-2019")

    chunks = document.json()["chunks"]
    assert [chunk["section"] for chunk in chunks] == list(DOCUMENTS[media_type][1])
    assert not any(
        "documentation" in chunk["text"] or "Cycle Works" in chunk["text"] for chunk in chunks
    )


def test_the_context_lists_every_section_a_merged_passage_reaches(
    warranty: Api, media_type: str
) -> None:
    first, second = DOCUMENTS[media_type][1]

    response = warranty.post("/v1/collections/terms/context", json=QUERY)

    assert response.status_code == 200, response.text
    [passage] = response.json()["passages"]
    assert len(passage["chunk_ids"]) == 2
    assert (passage["section"], passage["sections"]) == (first, [first, second])


def test_the_citation_names_the_section_of_the_sentence_it_cites(
    warranty: Api, endpoint: FakeEndpoint, media_type: str
) -> None:
    first, second = DOCUMENTS[media_type][1]
    endpoint.script.append(Step(content=f"{TRANSFER[:-1]} [1]."))

    response = warranty.post(
        "/v1/collections/terms/answer", json={**QUERY, "generator": "chat-http"}
    )

    assert response.status_code == 200, response.text
    answer = response.json()
    assert answer["answer"] == f"{TRANSFER} [1]"
    [passage] = answer["passages"]
    assert (passage["section"], passage["sections"]) == (first, [first, second])
    [citation] = answer["citations"]
    assert citation["section"] == second


def test_a_sentence_from_the_first_section_is_cited_with_it(
    warranty: Api, endpoint: FakeEndpoint, media_type: str
) -> None:
    first, _ = DOCUMENTS[media_type][1]
    endpoint.script.append(Step(content=f"{FRAME} [1]"))

    response = warranty.post(
        "/v1/collections/terms/answer", json={**QUERY, "generator": "chat-http"}
    )

    assert response.status_code == 200, response.text
    [citation] = response.json()["citations"]
    assert citation["section"] == first
