"""The in-process bench at a small size: it runs, and its ratios and verdicts follow its figures.

No performance target is asserted: the figures depend on the machine. What is checked is that
every ratio and verdict the bench prints and writes is the arithmetic of the medians it reports.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.bench.command import add_bench_arguments, run_bench_command
from service.bench.references import TopK, agreement, top_k
from service.bench.synthetic import (
    SCHEMA,
    SELECTIVITIES_PER_MILLE,
    document_text,
    make_collection,
    make_queries,
    model_token_counter,
    selected_rows,
    selectivity_filters,
)
from service.bench.timing import Summary
from service.filters.check import check_filter
from service.filters.columns import AttributeColumns
from service.filters.evaluate import evaluate
from service.filters.parse import parse_filter
from service.index.collection_index import CollectionIndex
from service.index.graph import GraphSettings, VectorIndexSettings


def _parse(argv: list[str]) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    add_bench_arguments(parser)
    return parser.parse_args(argv)


@pytest.fixture(scope="module")
def small_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[dict[str, Any], str]:
    out = tmp_path_factory.mktemp("bench") / "bench.json"
    args = _parse(["--chunks", "2000", "--queries", "20", "--dims", "32", "--json", str(out)])
    return _run(args, out)


def _run(args: argparse.Namespace, out: Path) -> tuple[dict[str, Any], str]:
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        code = run_bench_command(args)
    assert code == 0
    return json.loads(out.read_text(encoding="utf-8")), printed.getvalue()


def _median(size: dict[str, Any], path: str) -> float:
    section, name = path.split("/", 1)
    return float(size[section][name]["median_ms"])


def test_bench_reports_every_stage_and_reference_at_a_small_size(
    small_run: tuple[dict[str, Any], str],
) -> None:
    results, _ = small_run
    (size,) = results["sizes"]
    assert size["chunks"] == 2000
    expected_stages = {
        "filter parse+check",
        "filter mask",
        "filter inference",
        "lexical",
        "lexical okapi",
        "lexical depth",
        "semantic depth",
        "fusion",
        "reading 100 candidates",
        "packing 100 into 1,000",
        "reading 1,000 candidates",
        "packing 1,000 into 32,768",
        "hybrid",
        "lexical feedback",
        "semantic feedback",
        "fusion weighted",
        "fusion min-max",
        "document support",
        "hybrid default steps",
        *(f"semantic {p / 10:g}%" for p in SELECTIVITIES_PER_MILLE),
    }
    assert set(size["stages"]) == expected_stages
    assert set(size["references"]) == {"numpy full scan", "bm25s", "rank_bm25"}
    for summary in [*size["stages"].values(), *size["references"].values()]:
        assert summary["runs"] == 20
        assert 0 < summary["median_ms"] <= summary["p95_ms"] <= summary["p99_ms"]


def test_ratios_are_the_reported_medians_divided(small_run: tuple[dict[str, Any], str]) -> None:
    results, printed = small_run
    (size,) = results["sizes"]
    names = {entry["name"] for entry in size["ratios"]}
    assert {"lexical / bm25s", "lexical okapi / rank_bm25"} <= names
    for entry in size["ratios"]:
        top = sum(_median(size, path) for path in entry["numerator"])
        bottom = sum(_median(size, path) for path in entry["denominator"])
        assert entry["value"] == pytest.approx(top / bottom, rel=1e-12)
        assert f"{entry['name']:<44} {top / bottom:>8.3f}" in printed


def test_target_verdicts_follow_the_reported_figures(small_run: tuple[dict[str, Any], str]) -> None:
    results, printed = small_run
    (size,) = results["sizes"]
    by_name = {t["target"]: t for t in size["targets"]}
    lexical = _median(size, "stages/lexical") / _median(size, "references/bm25s")
    assert by_name["lexical at most 1.0x bm25s"]["met"] is (lexical <= 1.0)
    speedup = _median(size, "references/rank_bm25") / _median(size, "stages/lexical okapi")
    assert by_name["lexical at least 50x faster than rank_bm25"]["value"] == pytest.approx(speedup)
    assert by_name["lexical at least 50x faster than rank_bm25"]["met"] is (speedup >= 50)
    for per_mille in SELECTIVITIES_PER_MILLE:
        label = f"{per_mille / 10:g}%"
        ratio = _median(size, f"stages/semantic {label}") / _median(
            size, "references/numpy full scan"
        )
        target = by_name[f"semantic at {label} at most 1.3x the numpy full scan"]
        assert target["met"] is (ratio <= 1.3)
    hybrid = _median(size, "stages/hybrid")
    parts = _median(size, "stages/lexical depth") + _median(size, "stages/semantic depth")
    hybrid_target = by_name["hybrid in process at most 1.2x (lexical + semantic) + 1 ms"]
    assert hybrid_target["limit"] == pytest.approx(1.2 * parts + 1.0)
    assert hybrid_target["met"] is (hybrid <= 1.2 * parts + 1.0)
    for candidates, budget, limit in ((100, 1_000, 1.0), (1_000, 32_768, 50.0)):
        packing = _median(size, f"stages/packing {candidates:,} into {budget:,}")
        target = by_name[
            f"packing {candidates:,} candidates into {budget:,} tokens at most {limit:g} ms"
        ]
        assert (target["value"], target["limit"]) == (packing, limit)
        assert target["met"] is (packing <= limit)
        assert f"{packing:.3f} ms (limit {limit:g} ms)" in printed
    memory = size["memory"]
    memory_ratio = memory["rss_delta_bytes"] / (
        memory["raw_vector_bytes"] + memory["postings_bytes"]
    )
    assert memory["ratio"] == pytest.approx(memory_ratio)
    assert memory["raw_vector_bytes"] == 2000 * 32 * 4
    for target in size["targets"]:
        mark = "[met]" if target["met"] else "[NOT MET]"
        assert f"{mark}" in printed and target["target"] in printed


def test_packing_stages_pack_the_whole_ranking_with_the_model_tokenizer(
    small_run: tuple[dict[str, Any], str],
) -> None:
    results, printed = small_run
    (size,) = results["sizes"]
    for candidates, budget in ((100, 1_000), (1_000, 32_768)):
        note = size["notes"][f"packing {candidates:,} into {budget:,}"]
        assert note["median_candidates"] == candidates
        assert 0 < note["median_tokens_used"] <= budget
        assert note["median_passages"] >= 1
        assert "WordPiece" in note["token_counter"]
    assert "packing 1,000 into 32,768 tokens: median 1000 candidates" in printed


def test_the_snapshot_rebuilds_each_synthetic_document_as_the_store_holds_it() -> None:
    collection = make_collection(25, 4, seed=1)
    snapshot = CollectionIndex.build(collection.records, metric="cosine", dimension=4).snapshot()
    for document_id in ("doc00000000", "doc00000001", "doc00000002"):
        text = document_text(collection, document_id)
        assert snapshot.document_span(document_id, 0, len(text)) == text


def test_stored_token_counts_are_the_model_tokenizers_counts_of_the_text() -> None:
    collection = make_collection(40, 4, seed=2)
    counter = model_token_counter()
    for record in collection.records[::7]:
        assert record.tokens == counter.count(record.text)
        assert record.chunk_id == f"{record.document_id}#{record.ordinal:04d}"
        assert record.lexical_tokens == [
            "document",
            record.document_id[3:].lstrip("0") or "0",
            *record.text.split(),
        ]


def test_lexical_and_semantic_rankings_agree_with_the_references(
    small_run: tuple[dict[str, Any], str],
) -> None:
    results, _ = small_run
    (size,) = results["sizes"]
    assert set(size["rankings"]) == {
        "semantic vs numpy full scan",
        "lexical smoothed vs bm25s",
        "lexical okapi vs rank_bm25",
    }
    for result in size["rankings"].values():
        assert result["queries"] == 20
        assert result["all_equal"], result


def test_each_selectivity_filter_selects_exactly_its_share_of_rows() -> None:
    size = 3001
    collection = make_collection(size, 4, seed=3)
    columns = AttributeColumns.build(SCHEMA, [r.attributes for r in collection.records])
    for per_mille in SELECTIVITIES_PER_MILLE:
        for selectivity_filter in selectivity_filters(size, per_mille):
            mask = evaluate(check_filter(parse_filter(selectivity_filter.text), SCHEMA), columns)
            expected = collection.places < selected_rows(size, selectivity_filter.per_mille)
            assert np.array_equal(mask, expected), selectivity_filter


def test_selected_rows_are_spread_over_the_collection() -> None:
    collection = make_collection(20_000, 4, seed=0)
    rows = np.flatnonzero(collection.places < selected_rows(20_000, 10))
    assert len(rows) == 200
    halves = np.bincount(rows * 2 // 20_000, minlength=2)
    assert halves.min() > 60


def test_the_query_set_is_the_same_whatever_the_collection() -> None:
    first = make_queries(30, 16, seed=5)
    again = make_queries(30, 16, seed=5)
    other = make_queries(30, 16, seed=6)
    assert first.token_lists == again.token_lists
    assert np.array_equal(first.vectors, again.vectors)
    assert first.token_lists != other.token_lists
    assert all(len(set(tokens)) == len(tokens) for tokens in first.token_lists)
    assert np.allclose(np.linalg.norm(first.vectors, axis=1), 1.0, atol=1e-5)


def test_reference_top_k_orders_its_choice_by_score_then_position() -> None:
    scores = np.array([0.5, 0.9, 0.5, 0.1, 0.9, 0.5])
    chosen = top_k(scores, 4).tolist()
    assert chosen[:2] == [1, 4]
    assert set(chosen[2:]) <= {0, 2, 5} and chosen[2] < chosen[3]


def test_agreement_accepts_a_different_order_of_ties_but_not_a_wrong_row() -> None:
    full = np.array([3.0, 2.0, 2.0, 1.0, 0.0])
    reference = TopK(np.array([0, 2, 1]), np.array([3.0, 2.0, 2.0]))
    tied_order = TopK(np.array([0, 1, 2]), np.array([3.0, 2.0, 2.0]))
    wrong_row = TopK(np.array([0, 1, 3]), np.array([3.0, 2.0, 2.0]))
    result = agreement(
        [tied_order, wrong_row], [reference, reference], [full, full], scale=1.0, positive_only=True
    )
    assert (result.identical, result.equal_up_to_ties, result.all_equal) == (0, 1, False)


def test_summary_percentiles_interpolate_linearly() -> None:
    summary = Summary.of([float(v) for v in range(1, 102)])
    assert (summary.median_ms, summary.p95_ms, summary.p99_ms) == (51.0, 96.0, 100.0)
    assert math.isclose(Summary.of([2.0]).p99_ms, 2.0)


@pytest.mark.parametrize("missing", ["bm25s", "rank_bm25"])
def test_without_a_reference_library_the_bench_names_the_extra_and_exits_1(
    missing: str, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setitem(sys.modules, missing, None)  # makes ``import`` raise ImportError
    code = run_bench_command(_parse(["--chunks", "2000", "--queries", "3"]))
    captured = capsys.readouterr()
    assert code == 1
    assert missing in captured.err
    assert "pip install -e '.[bench]'" in captured.err
    assert captured.out == ""


def _small_graph_setup(seed: int) -> tuple[np.ndarray, VectorIndexSettings]:
    """40 random unit centres in 16 dimensions, and a small graph built at any size."""
    rng = np.random.default_rng(seed)
    centres = rng.standard_normal((40, 16)).astype(np.float32)
    centres /= np.linalg.norm(centres, axis=1, keepdims=True)
    graph = GraphSettings(links=8, build_breadth=32, search_breadth=32)
    return centres, VectorIndexSettings(index="graph", graph=graph)


def test_the_vector_index_bench_measures_every_filter_before_and_after_updates() -> None:
    from service.bench.vector_index import run_vector_index

    centres, settings = _small_graph_setup(3)
    figures = run_vector_index(
        3000,
        dimension=16,
        queries=6,
        depth=20,
        seed=1,
        settings=settings,
        centres=centres,
        progress=lambda line: None,
    )
    assert figures["memory"]["graph_views_vectors"]
    for phase in ("fresh", "replaced", "rebuilt"):
        rows = figures[phase]
        assert {(row["filter"], row["selectivity"]) for row in rows} >= {
            ("random", 1.0),
            ("random", 0.0001),
            ("near", 0.01),
            ("far", 0.01),
        }
        for row in rows:
            assert sum(row["plans"].values()) == 6
            assert row["outside_mask"] == 0
            assert 0.0 <= row["worst_recall_at_10"] <= row["recall_at_10"] <= 1.0
        # The graph is planned without a filter, wherever this setting lets it.
        assert rows[0]["plans"].get("graph", 0) == 6


def test_the_graph_hybrid_bench_holds_each_filter_to_exact_search_before_and_after_updates() -> (
    None
):
    from service.bench.graph_hybrid import run_graph_hybrid
    from service.bench.report import print_graph_hybrid
    from service.bench.verdicts import graph_hybrid_targets

    centres, settings = _small_graph_setup(5)
    figures = run_graph_hybrid(
        3000,
        dimension=16,
        queries=6,
        top_k=10,
        depth=20,
        seed=1,
        settings=settings,
        centres=centres,
        progress=lambda line: None,
    )
    assert figures["graph_rows"] == 3000 and figures["memory"]["graph_views_vectors"]
    assert figures["replaced_rows"] == figures["tail_rows"] == 300
    for phase in ("fresh", "replaced"):
        rows = figures[phase]
        assert [row["selectivity"] for row in rows] == ["100%", "50%", "10%", "1%", "0.1%"]
        # Rows written again keep their attributes, so each filter keeps its share.
        assert [row["candidates"] for row in rows] == [3000, 1500, 300, 30, 3]
        for row in rows:
            for mode in ("hybrid", "semantic"):
                entry = row[mode]
                assert sum(entry["plans"].values()) == 6
                assert entry["outside_mask"] == 0
                assert 0.0 <= entry["worst_recall_at_10"] <= entry["recall_at_10"] <= 1.0
                if set(entry["plans"]) != {"graph"} and entry["fallbacks"] == 0:
                    # Exact plans rank as the reference does.
                    assert entry["recall_at_10"] == entry["recall_at_100"] == 1.0
        assert rows[0]["semantic"]["plans"] == {"graph": 6}

    targets = {target["target"]: target for target in graph_hybrid_targets(figures)}
    slowest = max(row["hybrid"]["planned"]["median_ms"] for row in figures["fresh"])
    median = targets["hybrid median at most 5 ms under every filter"]
    assert (median["value"], median["met"]) == (slowest, slowest <= 5.0)
    lowest = min(row["hybrid"]["recall_at_100"] for row in figures["replaced"])
    recall = targets[
        "replaced: hybrid recall@100 at least 0.95 under every filter (mean over the queries)"
    ]
    assert (recall["value"], recall["met"]) == (lowest, lowest >= 0.95)
    assert targets["fresh: no row outside the mask"]["met"] is True
    memory = figures["memory"]
    assert memory["ratio"] == memory["rss_growth_bytes"] / (
        memory["raw_vector_bytes"] + memory["postings_bytes"]
    )
    figures["targets"] = list(targets.values())
    printed: list[str] = []
    print_graph_hybrid(figures, printed.append)
    # Per phase, a row for each mode and a line of the hybrid's stage times.
    assert sum(line.lstrip().startswith("position < 3000 ") for line in printed) == 6
    assert all(any(name in line for line in printed) for name in targets)
