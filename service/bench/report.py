"""Plain-text tables of a bench run, printed from the same figures ``--json`` writes."""

from __future__ import annotations

import os
import platform
import sys
from collections.abc import Callable
from typing import Any

import numpy as np

Write = Callable[[str], None]

_STAGE_LABELS = {
    "filter parse+check": "filter parse + check (3 clauses)",
    "filter mask": "filter mask (3 clauses)",
    "filter inference": "filter inference (one question)",
    "lexical": "lexical, smoothed idf, top k",
    "lexical okapi": "lexical, okapi idf, top k",
    "lexical depth": "lexical, smoothed idf, at depth",
    "semantic depth": "semantic 100%, at depth",
    "fusion": "fusion (RRF of both at depth)",
    "reading 100 candidates": "reading 100 candidates",
    "packing 100 into 1,000": "packing 100 candidates, 1,000 tokens",
    "reading 1,000 candidates": "reading 1,000 candidates",
    "packing 1,000 into 32,768": "packing 1,000 candidates, 32,768 tokens",
    "lexical feedback": "lexical feedback (RM3) at depth",
    "semantic feedback": "semantic feedback (Rocchio) at depth",
    "fusion weighted": "fusion (weighted RRF) at depth",
    "fusion min-max": "fusion (min-max scores) at depth",
    "document support": "document support (second chunk)",
    "hybrid": "hybrid query, whole, in process",
    "hybrid default steps": "hybrid, the default's steps, in process",
}


def machine() -> dict[str, Any]:
    """What the figures were measured on."""
    cpu = ""
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as info:
            cpu = next(
                (line.split(":", 1)[1].strip() for line in info if line.startswith("model name")),
                "",
            )
    except OSError:
        cpu = platform.processor()
    memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    from threadpoolctl import threadpool_info

    pools = [
        {
            "api": p.get("internal_api"),
            "threads": p.get("num_threads"),
            "architecture": p.get("architecture"),
        }
        for p in threadpool_info()
    ]
    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "memory_bytes": memory,
        "python": sys.version.split()[0],
        "numpy": np.__version__,
        "blas_pools": pools,
        "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE"),
        "load_average_1min": os.getloadavg()[0],
    }


def print_machine(info: dict[str, Any], write: Write) -> None:
    pools = ", ".join(
        f"{p['api']} {p['threads']} threads ({p['architecture']})" for p in info["blas_pools"]
    )
    write(
        f"machine: {info['cpu']}, {info['cores']} cores, "
        f"{info['memory_bytes'] / 2**30:.1f} GiB; Python {info['python']}, numpy {info['numpy']}; "
        f"BLAS: {pools or 'none found'}; load average {info['load_average_1min']:.2f}"
        + (f"; OPENBLAS_CORETYPE={info['openblas_coretype']}" if info["openblas_coretype"] else "")
    )


def _row(label: str, summary: dict[str, Any]) -> str:
    return (
        f"  {label:<40} {summary['median_ms']:>10.3f} {summary['p95_ms']:>10.3f} "
        f"{summary['p99_ms']:>10.3f}"
    )


def _verdict(target: dict[str, Any]) -> str:
    met = target["met"]
    mark = "[met]    " if met else "[NOT MET]" if met is False else "[no limit]"
    return f"  {mark} {target['target']}: {target['figure']}  (stated for {target['stated_for']})"


