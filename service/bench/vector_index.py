"""``excerpta bench --vector-index``: the semantic ranking's plans against exact search.

Vectors: clustered like text embeddings, not uniform. The centres are the bundled model's
embeddings of the paragraphs of ``corpus_example/documents`` (real text of the project's own
scenario, read and parsed as ingest reads it); each row lies on the segment from a centre
towards one of that centre's ten nearest centres (a random share of the way, up to half), plus
isotropic noise, normalised, so rows form clusters that run into their neighbours, as
embeddings of related passages do. Queries are
made the same way from random centres, so each lands inside the data, near some cluster.

Filters, each giving the candidate mask directly (the filter engine is timed elsewhere):
``random`` keeps rows of a random permutation's first ``s * N`` places; ``near`` keeps the
``s * N`` rows whose centres are closest to the query's centre (the filter agrees with the
query), ``far`` those whose centres are farthest (it disagrees: the graph must walk through
rows it may not return). Selectivities from 100% to 0.01%.

For each filter and query the planned ranking (``semantic_ranking``) is timed and compared
with the exact ranking of the same candidates (``exact_semantic_ranking``), timed too:
recall@10 and recall@100 are the shares of the exact top rows the planned ranking returns;
every returned row is checked against the mask. The same is measured after 10% of the rows
are replaced (deleted and written again with new vectors: the tail the graph does not cover
yet), and after the background step that compacts and builds the graph anew.
"""

from __future__ import annotations

import re
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from service.bench.timing import Summary
from service.index.collection_index import ChunkRecord, CollectionIndex, IndexSnapshot
from service.index.graph import VectorIndexSettings
from service.ingest.parsing import parse_document
from service.ingest.source_files import read_source
from service.retrieval.ranking import (
    begin_semantic_ranking,
    exact_semantic_ranking,
    finish_semantic_ranking,
)

CORPUS = Path(__file__).resolve().parents[2] / "corpus_example" / "documents"
NEIGHBOUR_CENTRES = 10
NOISE = 0.35
SELECTIVITIES = (1.0, 0.1, 0.01, 0.001, 0.0001)
CORRELATED_SELECTIVITIES = (0.1, 0.01, 0.001)
REPLACED_SHARE = 0.1
ROWS_PER_DOCUMENT = 10


def corpus_paragraphs(folder: Path = CORPUS) -> list[str]:
    """The corpus's paragraphs of at least five words, read and parsed as ingest does."""
    paragraphs: list[str] = []
    for item in read_source(folder):
        if item.document is None:
            continue
        media_type = item.document.get("media_type", "text/plain")
        parsed = parse_document(item.document["text"], media_type)
        for block in re.split(r"\n\s*\n", parsed.text):
            block = " ".join(block.split())
            if len(block.split()) >= 5:
                paragraphs.append(block)
    return paragraphs


def model_centres() -> np.ndarray:
    from service.embedding.minilm import MiniLmEmbedder

    paragraphs = corpus_paragraphs()
    if not paragraphs:
        raise RuntimeError(f"no paragraphs to embed under {CORPUS}")
    vectors = MiniLmEmbedder().embed_documents(paragraphs)
    return np.asarray(vectors, dtype=np.float32)


@dataclass(frozen=True)
class ClusteredVectors:
    rows: np.ndarray
    row_centres: np.ndarray
    queries: np.ndarray
    query_centres: np.ndarray
    centres: np.ndarray


def _near(centres: np.ndarray, count: int, rng: np.random.Generator) -> tuple[np.ndarray, ...]:
    similarity = centres @ centres.T
    np.fill_diagonal(similarity, -np.inf)
    neighbours = np.argsort(-similarity, axis=1)[:, :NEIGHBOUR_CENTRES]
    origin = rng.integers(0, len(centres), count)
    toward = neighbours[origin, rng.integers(0, neighbours.shape[1], count)]
    share = rng.uniform(0.0, 0.5, (count, 1)).astype(np.float32)
    points = centres[origin] + share * (centres[toward] - centres[origin])
    noise = rng.standard_normal(points.shape).astype(np.float32)
    points += NOISE * noise / np.sqrt(centres.shape[1], dtype=np.float32)
    points /= np.linalg.norm(points, axis=1, keepdims=True)
    return points.astype(np.float32), origin


