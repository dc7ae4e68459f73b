"""A document replaced over and over while other threads query it: each query sees one version.

Readers search (lexical and semantic, which read the in-memory index) and read the document
(which reads the store) while a writer swaps the document between two versions with different
chunk counts. Every observation must be exactly the old version's chunks or the new one's: never
a mix, never none. The test-only hashing embedder keeps it fast; the model plays no part here.
"""

from __future__ import annotations

import threading
from collections import Counter
from collections.abc import Callable
from typing import Any

from service.usecases import answering, collections, documents
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions

NAME = "swap"
SWAPS = 24
READERS = 3
READ_WAIT_SECONDS = 10.0


def version(word: str, paragraphs: int) -> dict[str, Any]:
    text = "\n\n".join(
        f"Paragraph {n} about {word} holds the shared marker term and a few more words."
        for n in range(paragraphs)
    )
    return {"id": "swapped", "title": f"Version {word}", "text": text}


STABLE = {"id": "stable", "title": "Stable", "text": "The marker term also appears here."}
OLD, NEW = version("alpha", 3), version("beta", 5)

Observation = frozenset[tuple[str, str]]


def searched(runtime: Runtime, mode: str) -> tuple[Observation, bool]:
    options = SearchOptions(query="marker term", mode=mode, top_k=50)
    hits = answering.search(runtime, LOCAL_ADMIN, NAME, options, keep_trace=False).hits
    mine = frozenset((h.chunk_id, h.text) for h in hits if h.document_id == "swapped")
    return mine, any(h.document_id == "stable" for h in hits)


def stored(runtime: Runtime) -> Observation:
    document = documents.get_document(runtime, LOCAL_ADMIN, NAME, "swapped")
    return frozenset((c["chunk_id"], c["text"]) for c in document["chunks"])


def test_every_query_sees_exactly_the_old_or_the_new_chunks_while_a_document_is_replaced(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime()
    collections.put_collection(
        runtime,
        LOCAL_ADMIN,
        NAME,
        collections.CollectionSpec(chunking={"max_tokens": 16, "overlap_tokens": 0}),
    )
    documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, [STABLE, NEW])
    new_search, new_stored = searched(runtime, "lexical")[0], stored(runtime)
    documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, [OLD])
    old_search, old_stored = searched(runtime, "lexical")[0], stored(runtime)
    assert len(old_search) == 3 and len(new_search) == 5
    assert old_search == old_stored and new_search == new_stored

    seen: Counter[str] = Counter()
    problems: list[str] = []
    reads = threading.Semaphore(0)
    done = threading.Event()
    lock = threading.Lock()

    def read(mode: str) -> None:
        while not done.is_set():
            try:
                if mode == "store":
                    observed, stable_found = stored(runtime), True
                else:
                    observed, stable_found = searched(runtime, mode)
            except Exception as exc:  # a failure in a thread must reach the test
                problems.append(f"{mode}: {exc!r}")
                return
            with lock:
                if observed == old_search:
                    seen["old"] += 1
                elif observed == new_search:
                    seen["new"] += 1
                else:
                    problems.append(f"{mode} saw {sorted(observed)}")
                if not stable_found:
                    problems.append(f"{mode} lost the stable document")
            reads.release()

    def write() -> None:
        try:
            for swap in range(SWAPS):
                documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, [NEW if swap % 2 else OLD])
                # Let at least one read land between two writes, so both versions are observed.
                reads.acquire(timeout=READ_WAIT_SECONDS)
        except Exception as exc:
            problems.append(f"writer: {exc!r}")
        finally:
            done.set()

    modes = ["lexical", "semantic", "store"][:READERS]
    threads = [threading.Thread(target=read, args=(mode,)) for mode in modes]
    threads.append(threading.Thread(target=write))
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=120)

    assert not any(thread.is_alive() for thread in threads)
    assert problems == []
    assert seen["old"] > 0 and seen["new"] > 0, seen
