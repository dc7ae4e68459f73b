"""``excerpta bench --answering``: what answering a question costs beyond packing its context.

The demo corpus is ingested with the real model into a scratch store; each labelled question is
then asked through the context use case and the answer use case (the two routes' own code, at
their default settings), alternating which goes first in each round, so that drift in the
machine's speed falls on both alike. The figure that matters is the median over questions of
the answer's time minus the context's time for the same question in the same round.
"""

from __future__ import annotations

import json
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from service.bench.timing import Summary
from service.config import Settings
from service.evaluation.answers import read_answer_questions
from service.ingest.source_files import read_source
from service.usecases import answering
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, put_collection
from service.usecases.documents import upsert_documents
from service.usecases.runtime import Runtime, load_embedder
from service.usecases.search import SearchOptions

COLLECTION = "answering"
DEFAULT_TOKEN_BUDGET = 1000
BATCH_DOCUMENTS = 64


def run_answering(
    *, corpus: Path, questions: Path, rounds: int, progress: Callable[[str], None]
) -> dict[str, Any]:
    labelled = read_answer_questions(questions)
    with tempfile.TemporaryDirectory(prefix="excerpta-bench-answering-") as scratch:
        data_dir = Path(scratch)
        settings = Settings(
            data_dir=data_dir, database_url=f"sqlite:///{(data_dir / 'excerpta.db').as_posix()}"
        )
        runtime = Runtime(settings, load_embedder(settings))
        try:
            progress(f"ingesting {corpus} with {runtime.embedder.name}")
            chunks = _ingest(runtime, corpus)

            def context(index: int) -> None:
                question = labelled[index]
                answering.build_context(
                    runtime,
                    LOCAL_ADMIN,
                    COLLECTION,
                    SearchOptions(query=question.text, filter=question.filter),
                    DEFAULT_TOKEN_BUDGET,
                )

            def answer(index: int) -> None:
                question = labelled[index]
                answering.answer(
                    runtime,
                    LOCAL_ADMIN,
                    COLLECTION,
                    SearchOptions(query=question.text, filter=question.filter),
                    DEFAULT_TOKEN_BUDGET,
                    None,
                )

            for index in range(len(labelled)):
                context(index)
                answer(index)
            context_ms: list[float] = []
            answer_ms: list[float] = []
            added_ms: list[float] = []
            for round_number in range(rounds):
                progress(f"round {round_number + 1} of {rounds}")
                for index in range(len(labelled)):
                    pair = (context, answer) if (round_number + index) % 2 else (answer, context)
                    took = {call: _milliseconds(call, index) for call in pair}
                    context_ms.append(took[context])
                    answer_ms.append(took[answer])
                    added_ms.append(took[answer] - took[context])
            generator = runtime.generators.get(None).name
        finally:
            runtime.close()
    return {
        "corpus": str(corpus),
        "questions": len(labelled),
        "chunks": chunks,
        "rounds": rounds,
        "generator": generator,
        "token_budget": DEFAULT_TOKEN_BUDGET,
        "context": Summary.of(context_ms).as_dict(),
        "answer": Summary.of(answer_ms).as_dict(),
        "added_median_ms": float(np.median(added_ms)),
        "added_p95_ms": float(np.percentile(added_ms, 95)),
    }


def _milliseconds(call: Callable[[int], None], index: int) -> float:
    started = time.perf_counter_ns()
    call(index)
    return (time.perf_counter_ns() - started) / 1e6


def _ingest(runtime: Runtime, corpus: Path) -> int:
    schema_file = corpus / "schema.json"
    raw = json.loads(schema_file.read_text(encoding="utf-8")) if schema_file.exists() else {}
    put_collection(
        runtime,
        LOCAL_ADMIN,
        COLLECTION,
        CollectionSpec(
            description=raw.get("description"),
            attributes=raw.get("attributes"),
            chunking=raw.get("chunking"),
            cite_attributes=raw.get("cite_attributes"),
            answer_caution=raw.get("answer_caution"),
        ),
    )
    folder = corpus / "documents" if (corpus / "documents").is_dir() else corpus
    documents = [item.document for item in read_source(folder) if item.document is not None]
    chunks = 0
    for first in range(0, len(documents), BATCH_DOCUMENTS):
        results = upsert_documents(
            runtime, LOCAL_ADMIN, COLLECTION, documents[first : first + BATCH_DOCUMENTS]
        )
        chunks += sum(int(result["chunks"]) for result in results)
    return chunks