def print_size(figures: dict[str, Any], write: Write) -> None:
    size = figures["chunks"]
    write("")
    write(
        f"== {size:,} chunks, {figures['dimensions']} dimensions, {figures['queries']} queries, "
        f"top k {figures['top_k']}, depth {figures['depth']} "
        f"(generated in {figures['generate_seconds']:.1f} s, "
        f"index built in {figures['build_seconds']:.1f} s; load average "
        f"{figures['load_average_1min']:.2f} before, "
        f"{figures['load_average_1min_after']:.2f} after) =="
    )
    header = f"  {'stage':<40} {'median ms':>10} {'p95 ms':>10} {'p99 ms':>10}"
    write(header)
    for name, summary in figures["stages"].items():
        write(_row(_STAGE_LABELS.get(name, f"{name}, top k"), summary))
    write(f"  {'reference':<40}")
    for name, summary in figures["references"].items():
        write(_row(name, summary))
    write("  filter mask by attribute type:")
    for type_name, entry in figures["notes"]["filter_mask_by_type"].items():
        write(_row(f"  {type_name} ({entry['selectivity']})", entry) + f"  {entry['filter']}")
    write(
        f"  three-clause filter: {figures['notes']['filter']['text']} "
        f"({figures['notes']['filter']['selected']:,} rows)"
    )
    for name, note in figures["notes"].items():
        if name.startswith("packing "):
            write(
                f"  {name} tokens: median {note['median_candidates']:g} candidates, "
                f"{note['median_passages']:g} passages, {note['median_tokens_used']:g} tokens "
                f"used, {note['median_merged']:g} chunks merged ({note['token_counter']}; "
                f"BLAS threads {note['blas_threads'] or 'the library default'})"
            )
    write("  ratios (our median / reference median):")
    for entry in figures["ratios"]:
        write(
            f"    {entry['name']:<44} {entry['value']:>8.3f}  "
            f"({entry['numerator_ms']:.3f} ms / {entry['denominator_ms']:.3f} ms)"
        )
    write("  rankings (top k on the same tokens and vectors):")
    for name, result in figures["rankings"].items():
        write(
            f"    {name:<44} {result['equal_up_to_ties']}/{result['queries']} equal up to ties, "
            f"{result['identical']} in identical order"
        )
    memory = figures["memory"]
    write(
        "  memory: index resident growth while building "
        f"{memory['rss_delta_bytes'] / 2**20:.1f} MiB; raw float32 vectors "
        f"{memory['raw_vector_bytes'] / 2**20:.1f} MiB; postings arrays "
        f"{memory['postings_bytes'] / 2**20:.1f} MiB; vector matrix held "
        f"{memory['vector_matrix_bytes'] / 2**20:.1f} MiB"
    )
    write("  targets:")
    for target in figures["targets"]:
        write(_verdict(target))


def print_model(model: dict[str, Any], write: Write) -> None:
    write("")
    write(f"== with the real model ({model['embedder']}) ==")
    write(f"  {'stage':<40} {'median ms':>10} {'p95 ms':>10} {'p99 ms':>10}")
    write(_row("query embedding", model["query_embedding"]))
    ingest = model["ingest"]
    write(
        f"  ingestion: {ingest['documents']} documents, {ingest['chunks']} chunks in "
        f"{ingest['seconds']:.2f} s = {ingest['chunks_per_second']:.1f} chunks/s; raw encode of "
        f"the same texts {ingest['raw_seconds']:.2f} s = {ingest['raw_chunks_per_second']:.1f} "
        f"chunks/s; pipeline overhead {ingest['pipeline_overhead'] * 100:.1f}%"
    )
    for target in model["targets"]:
        write(_verdict(target))


def print_answering(answering: dict[str, Any], write: Write) -> None:
    write("")
    write(
        f"== answering: {answering['questions']} questions over {answering['chunks']} chunks"
        f" of {answering['corpus']}, {answering['rounds']} rounds, generator"
        f" {answering['generator']}, token budget {answering['token_budget']} =="
    )
    write(f"  {'stage':<40} {'median ms':>10} {'p95 ms':>10} {'p99 ms':>10}")
    write(_row("context", answering["context"]))
    write(_row("answer", answering["answer"]))
    write(
        f"  answer minus context, same question and round: median"
        f" {answering['added_median_ms']:.2f} ms, p95 {answering['added_p95_ms']:.2f} ms"
    )
    for target in answering["targets"]:
        write(_verdict(target))


