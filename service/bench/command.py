"""``excerpta bench``: argument parsing and the run that prints and returns every figure.

Exit status: 0 when the run completed (targets are reported, not enforced, in process),
1 when the HTTP run saw an error or could not run or the in-process run's reference libraries
(the ``bench`` extra) are missing, 2 on bad arguments.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from service.bench.references import require_reference_libraries
from service.bench.report import (
    machine,
    print_answering,
    print_graph_hybrid,
    print_http,
    print_http_with_ingest,
    print_ingest_throughput,
    print_machine,
    print_model,
    print_size,
)
from service.bench.synthetic import check_parameters, make_queries
from service.bench.verdicts import (
    answering_targets,
    graph_hybrid_targets,
    http_targets,
    ingest_targets,
    model_targets,
    ratios,
    targets,
)
from service.index.graph import (
    DEFAULT_BUILD_BREADTH,
    DEFAULT_LINKS,
    DEFAULT_MAX_SEARCH_BREADTH,
    DEFAULT_SEARCH_BREADTH,
    GraphSettings,
    IndexMode,
    VectorIndexSettings,
)

DEFAULT_SIZES = "10000,100000,1000000"


def _sizes(value: str) -> list[int]:
    try:
        sizes = [int(part.replace("_", "")) for part in value.split(",") if part.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError("--chunks takes sizes such as 10000,100000") from None
    if not sizes or any(size < 10 for size in sizes):
        raise argparse.ArgumentTypeError("every size must be at least 10 chunks")
    return sizes


def _positive(value: str) -> int:
    number = int(value)
    if number < 1:
        raise argparse.ArgumentTypeError("must be at least 1")
    return number


def _positive_float(value: str) -> float:
    number = float(value)
    if not number > 0:
        raise argparse.ArgumentTypeError("must be positive")
    return number


def add_bench_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--chunks", type=_sizes, default=_sizes(DEFAULT_SIZES), help="collection sizes"
    )
    parser.add_argument("--dims", type=_positive, default=384, help="vector dimensions")
    parser.add_argument("--queries", type=_positive, default=200, help="queries per stage")
    parser.add_argument("--top-k", type=_positive, default=10)
    parser.add_argument("--depth", type=_positive, default=100, help="depth of the hybrid query")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--threads",
        type=_positive,
        help="BLAS threads for ours and the references alike (default: the library's own)",
    )
    parser.add_argument("--json", type=Path, help="write every figure to this file")
    parser.add_argument(
        "--with-model",
        action="store_true",
        help="also time the real embedder and ingestion through the real use case",
    )
    parser.add_argument(
        "--model-documents", type=_positive, default=200, help="documents ingested with the model"
    )
    parser.add_argument(
        "--vector-index",
        action="store_true",
        help="measure the semantic plans (graph, gather, scan) on clustered vectors instead",
    )
    parser.add_argument(
        "--graph-hybrid",
        action="store_true",
        help="measure hybrid and semantic queries over the vector index (the default: a graph"
        " above its threshold) against exact search, fresh and after 10%% of rows are written"
        " again, on clustered vectors instead",
    )
    parser.add_argument(
        "--graph-links", type=_positive, default=DEFAULT_LINKS, help="graph neighbours per node"
    )
    parser.add_argument("--graph-build-breadth", type=_positive, default=DEFAULT_BUILD_BREADTH)
    parser.add_argument("--graph-search-breadth", type=_positive, default=DEFAULT_SEARCH_BREADTH)
    parser.add_argument(
        "--graph-max-search-breadth", type=_positive, default=DEFAULT_MAX_SEARCH_BREADTH
    )
    parser.add_argument(
        "--restart",
        action="store_true",
        help="time a start from a saved index against one that builds the index from the store",
    )
    parser.add_argument(
        "--http",
        action="store_true",
        help="drive the real server over HTTP instead of the in-process run",
    )
    parser.add_argument(
        "--answering",
        action="store_true",
        help="time answers against contexts for labelled questions over a real corpus instead",
    )
    parser.add_argument(
        "--answering-corpus",
        type=Path,
        default=Path("corpus_example"),
        help="folder with documents/ and schema.json",
    )
    parser.add_argument(
        "--answering-questions",
        type=Path,
        default=Path("corpus_example/answer_questions.jsonl"),
        help="labelled questions (the format of eval --answers)",
    )
    parser.add_argument(
        "--answering-rounds", type=_positive, default=3, help="rounds over the questions"
    )
    parser.add_argument(
        "--http-chunks",
        type=_positive,
        default=100_000,
        help="chunks in the served collection; the HTTP targets are stated for 100,000",
    )
    parser.add_argument(
        "--http-seconds", type=_positive_float, default=10.0, help="seconds per concurrency level"
    )
    parser.add_argument(
        "--http-clients", default="1,4,16", help="concurrency levels, comma separated"
    )
    parser.add_argument(
        "--with-ingest",
        action="store_true",
        help="with --http: each level idle and while real text is ingested into a second "
        "collection (--http-seconds each)",
    )
    parser.add_argument(
        "--ingest-source",
        type=Path,
        action="append",
        help="a folder or .jsonl of real documents to ingest (repeatable; default "
        "corpus_example/documents)",
    )
    parser.add_argument(
        "--ingest-throughput",
        action="store_true",
        help="chunks per second ingested through jobs by 1, 2, ... worker processes instead",
    )
    parser.add_argument(
        "--workers", default="1,2", help="worker counts for --ingest-throughput, comma separated"
    )
    parser.add_argument(
        "--worker-threads", type=_positive, default=1, help="torch threads of each worker"
    )
    parser.add_argument(
        "--ingest-documents",
        type=_positive,
        default=400,
        help="documents ingested by each --ingest-throughput run (the first of the sources)",
    )


def _progress(line: str) -> None:
    print(f"... {line}", file=sys.stderr, flush=True)


def run_bench(args: argparse.Namespace) -> dict[str, Any]:
    """Run what ``args`` ask for, print it, and return every figure."""
    if args.with_ingest and not args.http:
        raise ValueError("--with-ingest goes with --http")
    if not args.http and not args.answering and not args.ingest_throughput and not args.restart:
        require_reference_libraries()
    info = machine()
    print_machine(info, print)
    results: dict[str, Any] = {
        "machine": info,
        "settings": {
            "dimensions": args.dims,
            "queries": args.queries,
            "top_k": args.top_k,
            "depth": args.depth,
            "seed": args.seed,
        },
    }
    if args.answering:
        from service.bench.answering import run_answering

        answering = run_answering(
            corpus=args.answering_corpus,
            questions=args.answering_questions,
            rounds=args.answering_rounds,
            progress=_progress,
        )
        answering["targets"] = answering_targets(answering)
        print_answering(answering, print)
        results["answering"] = answering
    if args.vector_index:
        results["vector_index"] = _run_vector_index(args)
        return results
    if args.graph_hybrid:
        results["graph_hybrid"] = _run_graph_hybrid(args)
        return results
    if args.restart:
        results["restart"] = _run_restart(args)
        return results
    sources = args.ingest_source or [Path("corpus_example/documents")]
    if args.ingest_throughput:
        from service.bench.ingest_load import run_ingest_throughput

        throughput = run_ingest_throughput(
            sources=sources,
            documents=args.ingest_documents,
            workers=[_positive(part) for part in args.workers.split(",") if part.strip()],
            threads=args.worker_threads,
            progress=_progress,
        )
        print_ingest_throughput(throughput, print)
        results["ingest_throughput"] = throughput
        return results
    queries = make_queries(args.queries, args.dims, args.seed)
    if args.http:
        from service.bench.http import run_http

        check_parameters(args.http_chunks, args.dims)
        clients = [_positive(part) for part in args.http_clients.split(",") if part.strip()]
        if args.with_ingest:
            from service.bench.ingest_load import run_http_with_ingest

            with_ingest = run_http_with_ingest(
                chunks=args.http_chunks,
                dimension=args.dims,
                queries=queries,
                seed=args.seed,
                seconds=args.http_seconds,
                clients=clients,
                top_k=args.top_k,
                depth=args.depth,
                sources=sources,
                progress=_progress,
            )
            with_ingest["targets"] = ingest_targets(with_ingest)
            print_http_with_ingest(with_ingest, print)
            results["http_with_ingest"] = with_ingest
            return results
        http = run_http(
            chunks=args.http_chunks,
            dimension=args.dims,
            queries=queries,
            seed=args.seed,
            seconds=args.http_seconds,
            clients=clients,
            top_k=args.top_k,
            depth=args.depth,
            progress=_progress,
        )
        http["targets"] = http_targets(http)
        print_http(http, print)
        results["http"] = http
        return results

    from service.bench.inprocess import run_size

    results["sizes"] = []
    for size in args.chunks:
        check_parameters(size, args.dims)
        figures = run_size(
            size,
            dimension=args.dims,
            queries=queries,
            seed=args.seed,
            top_k=args.top_k,
            depth=args.depth,
            progress=_progress,
        )
        figures["ratios"] = ratios(figures)
        figures["targets"] = targets(figures)
        print_size(figures, print)
        sys.stdout.flush()
        results["sizes"].append(figures)
    if args.with_model:
        from service.bench.model import run_model

        model = run_model(queries=queries, documents=args.model_documents, seed=args.seed)
        model["targets"] = model_targets(model)
        print_model(model, print)
        results["model"] = model
    return results


def _graph_settings(args: argparse.Namespace, index: IndexMode) -> VectorIndexSettings:
    return VectorIndexSettings(
        index=index,
        graph=GraphSettings(
            links=args.graph_links,
            build_breadth=args.graph_build_breadth,
            search_breadth=args.graph_search_breadth,
            max_search_breadth=args.graph_max_search_breadth,
        ),
    )


def _run_restart(args: argparse.Namespace) -> list[dict[str, Any]]:
    from service.bench.restart import print_restart, run_restart

    figures = []
    for size in args.chunks:
        result = run_restart(
            size,
            dimension=args.dims,
            seed=args.seed,
            vectors=_graph_settings(args, "graph"),
            progress=_progress,
        )
        print_restart(result, print)
        sys.stdout.flush()
        figures.append(result)
    return figures


def _on_clustered_vectors(
    args: argparse.Namespace,
    run: Callable[[int, VectorIndexSettings, np.ndarray], dict[str, Any]],
    show: Callable[[dict[str, Any]], None],
) -> list[dict[str, Any]]:
    """``run`` for each size over vectors clustered around the model's embeddings, with the
    graph settings of the arguments; ``show`` prints each size's figures as they come."""
    from service.bench.vector_index import model_centres

    settings = _graph_settings(args, "auto")
    _progress("embedding the corpus paragraphs (cluster centres)")
    centres = model_centres()
    figures = []
    for size in args.chunks:
        result = run(size, settings, centres)
        show(result)
        sys.stdout.flush()
        figures.append(result)
    return figures