def clustered_vectors(centres: np.ndarray, rows: int, queries: int, seed: int) -> ClusteredVectors:
    rng = np.random.default_rng(seed)
    row_vectors, row_centres = _near(centres, rows, rng)
    query_vectors, query_centres = _near(centres, queries, rng)
    return ClusteredVectors(row_vectors, row_centres, query_vectors, query_centres, centres)


def _records(vectors: np.ndarray, first: int, generation: int) -> dict[str, list[ChunkRecord]]:
    by_document: dict[str, list[ChunkRecord]] = {}
    for offset, vector in enumerate(vectors):
        row = first + offset
        document = f"d{row // ROWS_PER_DOCUMENT:07d}"
        ordinal = row % ROWS_PER_DOCUMENT
        by_document.setdefault(document, []).append(
            ChunkRecord(
                chunk_id=f"{document}#{ordinal:04d}",
                document_id=document,
                ordinal=ordinal,
                title=document,
                section="",
                text=f"g{generation}",
                char_start=0,
                char_end=2,
                tokens=1,
                lexical_tokens=[f"g{generation}"],
                vector=vector,
            )
        )
    return by_document


def _masks(
    snapshot: IndexSnapshot,
    data: ClusteredVectors,
    centres_of_rows: np.ndarray,
    query: int,
    rng_order: np.ndarray,
) -> list[tuple[str, float, np.ndarray]]:
    """(kind, selectivity, mask) for one query over the snapshot's live rows."""
    live = snapshot.live
    live_rows = np.flatnonzero(live)
    masks: list[tuple[str, float, np.ndarray]] = []
    for share in SELECTIVITIES:
        keep = max(1, round(share * len(live_rows)))
        mask = np.zeros(snapshot.n_rows, dtype=bool)
        mask[live_rows[rng_order < keep]] = True
        masks.append(("random", share, mask))
    closeness = data.centres @ data.centres[data.query_centres[query]]
    row_closeness = closeness[centres_of_rows[live_rows]]
    order = np.argsort(-row_closeness, kind="stable")
    for share in CORRELATED_SELECTIVITIES:
        keep = max(1, round(share * len(live_rows)))
        for kind, chosen in (("near", order[:keep]), ("far", order[::-1][:keep])):
            mask = np.zeros(snapshot.n_rows, dtype=bool)
            mask[live_rows[chosen]] = True
            masks.append((kind, share, mask))
    return masks


def recall_at(found: np.ndarray, exact: np.ndarray, at: int) -> float:
    """The share of the exact ranking's first ``at`` rows among the found ranking's first ``at``."""
    wanted = exact[:at]
    if len(wanted) == 0:
        return 1.0
    return len(np.intersect1d(found[:at], wanted)) / len(wanted)


def outside_mask(rows: np.ndarray, mask: np.ndarray) -> int:
    """How many of ``rows`` the candidate mask does not hold (there must be none)."""
    return int(np.count_nonzero(~mask[rows]))