def print_http(http: dict[str, Any], write: Write) -> None:
    write("")
    write(
        f"== over HTTP: {http['chunks']:,} chunks, hybrid search with query_vector, "
        f"{http['seconds_per_level']:g} s per level =="
    )
    write(
        f"  {'clients':>7} {'requests':>9} {'req/s':>9} {'p50 ms':>9} {'p95 ms':>9} "
        f"{'p99 ms':>9} {'errors':>7}"
    )
    for level in http["levels"]:
        write(
            f"  {level['clients']:>7} {level['requests']:>9} {level['requests_per_second']:>9.1f} "
            f"{level['p50_ms']:>9.2f} {level['p95_ms']:>9.2f} {level['p99_ms']:>9.2f} "
            f"{level['errors']:>7}"
        )
    in_process = http["in_process_hybrid"]
    write(f"  in-process hybrid on the same data: median {in_process['median_ms']:.3f} ms")
    for error in http.get("error_samples", []):
        write(f"  error: {error}")
    for target in http["targets"]:
        write(_verdict(target))


def print_http_with_ingest(run: dict[str, Any], write: Write) -> None:
    write("")
    write(
        f"== over HTTP while ingesting: {run['chunks']:,} chunks served, hybrid search with "
        f"query_vector; real text ({run['ingest_documents']} documents a pass, from "
        f"{', '.join(run['ingest_sources'])}) sent as jobs to the server's worker; "
        f"{run['rounds']} rounds of idle then ingest windows, {run['seconds_per_level']:g} s "
        "of each per level =="
    )
    write(
        f"  {'clients':>7} {'window':>7} {'requests':>9} {'req/s':>9} {'p50 ms':>9} "
        f"{'p99 ms':>9} {'errors':>7} {'chunks':>7}"
    )
    for level in run["levels"]:
        for part in ("idle", "ingest"):
            figures = level[part]
            chunks = str(level["chunks_ingested"]) if part == "ingest" else "-"
            write(
                f"  {level['clients']:>7} {part:>7} {figures['requests']:>9} "
                f"{figures['requests_per_second']:>9.1f} {figures['p50_ms']:>9.2f} "
                f"{figures['p99_ms']:>9.2f} {figures['errors']:>7} {chunks:>7}"
            )
        write(
            f"  {'':>7} {'ratio':>7} p50 {level['p50_ratio']:.2f}x, p99 {level['p99_ratio']:.2f}x"
        )
    write(
        f"  ingested during the ingest windows: {run['chunks_ingested']} chunks in "
        f"{run['ingest_seconds']:.1f} s, {run['chunks_per_second']:.1f} chunks/s "
        f"({run['jobs_done']} of {run['jobs_sent']} jobs done, the rest cancelled before "
        f"each idle window; {run['ingest_errors']} ingest errors)"
    )
    for error in run.get("error_samples", []):
        write(f"  error: {error}")
    for target in run["targets"]:
        write(_verdict(target))


def print_ingest_throughput(run: dict[str, Any], write: Write) -> None:
    write("")
    write(
        f"== ingestion through jobs: {run['documents']} documents from "
        f"{', '.join(run['sources'])}, {run['torch_threads_per_worker']} torch thread(s) "
        "per worker =="
    )
    write(
        f"  {'workers':>7} {'jobs':>5} {'chunks':>7} {'embedded':>9} {'seconds':>8} "
        f"{'chunks/s':>9} {'ran jobs':>9}"
    )
    for item in run["runs"]:
        write(
            f"  {item['workers']:>7} {item['jobs']:>5} {item['chunks']:>7} {item['embedded']:>9} "
            f"{item['seconds']:>8.1f} {item['chunks_per_second']:>9.1f} "
            f"{item['workers_that_ran_jobs']:>9}"
        )
    per_core = run["chunks_per_second_per_core"]
    if per_core:
        write(
            f"  one worker: {per_core:.1f} chunks/s per core; a million chunks in an hour "
            f"(278 chunks/s) needs about {run['cores_for_a_million_chunks_an_hour']} "
            "worker cores at that rate"
        )


