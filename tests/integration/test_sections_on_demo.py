"""Sections on the demo collection with the bundled model: every chunk of every document sits
under a heading (plain-text manuals with upper-case headings and HTML pages with a navigation
bar included), and each citation names the section its cited sentence is in.

The questions are corpus_example/questions.jsonl. A citation's expected section is found from
the cited document as stored: the heading path of the chunk that holds the cited sentence.
"""

from __future__ import annotations

import json
import re
from typing import Any

import pytest

from service.generation.base import cited_sentences
from tests.api_helpers import Api
from tests.integration.conftest import DEMO_COLLECTION, DEMO_CORPUS

pytestmark = pytest.mark.model

REQUIRED_SECTION_ACCURACY = 0.95
_WORD = re.compile(r"\w+")
# One "Header: cell" part of a table row quoted with its header, up to the next "; " or the end.
_LABELLED_CELL = re.compile(r"(?:^|; )[^:;]+: ([^;]+?)(?=; |\.?$)")


def demo_document(api: Api, document_id: str) -> dict[str, Any]:
    response = api.get(f"/v1/collections/{DEMO_COLLECTION}/documents/{document_id}")
    assert response.status_code == 200, response.text
    document: dict[str, Any] = response.json()
    return document


def test_every_demo_chunk_has_a_section_and_no_chunk_is_page_navigation(demo_api: Api) -> None:
    unsectioned = []
    for path in sorted((DEMO_CORPUS / "documents").iterdir()):
        document = demo_document(demo_api, path.stem)
        for chunk in document["chunks"]:
            if not chunk["section"] or chunk["text"] == "Tarnwick documentation":
                unsectioned.append(chunk["chunk_id"])
    assert unsectioned == []


def test_plain_text_manuals_take_their_upper_case_headings_as_sections(demo_api: Api) -> None:
    document = demo_document(demo_api, "warranty-uk-2020")

    sections = [chunk["section"] for chunk in document["chunks"]]
    assert sections[0] == "SCOPE AND VALIDITY"
    assert "TRANSFER TO A NEW OWNER" in sections


def quoted_words(sentence: str) -> list[str]:
    """The words a quote shares with its document: a table row is quoted with its header
    ("Code: E-14; Meaning: ..."), and only its cells' words stand in the row."""
    cells = _LABELLED_CELL.findall(sentence)
    text = " ".join(cells) if len(cells) >= 2 else sentence
    return [word.casefold() for word in _WORD.findall(text)]


def section_holding(document: dict[str, Any], sentence: str) -> str | None:
    """The section of the last stored chunk starting at or before ``sentence`` in the
    document's text, the sentence compared word by word (chunks never straddle a heading)."""
    words = list(_WORD.finditer(document["text"]))
    folded = [word.group(0).casefold() for word in words]
    wanted = quoted_words(sentence)
    for index in range(len(folded) - len(wanted) + 1):
        if wanted and folded[index : index + len(wanted)] == wanted:
            offset = words[index].start()
            holding = [c for c in document["chunks"] if c["char_start"] <= offset]
            return str(holding[-1]["section"])
    return None


def test_citations_name_the_section_their_cited_sentence_is_in(demo_api: Api) -> None:
    questions = [
        json.loads(line)
        for line in (DEMO_CORPUS / "questions.jsonl").read_text(encoding="utf-8").splitlines()
        if line.strip()
    ]
    right, wrong = 0, []
    for question in questions:
        body: dict[str, Any] = {"query": question["text"], "generator": "extractive"}
        if question.get("filter"):
            body["filter"] = question["filter"]
        response = demo_api.post(f"/v1/collections/{DEMO_COLLECTION}/answer", json=body)
        assert response.status_code == 200, response.text
        result = response.json()
        for passage in result["passages"]:
            assert passage["sections"][0] == passage["section"]
        quotes = cited_sentences(result["answer"] or "")
        for citation in result["citations"]:
            passage = next(p for p in result["passages"] if p["marker"] == citation["marker"])
            assert citation["section"] in passage["sections"]
            document = demo_document(demo_api, citation["document_id"])
            if citation["section"] == section_holding(document, quotes[citation["marker"]][0]):
                right += 1
            else:
                wrong.append((question["id"], citation["marker"], citation["section"]))
    accuracy = right / max(1, right + len(wrong))
    print(f"\ncitation section accuracy on the demo: {right}/{right + len(wrong)}; wrong: {wrong}")
    assert right + len(wrong) >= len(questions) // 2
    assert accuracy >= REQUIRED_SECTION_ACCURACY, wrong