def replaced_documents(
    centres: np.ndarray, documents: int, rows_per_document: int, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A ``REPLACED_SHARE`` of ``documents`` chosen to be written again (their numbers in
    ascending order), and new clustered rows for them, ``rows_per_document`` each in that
    order, with the centres the rows were drawn around."""
    chosen = rng.choice(documents, max(1, round(REPLACED_SHARE * documents)), replace=False)
    rows, row_centres = _near(centres, len(chosen) * rows_per_document, rng)
    return np.sort(chosen), rows, row_centres


def measure(
    snapshot: IndexSnapshot,
    data: ClusteredVectors,
    centres_of_rows: np.ndarray,
    depth: int,
    seed: int,
) -> list[dict[str, Any]]:
    """Every filter's figures over the query set on one snapshot."""
    rng = np.random.default_rng(seed + 1)
    order = rng.permutation(snapshot.live_rows)
    figures: dict[tuple[str, float], dict[str, list[Any]]] = {}
    for query in range(len(data.queries)):
        vector = data.queries[query]
        for kind, share, mask in _masks(snapshot, data, centres_of_rows, query, order):
            entry = figures.setdefault(
                (kind, share),
                {"ms": [], "exact_ms": [], "r10": [], "r100": [], "plans": [], "fallbacks": []},
            )
            candidates = int(np.count_nonzero(mask))
            started = time.perf_counter_ns()
            scan = begin_semantic_ranking(snapshot, vector, mask, candidates, depth)
            ranking, plan = finish_semantic_ranking(snapshot, scan, mask, depth)
            entry["ms"].append((time.perf_counter_ns() - started) / 1e6)
            started = time.perf_counter_ns()
            exact = exact_semantic_ranking(snapshot, vector, mask, depth)
            entry["exact_ms"].append((time.perf_counter_ns() - started) / 1e6)
            entry.setdefault("outside", []).append(outside_mask(ranking.rows, mask))
            entry["r10"].append(recall_at(ranking.rows, exact.rows, 10))
            entry["r100"].append(recall_at(ranking.rows, exact.rows, 100))
            entry["plans"].append(plan.planned)
            entry["fallbacks"].append(plan.fallback)
            entry.setdefault("work", []).append(plan.actual_work)
            entry.setdefault("estimated", []).append(plan.estimated_work)
            entry.setdefault("candidates", []).append(candidates)
    rows = []
    for (kind, share), entry in figures.items():
        plans = {name: entry["plans"].count(name) for name in sorted(set(entry["plans"]))}
        fallbacks = sum(1 for item in entry["fallbacks"] if item is not None)
        rows.append(
            {
                "filter": kind,
                "selectivity": share,
                "candidates_median": int(np.median(entry["candidates"])),
                "plans": plans,
                "fallbacks": fallbacks,
                "estimated_work_median": int(np.median(entry["estimated"])),
                "actual_work_median": int(np.median(entry["work"])),
                "planned": Summary.of(entry["ms"]).as_dict(),
                "exact": Summary.of(entry["exact_ms"]).as_dict(),
                "recall_at_10": float(np.mean(entry["r10"])),
                "worst_recall_at_10": float(np.min(entry["r10"])),
                "recall_at_100": float(np.mean(entry["r100"])),
                "outside_mask": int(sum(entry["outside"])),
            }
        )
    return rows


def run_vector_index(
    size: int,
    *,
    dimension: int,
    queries: int,
    depth: int,
    seed: int,
    settings: VectorIndexSettings,
    centres: np.ndarray,
    progress: Callable[[str], None],
) -> dict[str, Any]:
    if centres.shape[1] != dimension:
        raise ValueError(f"--vector-index needs --dims {centres.shape[1]} (the model's)")
    data = clustered_vectors(centres, size, queries, seed)
    progress(f"{size:,} rows: building the index")
    index = CollectionIndex.build(
        [r for rs in _records(data.rows, 0, 0).values() for r in rs],
        metric="cosine",
        dimension=dimension,
    )
    started = time.perf_counter()
    index.build_graph(settings, compact=False)
    build_seconds = time.perf_counter() - started
    snapshot = index.snapshot()
    graph = snapshot.graph
    if graph is None:
        raise RuntimeError("the graph was not published")
    vector_bytes = snapshot.vectors.rows.nbytes
    postings_bytes = graph.nbytes
    result: dict[str, Any] = {
        "chunks": size,
        "graph_build_seconds": build_seconds,
        "settings": {"index": settings.index, **settings.graph.__dict__},
        "memory": {
            "vectors_bytes": vector_bytes,
            "graph_bytes": postings_bytes,
            "graph_views_vectors": graph.views_rows,
            "ratio": (vector_bytes + postings_bytes) / vector_bytes,
        },
    }
    progress(f"{size:,} rows: graph built in {build_seconds:.1f} s; measuring")
    centres_of_rows = data.row_centres
    result["fresh"] = measure(snapshot, data, centres_of_rows, depth, seed)

    # Replace 10% of the documents: their rows become tombstones, new rows form the tail.
    rng = np.random.default_rng(seed + 2)
    documents = size // ROWS_PER_DOCUMENT
    replaced, fresh_rows, fresh_centres = replaced_documents(
        centres, documents, ROWS_PER_DOCUMENT, rng
    )
    batch: dict[str, list[ChunkRecord]] = {}
    for number, document in enumerate(replaced.tolist()):
        first = document * ROWS_PER_DOCUMENT
        vectors = fresh_rows[number * ROWS_PER_DOCUMENT : (number + 1) * ROWS_PER_DOCUMENT]
        batch.update(_records(vectors, first, 1))
    index.replace_documents(batch)
    snapshot = index.snapshot()
    old = snapshot.n_rows - len(fresh_rows)
    centres_of_rows = np.concatenate([data.row_centres[:old], fresh_centres])
    progress(f"{size:,} rows: {len(fresh_rows):,} rows replaced; measuring with the tail")
    result["replaced"] = measure(snapshot, data, centres_of_rows, depth, seed)

    started = time.perf_counter()
    index.build_graph(settings, compact=True)
    result["compact_and_build_seconds"] = time.perf_counter() - started
    snapshot = index.snapshot()
    live = np.flatnonzero(snapshot.lexical.live)
    if len(live) != snapshot.n_rows:
        raise RuntimeError("compaction left tombstones")
    kept = np.flatnonzero(np.isin(np.arange(old), _replaced_rows(replaced), invert=True))
    centres_of_rows = np.concatenate([centres_of_rows[kept], fresh_centres])
    progress(f"{size:,} rows: compacted and rebuilt; measuring")
    result["rebuilt"] = measure(snapshot, data, centres_of_rows, depth, seed)
    return result


def _replaced_rows(documents: np.ndarray) -> np.ndarray:
    return (documents[:, None] * ROWS_PER_DOCUMENT + np.arange(ROWS_PER_DOCUMENT)).ravel()


def print_vector_index(figures: dict[str, Any], emit: Callable[[str], None]) -> None:
    memory = figures["memory"]
    emit("")
    emit(
        f"vector index at {figures['chunks']:,} chunks: graph {figures['settings']}, built in "
        f"{figures['graph_build_seconds']:.1f} s; compaction with a new graph "
        f"{figures['compact_and_build_seconds']:.1f} s"
    )
    emit(
        f"memory: vectors {memory['vectors_bytes'] / 2**20:.1f} MiB, graph "
        f"{memory['graph_bytes'] / 2**20:.1f} MiB (reads the vectors in place: "
        f"{memory['graph_views_vectors']}), (vectors + graph) / vectors = {memory['ratio']:.2f}"
    )
    for phase in ("fresh", "replaced", "rebuilt"):
        emit(f"  {phase}:")
        emit(
            "    filter  selectivity  candidates  plans                     fallbacks  "
            "work est/actual  median ms  p99 ms  exact median ms  recall@10 (worst)  "
            "recall@100  outside"
        )
        for row in figures[phase]:
            plans = ", ".join(f"{name} {count}" for name, count in row["plans"].items())
            emit(
                f"    {row['filter']:<7} {row['selectivity'] * 100:>10.2f}%  "
                f"{row['candidates_median']:>10,}  {plans:<25} {row['fallbacks']:>9}  "
                f"{row['estimated_work_median']:>7}/{row['actual_work_median']:<7}  "
                f"{row['planned']['median_ms']:>9.3f}  {row['planned']['p99_ms']:>6.2f}  "
                f"{row['exact']['median_ms']:>15.3f}  {row['recall_at_10']:>9.3f} "
                f"({row['worst_recall_at_10']:.2f})  {row['recall_at_100']:>10.3f}  "
                f"{row['outside_mask']:>7}"
            )