def print_graph_hybrid(figures: dict[str, Any], write: Write) -> None:
    memory = figures["memory"]
    write("")
    graph_rows = figures["graph_rows"]
    graph = (
        f"graph over {graph_rows:,} rows built in "
        f"{figures['graph_build_seconds']:.1f} s on {figures['graph_build_threads']} threads"
        if figures["graph_build_seconds"] is not None
        else "no graph"
    )
    write(
        f"== hybrid and semantic over the vector index: {figures['chunks']:,} chunks, "
        f"{figures['queries']} queries, top k {figures['top_k']}, depth {figures['depth']}; "
        f"vectors {figures['settings']}: {graph}; index built in "
        f"{figures['build_seconds']:.1f} s; load average {figures['load_average_1min']:.2f} "
        f"before, {figures['load_average_1min_after']:.2f} after =="
    )
    steps = figures["ranking_steps"]
    write(
        "  retrieve() with the default ranking steps: "
        f"lexical feedback {steps['lexical_feedback']}, semantic feedback "
        f"{steps['semantic_feedback']}, fusion {steps['fusion']}; the reference is the same "
        "query on the snapshot without its graph (exact gather or scan)"
    )
    write(
        f"  memory: vector matrix {_mebibytes(memory['vector_matrix_bytes'])}, graph "
        f"{_mebibytes(memory['graph_bytes'])} (reads the vectors in place: "
        f"{memory['graph_views_vectors']}), postings {_mebibytes(memory['postings_bytes'])}; "
        f"(vectors + graph + postings) / (raw vectors + postings) = "
        f"{memory['arrays_ratio']:.2f}; resident growth over indexing and the graph "
        f"{_mebibytes(memory['rss_growth_bytes'])} = {memory['ratio']:.2f}x"
    )
    phases = (
        ("fresh", "fresh"),
        (
            "replaced",
            f"replaced ({figures['replaced_rows']:,} rows written again, no rebuild"
            + (f"; {figures['tail_rows']:,} rows in the graph's tail)" if graph_rows else ")"),
        ),
    )
    for phase, title in phases:
        write(f"  {title}:")
        write(
            f"    {'filter':<20} {'share':>6} {'candidates':>10}  {'mode':<8}  {'plans':<22} "
            f"{'fallbacks':>9}  {'median ms':>9}  {'p99 ms':>7}  {'plain fusion ms':>15}  "
            f"{'exact median ms':>15}  {'recall@10 (worst)':>17}  {'recall@100':>10}  "
            f"{'outside':>7}"
        )
        for row in figures[phase]:
            for mode in ("hybrid", "semantic"):
                entry = row[mode]
                plans = ", ".join(f"{name} {count}" for name, count in entry["plans"].items())
                plain = entry.get("plain_fusion")
                write(
                    f"    {row['filter']:<20} {row['selectivity']:>6} {row['candidates']:>10,}  "
                    f"{mode:<8}  {plans:<22} {entry['fallbacks']:>9}  "
                    f"{entry['planned']['median_ms']:>9.3f}  {entry['planned']['p99_ms']:>7.2f}  "
                    f"{'-' if plain is None else format(plain['median_ms'], '.3f'):>15}  "
                    f"{entry['exact']['median_ms']:>15.3f}  {entry['recall_at_10']:>10.3f} "
                    f"({entry['worst_recall_at_10']:.2f})  {entry['recall_at_100']:>10.3f}  "
                    f"{entry['outside_mask']:>7}"
                )
        write("    hybrid trace stages, median ms (the semantic ones overlap the lexical ones):")
        for row in figures[phase]:
            stages = ", ".join(
                f"{name} {ms:.2f}" for name, ms in row["hybrid"]["stage_medians_ms"].items()
            )
            write(f"      {row['filter']:<20} {stages}")
    write("  targets:")
    for target in figures["targets"]:
        write(_verdict(target))


def _mebibytes(value: float) -> str:
    return f"{value / 2**20:.1f} MiB"