def _run_vector_index(args: argparse.Namespace) -> list[dict[str, Any]]:
    from service.bench.vector_index import print_vector_index, run_vector_index

    def run(size: int, settings: VectorIndexSettings, centres: np.ndarray) -> dict[str, Any]:
        return run_vector_index(
            size,
            dimension=args.dims,
            queries=args.queries,
            depth=args.depth,
            seed=args.seed,
            settings=settings,
            centres=centres,
            progress=_progress,
        )

    return _on_clustered_vectors(args, run, lambda result: print_vector_index(result, print))


def _run_graph_hybrid(args: argparse.Namespace) -> list[dict[str, Any]]:
    from service.bench.graph_hybrid import run_graph_hybrid

    def run(size: int, settings: VectorIndexSettings, centres: np.ndarray) -> dict[str, Any]:
        check_parameters(size, args.dims)
        result = run_graph_hybrid(
            size,
            dimension=args.dims,
            queries=args.queries,
            top_k=args.top_k,
            depth=args.depth,
            seed=args.seed,
            settings=settings,
            centres=centres,
            progress=_progress,
        )
        result["targets"] = graph_hybrid_targets(result)
        return result

    return _on_clustered_vectors(args, run, lambda result: print_graph_hybrid(result, print))


def run_bench_command(args: argparse.Namespace) -> int:
    try:
        with threadpool_limits(limits=args.threads):
            results = run_bench(args)
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except RuntimeError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=2, default=str) + "\n", encoding="utf-8")
    if args.http and any(target["met"] is False for target in _errors_targets(results)):
        return 1
    return 0


def _errors_targets(results: dict[str, Any]) -> list[dict[str, Any]]:
    """The zero-errors verdicts of an HTTP run: any error there fails the command."""
    run = results.get("http") or results.get("http_with_ingest") or {}
    return [t for t in run.get("targets", []) if "errors" in t["target"]]
