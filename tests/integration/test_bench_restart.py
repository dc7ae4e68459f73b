"""``excerpta bench --restart`` on a small collection: each start is the one it claims to be
(built, read back, caught up), or the run fails, and the report prints every figure."""

from __future__ import annotations

from service.bench.restart import print_restart, run_restart
from service.index.graph import GraphSettings, VectorIndexSettings


def test_the_restart_bench_reads_back_and_catches_up_what_it_saved() -> None:
    settings = VectorIndexSettings(
        index="graph", graph=GraphSettings(links=8, build_breadth=16, search_breadth=16)
    )
    figures = run_restart(600, dimension=384, seed=3, vectors=settings, progress=lambda _line: None)
    assert (figures["chunks"], figures["documents"]) == (600, 60)
    assert figures["saved_graph_rows"] == 600
    assert figures["rewritten_documents"] == 1
    assert figures["saved_bytes"] > 600 * 384 * 4
    lines: list[str] = []
    print_restart(figures, lines.append)
    assert "ready from the saved index" in lines[3]
    assert "1 documents caught up" in lines[4]
