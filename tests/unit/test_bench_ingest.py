"""The pieces of the ingest benches that need no server: the passes of real text, the verdicts
and the sizing figure."""

from __future__ import annotations

from itertools import islice
from pathlib import Path
from typing import Any

from service.bench.ingest_load import passes, real_documents
from service.bench.verdicts import ingest_targets
from tests.conftest import REPO


def test_each_pass_over_the_real_text_has_new_ids_and_new_embedded_text() -> None:
    documents = real_documents([REPO / "corpus_example" / "documents"])
    assert len(documents) >= 10
    assert set(documents[0]) == {"id", "title", "text", "media_type"}
    two = list(islice(passes(documents), 2 * len(documents)))
    assert len({d["id"] for d in two}) == len(two)
    assert len({d["title"] for d in two}) == len({d["title"] for d in documents}) * 2
    assert [d["text"] for d in two[: len(documents)]] == [d["text"] for d in documents]
    assert all(d["title"].endswith("(pass 2)") for d in two[len(documents) :])


def test_real_documents_keep_the_first_of_the_sources_up_to_the_limit(tmp_path: Path) -> None:
    source = tmp_path / "notes.jsonl"
    source.write_text(
        '{"id": "a", "text": "one two"}\nnot json\n{"id": "b", "text": "three four"}\n',
        encoding="utf-8",
    )
    assert [d["id"] for d in real_documents([source])] == ["a", "b"]
    assert [d["title"] for d in real_documents([source], 1)] == ["a"]


def level(clients: int, idle: tuple[float, float], busy: tuple[float, float]) -> dict[str, Any]:
    def figures(p50: float, p99: float) -> dict[str, Any]:
        return {"p50_ms": p50, "p99_ms": p99, "errors": 0}

    return {
        "clients": clients,
        "idle": figures(*idle),
        "ingest": figures(*busy),
        "p50_ratio": busy[0] / idle[0],
        "p99_ratio": busy[1] / idle[1],
    }


def test_ingest_verdicts_hold_p50_to_one_and_a_half_and_p99_to_twice_the_idle_figures() -> None:
    run = {
        "chunks": 100_000,
        "ingest_errors": 0,
        "levels": [level(1, (10.0, 20.0), (15.0, 40.0)), level(4, (10.0, 20.0), (15.1, 40.1))],
    }
    verdicts = [(t["target"].split()[0], t["met"]) for t in ingest_targets(run)]
    assert verdicts == [
        ("p50", True),
        ("p99", True),
        ("p50", False),
        ("p99", False),
        ("searches", True),
    ]
    run["ingest_errors"] = 1
    assert ingest_targets(run)[-1]["met"] is False
