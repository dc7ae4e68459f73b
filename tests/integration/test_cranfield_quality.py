"""Document-level nDCG@10 on Cranfield at default settings, against the data's reference figures.

The reference figures are those of ../shared/data/cranfield/README.md (measured with the bm25s
package, sentence-transformers and pytrec_eval over whole documents, all 225 queries, runs cut at
depth 100): BM25 0.360, dense cosine 0.376, reciprocal rank fusion (k = 60) 0.406. Ours are
measured with the collection's own schema.json chunking (200 tokens, 32 overlap) and every
default (smoothed BM25, k1 1.2, b 0.75, English stop words and stemming, cosine, rrf_k 60, depth
100, and the hybrid's default feedback steps), through ``excerpta eval``'s store backend and
service.evaluation. The plain rankings are held to the references; the default hybrid, which
goes beyond the reference's plain fusion, to at least 0.42.
"""

from __future__ import annotations

import json
import socket
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
import uvicorn

from service.api.app import create_app
from service.evaluation.inputs import read_qrels, read_queries
from service.evaluation.runner import EvaluationResult, evaluate, systems_from_options
from service.usecases.evaluate import StoreBackend
from service.usecases.runtime import Runtime
from tests.api_helpers import make_key
from tests.integration.conftest import CRANFIELD_COLLECTION, CliRun

pytestmark = [pytest.mark.model, pytest.mark.cranfield]

MODES = ["lexical", "semantic", "hybrid"]
REFERENCE = {"lexical": 0.360, "semantic": 0.376, "hybrid": 0.406}
WITHIN = 0.02
HYBRID_AT_LEAST = 0.42
"""The goal for the default hybrid (RM3 and Rocchio feedback, then reciprocal rank fusion)."""
HTTP_SUBSET = 12


@pytest.fixture(scope="module")
def store_result(cranfield_runtime: Runtime, cranfield_dir: Path) -> EvaluationResult:
    return evaluate(
        StoreBackend(cranfield_runtime, CRANFIELD_COLLECTION),
        read_queries(cranfield_dir / "queries.tsv"),
        read_qrels(cranfield_dir / "qrels.txt"),
        systems=systems_from_options(MODES, {}),
        k=10,
        depth=100,
        progress=False,
    )


def ndcg(result: EvaluationResult) -> dict[str, float]:
    return {s.system.mode: s.summary["nDCG@10"].mean for s in result.systems}


def test_cranfield_ndcg_at_10_reaches_the_reference_figures(store_result: EvaluationResult) -> None:
    figures = ndcg(store_result)
    print(
        f"\nCranfield document-level nDCG@10 over {len(store_result.queries)} queries: "
        + ", ".join(
            f"{mode} {figures[mode]:.4f} (reference {REFERENCE[mode]:.3f})" for mode in MODES
        )
    )
    assert len(store_result.queries) == 225
    assert figures["hybrid"] >= HYBRID_AT_LEAST
    assert abs(figures["lexical"] - REFERENCE["lexical"]) <= WITHIN
    assert abs(figures["semantic"] - REFERENCE["semantic"]) <= WITHIN


@pytest.fixture
def server_url(cranfield_runtime: Runtime) -> Iterator[str]:
    """The Cranfield runtime served over real HTTP, as ``excerpta serve`` would."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    # The session owns the runtime, so the server must not close it on shutdown.
    config = uvicorn.Config(
        create_app(cranfield_runtime),
        host="127.0.0.1",
        port=port,
        lifespan="off",
        log_level="warning",
    )
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        assert time.monotonic() < deadline, "the server did not start"
        time.sleep(0.05)
    yield f"http://127.0.0.1:{port}"
    server.should_exit = True
    thread.join(timeout=30)


def test_eval_through_the_http_api_gives_the_store_backends_numbers(
    store_result: EvaluationResult,
    server_url: str,
    cranfield_runtime: Runtime,
    cranfield_dir: Path,
    run_cli: Callable[[list[str]], CliRun],
    tmp_path: Path,
) -> None:
    lines = (cranfield_dir / "queries.tsv").read_text(encoding="utf-8").splitlines()
    subset = tmp_path / "queries.tsv"
    subset.write_text("\n".join(lines[:HTTP_SUBSET]) + "\n", encoding="utf-8")
    out = tmp_path / "report"
    reader = make_key(cranfield_runtime, "reader", name="eval-reader")

    cli = run_cli(
        [
            "eval",
            CRANFIELD_COLLECTION,
            "--queries",
            str(subset),
            "--qrels",
            str(cranfield_dir / "qrels.txt"),
            "--url",
            server_url,
            "--key",
            reader,
            "--out",
            str(out),
            "--no-progress",
        ]
    )

    assert cli.code == 0, cli.stderr
    metrics = json.loads((out / "metrics.json").read_text(encoding="utf-8"))
    by_mode = {s.system.mode: s for s in store_result.systems}
    compared = 0
    for system in metrics["systems"]:
        store_system = by_mode[system["mode"]]
        assert system["per_query"], system["mode"]
        for qid, measures in system["per_query"].items():
            assert measures == pytest.approx(store_system.per_query[qid], rel=1e-12), qid
            compared += 1
        assert system["settings_used"]["embedder"] == "minilm"
    assert compared == len(MODES) * len(metrics["systems"][0]["per_query"]) > 0
