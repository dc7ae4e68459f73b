"""The ``excerpta`` command: serve, worker, ingest, jobs, keys, search, ask, explain, traces,
index-status, eval, tune, bench.

Also migrate, demo, backup and restore.

Commands that need no running server work on the store directly, through the same use cases
the HTTP API calls; a running server picks up their writes from the store's change log.
Exit status: 0 success, 1 a failure the command explains, 2 bad usage.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
from collections.abc import Callable, Sequence
from importlib.metadata import version
from pathlib import Path
from typing import Any, NoReturn, TextIO

from service.config import Settings
from service.errors import ServiceError

DEMO_COLLECTION = "bikes"
DEFAULT_INGEST_BATCH = 4


def _settings(args: argparse.Namespace, **fixed: Any) -> Settings:
    overrides: dict[str, Any] = dict(fixed)
    for name in ("data_dir", "database_url", "index_dir", "host", "port"):
        value = getattr(args, name, None)
        if value is not None:
            overrides[name] = value
    return Settings(**overrides)


def _runtime(args: argparse.Namespace, *, jobs: Any = None, **fixed: Any) -> Any:
    """A runtime on the store directly; the model loads only if something embeds."""
    from service.usecases.runtime import embedder_on_first_use, open_runtime

    return open_runtime(_settings(args, **fixed), embedder_on_first_use, jobs=jobs)


def _print_json(value: Any) -> None:
    print(json.dumps(value, indent=2, ensure_ascii=False, default=str))


# serve / migrate ---------------------------------------------------------------------------------


def cmd_serve(args: argparse.Namespace) -> int:
    """Serve queries; document writes become jobs that a worker process runs (this server's
    own, or ``excerpta worker`` processes behind the broker)."""
    from functools import partial

    from service.api.server import serve
    from service.logging_setup import configure_logging
    from service.usecases.runtime import load_embedder, open_runtime
    from service.usecases.workers import serving_queue

    settings = _settings(args)
    configure_logging(log_format=settings.log_format)
    jobs = serving_queue(settings, partial(load_embedder, settings))
    runtime = open_runtime(settings, load_embedder, jobs=jobs)
    if settings.blas_threads:
        from threadpoolctl import threadpool_limits

        threadpool_limits(limits=settings.blas_threads, user_api="blas")
    if settings.serve_model_threads:
        from service.embedding.minilm import limit_model_threads

        limit_model_threads(settings.serve_model_threads)
    serve(runtime)
    return 0


def cmd_worker(args: argparse.Namespace) -> int:
    """Run jobs: from the broker when ``EXCERPTA_BROKER_URL`` is set, else from the store."""
    from service.embedding.threads import limit_torch_threads, worker_threads
    from service.logging_setup import configure_logging
    from service.usecases.runtime import load_embedder, open_runtime
    from service.usecases.workers import run_worker_process

    settings = _settings(args)
    configure_logging(log_format=settings.log_format)
    runtime = open_runtime(settings, load_embedder)
    limit_torch_threads(worker_threads(settings.worker_torch_threads))
    try:
        run_worker_process(runtime)
    finally:
        runtime.close()
    return 0


def _migrated_engine(args: argparse.Namespace) -> Any:
    """The store's engine with its schema brought up to date; no model is loaded."""
    from service.store.opening import open_store

    settings = _settings(args)
    return open_store(settings.resolved_database_url(), settings.data_dir)


def cmd_migrate(args: argparse.Namespace) -> int:
    _migrated_engine(args).dispose()
    print("migrated to the newest schema")
    return 0


# ingest ------------------------------------------------------------------------------------------


class ProgressBar:
    """An ingest's documents on a bar with its rate and time left, and each line it reports
    printed beside the bar; on stderr, or ``output`` (where every update is drawn, since
    something other than a terminal reads it)."""

    def __init__(self, output: TextIO | None = None) -> None:
        self._output = output or sys.stderr
        self._every_update = output is not None
        self._bar: Any = None

    def begin(self, documents: int) -> None:
        from tqdm import tqdm

        self._bar = tqdm(
            total=documents,
            unit="doc",
            file=self._output,
            mininterval=0 if self._every_update else 0.1,
            miniters=1 if self._every_update else None,
        )

    def advance(self, documents: int) -> None:
        # One step per document, so every count is drawn even when a read finds several.
        for _ in range(documents):
            self._bar.update(1)

    def report(self, line: str) -> None:
        # Through the bar once it is drawn, so a line never lands inside it.
        if self._bar is None:
            print(line, file=self._output)
        else:
            self._bar.write(line, file=self._output)

    def rate(self, chunks: int, per_second: float) -> None:
        self._bar.set_postfix(chunks=chunks, chunks_per_s=f"{per_second:.1f}")

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()


def cmd_ingest(args: argparse.Namespace) -> int:
    if args.url:
        return _ingest_to_server(args)
    from service.usecases.ingest_files import ingest_path
    from service.usecases.job_queues import StoreQueue

    # The job goes to the store; this process runs it (see ``ingest_files.follow_job``).
    runtime = _runtime(args, jobs=StoreQueue())
    bar = ProgressBar()
    try:
        written, failures = ingest_path(
            runtime,
            args.collection,
            Path(args.path),
            schema_file=Path(args.schema) if args.schema else None,
            batch_size=args.batch_size or DEFAULT_INGEST_BATCH,
            view=bar,
        )
    except KeyboardInterrupt:
        return 130
    finally:
        bar.close()
        runtime.close()
    print(f"{written} documents written, {failures} failed")
    return 1 if failures else 0


def _ingest_to_server(args: argparse.Namespace) -> int:
    from service.ingest.remote_jobs import RemoteJobs
    from service.ingest.to_server import ingest_to_server
    from service.server_client import ServerRefused

    if args.batch_size is not None:
        print(
            "error: --batch-size works on the store; a server writes its own batches",
            file=sys.stderr,
        )
        return 2
    remote = RemoteJobs(args.url, args.key or os.environ.get("EXCERPTA_KEY"))
    bar = ProgressBar()
    try:
        written, failures = ingest_to_server(
            remote,
            args.collection,
            Path(args.path),
            schema_file=Path(args.schema) if args.schema else None,
            view=bar,
        )
    except ServerRefused as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130
    finally:
        bar.close()
        remote.close()
    print(f"{written} documents written, {failures} failed")
    return 1 if failures else 0


# jobs --------------------------------------------------------------------------------------------


def _job_line(job: Any) -> str:
    counts = job.counts
    return (
        f"{job.id}  {job.kind:<7} {job.state:<9} {job.collection:<20} {job.key:<16} "
        f"{counts.documents_done}/{counts.documents} documents, {counts.chunks} chunks "
        f"({counts.embedded} embedded, {counts.cached} cached)  {job.created_at:%Y-%m-%d %H:%M:%S}"
    )


def cmd_jobs(args: argparse.Namespace) -> int:
    """List, show and cancel jobs in the store; no model is loaded."""
    from service.api.render import job_json
    from service.usecases import jobs
    from service.usecases.callers import LOCAL_ADMIN

    runtime = _runtime(args)
    try:
        if args.jobs_command == "list":
            found = jobs.list_jobs(
                runtime, LOCAL_ADMIN, collection=args.collection, state=args.state, limit=args.limit
            )
            if args.json:
                _print_json([job_json(job) for job in found])
            for job in [] if args.json else found:
                print(_job_line(job))
            return 0
        if args.jobs_command == "show":
            job = jobs.get_job(runtime, LOCAL_ADMIN, args.job_id)
        else:
            job = jobs.cancel_job(runtime, LOCAL_ADMIN, args.job_id)
    finally:
        runtime.close()
    if args.json:
        _print_json(job_json(job))
        return 0
    print(_job_line(job))
    for problem in job.errors:
        origin = problem.get("origin") or f"#{problem['index']}"
        print(f"  {origin}: {problem.get('id') or '-'}: {problem['message']}")
    if job.failure is not None:
        print(f"  failed: {job.failure['message']}")
    if job.cancel_requested and not job.finished:
        print("  cancel requested: the job stops after its current batch")
    return 0


# keys --------------------------------------------------------------------------------------------


def _split(value: str | None) -> list[str] | None:
    if value is None:
        return None
    return [part.strip() for part in value.split(",") if part.strip()]


def _print_keys(rows: Sequence[Any], *, as_json: bool) -> None:
    if as_json:
        _print_json([vars(r) for r in rows])
        return
    header = ("name", "role", "groups", "collections", "created", "last used", "state")
    table = [header]
    for r in rows:
        table.append(
            (
                r.name,
                r.role,
                ",".join(r.groups) or "-",
                ",".join(r.collections) if r.collections is not None else "all",
                f"{r.created_at:%Y-%m-%d %H:%M:%S}",
                f"{r.last_used_at:%Y-%m-%d %H:%M:%S}" if r.last_used_at else "-",
                "revoked" if r.revoked else "active",
            )
        )
    widths = [max(len(row[i]) for row in table) for i in range(len(header))]
    for row in table:
        print("  ".join(cell.ljust(width) for cell, width in zip(row, widths, strict=True)))


def cmd_keys(args: argparse.Namespace) -> int:
    from service.usecases import keys

    runtime = _runtime(args)
    try:
        if args.keys_command == "create":
            with runtime.write_transaction() as session:
                secret, info = keys.create_key(
                    session,
                    role=args.role,
                    groups=_split(args.groups) or [],
                    collections=_split(args.collections),
                    name=args.name,
                )
            print(secret)
            print(
                f"created key {info.name!r} ({info.role}); it is shown only once", file=sys.stderr
            )
        elif args.keys_command == "revoke":
            with runtime.write_transaction() as session:
                keys.revoke_key(session, args.name)
            print(f"revoked key {args.name!r}")
        else:
            with runtime.transaction() as session:
                found = keys.list_keys(session)
            _print_keys(found, as_json=args.json)
    finally:
        runtime.close()
    return 0


# search / ask ------------------------------------------------------------------------------------


def _filter_arg(value: str | None) -> str | dict[str, Any] | None:
    if value is None:
        return None
    if value.strip().startswith("{"):
        parsed = json.loads(value)
        if isinstance(parsed, dict):
            return parsed
    return value


def _infer_arg(value: str) -> Any:
    """``--infer-filter``: off, suggest, apply, or the request field's object form as JSON;
    anything else is bad usage (exit status 2)."""
    from service.usecases.inference import infer_options

    text = value.strip()
    try:
        return infer_options(json.loads(text) if text.startswith("{") else text)
    except json.JSONDecodeError as exc:
        raise argparse.ArgumentTypeError(f"not JSON ({exc.msg})") from None
    except ServiceError as exc:
        raise argparse.ArgumentTypeError(exc.message) from None


def _print_inferred(inferred: Any) -> None:
    """The inferred filter and each clause's words, before the results it shaped."""
    shown = None if inferred is None else inferred.as_json()
    if shown is None:
        return
    print(f"inferred filter ({shown['using']}): {shown['cql2_text'] or 'none'}")
    for clause in shown["clauses"]:
        print(f"  {clause['cql2_text']}  <- {clause['evidence']!r} ({clause['source']})")
    for dropped in shown["dropped"]:
        print(f"  dropped {dropped['clause']['cql2_text']}: {dropped['reason']}")
    if "fallback" in shown:
        print(f"  {shown['fallback']}")


def cmd_search(args: argparse.Namespace) -> int:
    from service.usecases import answering
    from service.usecases.callers import LOCAL_ADMIN
    from service.usecases.search import SearchOptions

    runtime = _runtime(args)
    try:
        options = SearchOptions(
            query=args.query,
            filter=_filter_arg(args.filter),
            top_k=args.top_k,
            mode=args.mode,
            infer_filter=args.infer_filter,
        )
        result = answering.search(runtime, LOCAL_ADMIN, args.collection, options)
    finally:
        runtime.close()
    if args.json:
        from service.api.render import search_json

        _print_json(search_json(result))
        return 0
    _print_inferred(result.inferred_filter)
    print(f"{result.candidates} candidates; trace {result.trace_id}")
    print(f"{'rank':>4} {'score':>9} {'lex':>4} {'sem':>4}  {'document':<28} {'section':<24} text")
    for rank, hit in enumerate(result.hits, start=1):
        words = " ".join(hit.text.split()[:10])
        print(
            f"{rank:>4} {hit.score:>9.4f} {hit.ranks.lexical or '-':>4} "
            f"{hit.ranks.semantic or '-':>4}  {hit.document_id[:28]:<28} "
            f"{hit.section[:24]:<24} {words}"
        )
    return 0


def cmd_ask(args: argparse.Namespace) -> int:
    from service.usecases import answering
    from service.usecases.callers import LOCAL_ADMIN
    from service.usecases.search import SearchOptions

    runtime = _runtime(args)
    try:
        options = SearchOptions(
            query=args.question,
            filter=_filter_arg(args.filter),
            top_k=10,
            infer_filter=args.infer_filter,
        )
        result = answering.answer(
            runtime, LOCAL_ADMIN, args.collection, options, args.budget, args.generator
        )
    finally:
        runtime.close()
    if args.json:
        from service.api.render import answer_json

        _print_json(answer_json(result))
        return 0
    _print_inferred(result.inferred_filter)
    if result.answer is None:
        print(f"No answer ({result.reason}).")
    else:
        print(result.answer)
    print()
    for citation in result.citations:
        section = f" — {citation.section}" if citation.section else ""
        print(f"[{citation.marker}] {citation.title}{section} ({citation.document_id})")
    if result.caution:
        print(f"\nCaution: {result.caution}")
    return 0


# explain -----------------------------------------------------------------------------------------


def cmd_explain(args: argparse.Namespace) -> int:
    from service.usecases import explain
    from service.usecases.callers import LOCAL_ADMIN
    from service.usecases.search import SearchOptions

    runtime = _runtime(args)
    try:
        request = explain.ExplainRequest(
            options=SearchOptions(
                query=args.query,
                filter=_filter_arg(args.filter),
                top_k=args.top_k,
                mode=args.mode,
                depth=args.depth,
                infer_filter=args.infer_filter,
            ),
            route=args.route,
            token_budget=args.budget,
            generator=args.generator,
            document_id=args.document,
            chunk_id=args.chunk,
            as_key=args.as_key,
        )
        result = explain.explain(runtime, LOCAL_ADMIN, args.collection, request)
    finally:
        runtime.close()
    if args.json:
        from service.api.render import explanation_json

        _print_json(explanation_json(result))
        return 0
    _print_inferred(result.inferred_filter)
    budget = "" if result.token_budget is None else f", token budget {result.token_budget}"
    print(
        f"{result.route} in {result.mode} mode: {result.candidates} candidates, "
        f"top_k {result.top_k}, depth {result.depth}{budget}"
    )
    for cut in result.cuts:
        last = (
            "nothing ranked"
            if cut.chunk_id is None
            else (f"last {cut.chunk_id} at rank {cut.rank}, score {cut.score:.6g}")
        )
        print(f"  {cut.stage} cut at {cut.cut_at}: {last}")
    for chunk in result.chunks:
        ranks = ""
        if chunk.ranks:
            ranks = (
                "  ["
                + ", ".join(
                    f"{name} {standing.rank or '-'}" for name, standing in chunk.ranks.items()
                )
                + "]"
            )
        print(f"{chunk.chunk_id}  {chunk.stage or 'reached'}: {chunk.outcome}{ranks}")
        print(f"    {chunk.reason}")
    return 0


# traces ------------------------------------------------------------------------------------------


def cmd_traces(args: argparse.Namespace) -> int:
    from service.usecases.callers import LOCAL_ADMIN
    from service.usecases.traces import TraceListing, trace_page

    runtime = _runtime(args)
    listing = TraceListing(
        collection=args.collection,
        since=args.since,
        until=args.until,
        route=args.route,
        limit=args.limit,
        cursor=args.cursor,
    )
    try:
        page = trace_page(runtime.transactions, LOCAL_ADMIN, listing)
    finally:
        runtime.close()
    if args.json:
        from service.api.render import trace_page_json

        _print_json(trace_page_json(page))
        return 0
    print(
        f"{'time (UTC)':<19}  {'route':<7} {'collection':<16} {'outcome':<8} "
        f"{'cand':>6} {'hits':>4} {'ms':>8}  {'trace':<36}  query"
    )
    for t in page.traces:
        outcome = t.outcome if t.reason is None else f"{t.outcome}:{t.reason}"
        print(
            f"{t.created_at:%Y-%m-%d %H:%M:%S}  {t.route:<7} {t.collection[:16]:<16} "
            f"{outcome or '-':<8} {_count(t.candidates):>6} {_count(t.hits):>4} "
            f"{_count(t.milliseconds, '.1f'):>8}  {t.trace_id:<36}  {(t.query or '')[:60]}"
        )
    if page.next_cursor is not None:
        print(f"more: --cursor {page.next_cursor}")
    return 0


def _count(value: float | None, spec: str = "") -> str:
    return "-" if value is None else format(value, spec)


# demo --------------------------------------------------------------------------------------------


def cmd_demo(args: argparse.Namespace) -> int:
    """Make the demo collection and key once; later runs re-use the store as it is."""
    from service.usecases.demo import set_up_demo
    from service.usecases.job_queues import StoreQueue

    runtime = _runtime(args, jobs=StoreQueue())
    bar = ProgressBar()
    try:
        made = set_up_demo(runtime, DEMO_COLLECTION, Path(args.corpus), bar)
    finally:
        bar.close()
        runtime.close()
    if made.ingested is None:
        print(f"demo collection {DEMO_COLLECTION!r} already in the store; not re-ingesting")
    else:
        written, failures = made.ingested
        print(f"ingested {written} demo documents ({failures} failed)")
    if made.secret is None:
        print(f"demo admin key in {made.key_file}")
    else:
        print(f"demo admin key written to {made.key_file}: {made.secret}")
    return 0


# eval / bench ------------------------------------------------------------------------------------


def _set_options(values: list[str]) -> dict[str, list[str]]:
    options: dict[str, list[str]] = {}
    for value in values:
        name, sep, raw = value.partition("=")
        if not sep or not raw:
            raise ValueError(f"--set takes NAME=V1,V2, not {value!r}")
        options[name.strip()] = [v.strip() for v in raw.split(",") if v.strip()]
    return options


def cmd_eval(args: argparse.Namespace) -> int:
    from service.evaluation.http_backend import SERVER_ONLY_SETTINGS, HttpBackend
    from service.evaluation.inputs import inline_qrels, read_qrels, read_queries
    from service.evaluation.report import write_report
    from service.evaluation.runner import EvaluationBackend, evaluate, systems_from_options
    from service.server_client import ServerRefused
    from service.usecases.evaluate import MAX_CHUNKS, StoreBackend

    if (args.queries is None) == (args.answers is None):
        print("error: give either --queries (retrieval) or --answers (answers)", file=sys.stderr)
        return 2
    if args.answers is not None:
        return _evaluate_answers(args)
    infer = _infer_request(args.infer_filter)
    try:
        queries = read_queries(args.queries)
        qrels = read_qrels(args.qrels) if args.qrels else inline_qrels(queries)
        if not qrels:
            raise ValueError("give --qrels, or queries that carry their own judgments")
        set_options = _set_options(args.set)
        sources = ("labelled", "inferred", "none") if args.infer_filter.mode == "apply" else ()
        systems = systems_from_options(args.modes.split(","), set_options, sources or ("labelled",))
        if args.url and any(name in set_options for name in SERVER_ONLY_SETTINGS):
            raise ValueError(
                "--set of settings other than rrf_k works only on the store, not with --url"
            )
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    backend: EvaluationBackend
    if args.url:
        http = HttpBackend(args.url, args.key or os.environ.get("EXCERPTA_KEY"), args.collection)
        backend, close = http, http.close
    else:
        runtime = _runtime(args, max_top_k=MAX_CHUNKS, max_depth=MAX_CHUNKS)
        backend, close = StoreBackend(runtime, args.collection), runtime.close
    try:
        result = evaluate(
            backend,
            queries,
            qrels,
            systems=systems,
            k=args.k,
            depth=args.depth,
            global_filter=args.filter,
            progress=not args.no_progress,
            infer_filter=infer,
        )
    except (ServerRefused, ValueError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    finally:
        close()
    files = write_report(result, Path(args.out), title=f"Retrieval evaluation: {args.collection}")
    print(f"report written to {files.report}")
    for system in result.systems:
        cells = ", ".join(f"{name} {system.summary[name].mean:.4f}" for name in result.measures)
        print(f"  {system.system.label}: {cells}")
    agreement = result.filter_agreement
    if agreement is not None:
        print(
            f"  inferred filters: same documents {agreement.exact_share:.3f}, a relevant"
            f" document excluded {agreement.excluding_share:.3f}, mean Jaccard"
            f" {agreement.mean_jaccard:.3f} ({len(agreement.per_query)} questions)"
        )
    return 0


def _evaluate_answers(args: argparse.Namespace) -> int:
    """``excerpta eval --answers FILE``: the answers to labelled questions, scored."""
    from service.evaluation.answers import (
        ANSWER_MEASURES,
        AnswerBackend,
        evaluate_answers,
        read_answer_questions,
        write_answer_report,
    )
    from service.evaluation.http_backend import HttpAnswers, HttpBackend
    from service.evaluation.inputs import LabelFileError
    from service.server_client import ServerRefused
    from service.usecases.evaluate import StoreAnswers

    try:
        questions = read_answer_questions(args.answers)
    except LabelFileError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    backend: AnswerBackend
    if args.url:
        http = HttpBackend(args.url, args.key or os.environ.get("EXCERPTA_KEY"), args.collection)
        backend = HttpAnswers(http, token_budget=args.budget, generator=args.generator)
        close = http.close
    else:
        runtime = _runtime(args)
        backend = StoreAnswers(
            runtime, args.collection, token_budget=args.budget, generator=args.generator
        )
        close = runtime.close
    try:
        result = evaluate_answers(
            backend, questions, global_filter=args.filter, progress=not args.no_progress
        )
    except ServerRefused as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    finally:
        close()
    report, _ = write_answer_report(
        result, Path(args.out), title=f"Answer evaluation: {args.collection}"
    )
    print(f"report written to {report}")
    for name in ANSWER_MEASURES:
        interval = result.summary[name]
        shown = (
            "n/a"
            if interval is None
            else f"{interval.mean:.4f} [{interval.low:.4f}, {interval.high:.4f}]"
        )
        print(f"  {name}: {shown}")
    return 0


DEFAULT_TUNING_GRID = "k1=0.9,1.2,1.5,b=0.5,0.75,semantic_weight=0.4,0.5,0.6"


def _grid_options(values: list[str]) -> dict[str, list[str]]:
    """``--grid k1=0.9,1.2,b=0.5,0.75`` (or one ``--grid`` per setting): a word with ``=``
    names a setting and its first value, a word without one is another value of it."""
    options: dict[str, list[str]] = {}
    for value in values:
        name = None
        for word in (w.strip() for w in value.split(",")):
            if "=" in word:
                name, _, first = word.partition("=")
                name = name.strip()
                if not name or name in options:
                    raise ValueError(f"--grid names {name or 'no setting'!r} twice or not at all")
                options[name] = [first.strip()] if first.strip() else []
            elif name is None:
                raise ValueError(f"--grid takes NAME=V1,V2,NAME=V1,..., not {value!r}")
            elif word:
                options[name].append(word)
    return options


def cmd_tune(args: argparse.Namespace) -> int:
    """Choose ranking settings by cross-validation on labelled queries; apply them only with
    --apply and only when the held-out gain is significant."""
    from service.evaluation.inputs import read_qrels, read_queries
    from service.evaluation.tuning import candidates_from_grid
    from service.evaluation.tuning_report import write_tuning_report
    from service.usecases.evaluate import MAX_CHUNKS
    from service.usecases.tune import tune_collection

    try:
        queries = read_queries(args.queries)
        qrels = read_qrels(args.qrels)
        candidates = candidates_from_grid(_grid_options(args.grid or [DEFAULT_TUNING_GRID]))
        if args.folds < 2:
            raise ValueError("--folds must be at least 2")
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    runtime = _runtime(args, max_top_k=MAX_CHUNKS, max_depth=MAX_CHUNKS)
    try:
        outcome = tune_collection(
            runtime,
            args.collection,
            queries,
            qrels,
            candidates,
            folds=args.folds,
            apply=args.apply,
            progress=not args.no_progress,
        )
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    finally:
        runtime.close()
    result = outcome.result
    files = write_tuning_report(
        result,
        Path(args.out),
        collection=args.collection,
        settings_before=outcome.settings_before,
        applied=outcome.applied,
    )
    gain = result.difference_interval
    print(f"report written to {files.report}")
    print(
        f"  current {result.current_interval.mean:.4f}, tuned (held out)"
        f" {result.tuned_interval.mean:.4f}, difference {gain.mean:+.4f}"
        f" [{gain.low:+.4f}, {gain.high:+.4f}], p = {result.p_value:.4f}"
    )
    print(f"  best over every query: {result.chosen.label}")
    print(f"  {result.verdict()}")
    if outcome.applied:
        print(f"  applied to {args.collection}")
    elif args.apply:
        print("  nothing applied")
    return 0


def _infer_request(options: Any) -> dict[str, object] | None:
    """``--infer-filter`` in the request field's object form, for each query of an evaluation."""
    if not options.active:
        return None
    request = options.as_request()
    return dict(request) if isinstance(request, dict) else {"mode": request}


def cmd_index_status(args: argparse.Namespace) -> int:
    """Each collection's saved index (``EXCERPTA_INDEX_DIR``): its revision against the store's,
    its size, and whether the next start reads it back or rebuilds the index, and why."""
    runtime = _runtime(args)
    try:
        if args.collection:
            states = [runtime.indexes.saved_state(args.collection, verify=args.verify)]
        else:
            states = runtime.indexes.saved_states(verify=args.verify)
        directory = runtime.settings.resolved_index_dir()
    finally:
        runtime.close()
    shown = [
        {
            "collection": state.collection,
            "store_revision": state.store_revision,
            "saved_revision": None if state.info is None else state.info.revision,
            "rows": None if state.info is None else state.info.rows,
            "graph_rows": None if state.info is None else state.info.graph_rows,
            "bytes": None if state.info is None else state.info.bytes,
            "saved_at": None if state.info is None else state.info.saved_at,
            "at_start": "read back" if state.usable else "rebuilt",
            "reason": state.reason,
            "checksums_verified": args.verify,
        }
        for state in states
    ]
    if args.json:
        _print_json({"index_dir": str(directory), "collections": shown})
        return 0
    print(f"saved indexes under {directory}")
    for item in shown:
        if item["saved_revision"] is None:
            print(f"  {item['collection']}: none usable; rebuilt at start because {item['reason']}")
            continue
        behind = item["store_revision"] - item["saved_revision"]
        line = (
            f"  {item['collection']}: revision {item['saved_revision']} of "
            f"{item['store_revision']} ({behind} behind), {item['rows']:,} rows, "
            f"graph {item['graph_rows'] if item['graph_rows'] is not None else 'none'}, "
            f"{item['bytes'] / 2**20:.1f} MiB, saved {item['saved_at']}: "
        )
        if item["at_start"] == "read back":
            line += "read back at start" + (" (checksums hold)" if args.verify else "")
        else:
            line += f"rebuilt at start because {item['reason']}"
        print(line)
    return 0


def cmd_bench(args: argparse.Namespace) -> int:
    from service.bench.command import run_bench_command

    return run_bench_command(args)


# backup / restore --------------------------------------------------------------------------------


def cmd_backup(args: argparse.Namespace) -> int:
    """A consistent copy of the store, taken while a server may be writing to it."""
    from service.store.backup import write_backup

    return _copy_store(args, write_backup, "backed up {copied} to {path}")


def cmd_restore(args: argparse.Namespace) -> int:
    """A backup loaded into the store, which must be empty (just migrated, or new)."""
    from service.store.backup import restore_backup

    return _copy_store(args, restore_backup, "restored {copied} from {path}")


def _copy_store(args: argparse.Namespace, copy: Callable[[Any, Path], Any], done: str) -> int:
    """Run ``copy`` between the store and PATH, then say what it copied, or why it failed."""
    import sqlite3

    from sqlalchemy.exc import SQLAlchemyError

    from service.store.backup import BackupError
    from service.store.opening import cause

    engine = _migrated_engine(args)
    try:
        copied = copy(engine, Path(args.path))
    except BackupError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    except (SQLAlchemyError, OSError, sqlite3.Error) as exc:
        print(
            f"error: The copy between the store and {args.path} failed: {cause(exc)}.",
            file=sys.stderr,
        )
        return 1
    finally:
        engine.dispose()
    tables = ", ".join(f"{count} {name}" for name, count in copied.rows.items())
    print(done.format(copied=f"{copied.total} rows ({tables})", path=args.path))
    return 0


# parser ------------------------------------------------------------------------------------------


def _common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--data-dir", type=Path, help="data directory (EXCERPTA_DATA_DIR)")
    parser.add_argument("--database-url", help="database URL (EXCERPTA_DATABASE_URL)")
    parser.add_argument(
        "--index-dir", type=Path, help="saved indexes (EXCERPTA_INDEX_DIR, <data dir>/indexes)"
    )


def _infer_option(
    parser: argparse.ArgumentParser,
    modes: str = "off, suggest or apply a filter inferred from the question",
) -> None:
    parser.add_argument(
        "--infer-filter",
        type=_infer_arg,
        default="off",
        metavar="MODE",
        help=f'{modes}; or a JSON object {{"mode", "now", "using"}}',
    )


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="excerpta", description=__doc__.splitlines()[0])
    parser.add_argument("--version", action="version", version=f"excerpta {version('excerpta')}")
    commands = parser.add_subparsers(dest="command", required=True)

    serve = commands.add_parser("serve", help="run the HTTP API")
    _common(serve)
    serve.add_argument("--host")
    serve.add_argument("--port", type=int)
    serve.set_defaults(handler=cmd_serve)

    migrate = commands.add_parser("migrate", help="bring the store's schema up to date")
    _common(migrate)
    migrate.set_defaults(handler=cmd_migrate)

    ingest = commands.add_parser("ingest", help="ingest a folder or a .jsonl file")
    _common(ingest)
    ingest.add_argument("collection")
    ingest.add_argument("path")
    ingest.add_argument("--schema", help="collection schema (JSON) to create or update first")
    ingest.add_argument(
        "--batch-size",
        type=int,
        help=f"documents written per transaction (default {DEFAULT_INGEST_BATCH}; not with --url)",
    )
    ingest.add_argument("--url", help="send the documents to this running server as jobs")
    ingest.add_argument("--key", help="API key for --url (or EXCERPTA_KEY)")
    ingest.set_defaults(handler=cmd_ingest)

    worker = commands.add_parser(
        "worker", help="run jobs from the broker (EXCERPTA_BROKER_URL), else from the store"
    )
    _common(worker)
    worker.set_defaults(handler=cmd_worker)

    jobs = commands.add_parser("jobs", help="list, show and cancel document jobs")
    jobs_commands = jobs.add_subparsers(dest="jobs_command", required=True)
    jobs_list = jobs_commands.add_parser("list")
    _common(jobs_list)
    jobs_list.add_argument("--collection")
    jobs_list.add_argument("--state", choices=["queued", "running", "done", "failed", "cancelled"])
    jobs_list.add_argument("--limit", type=int, default=100)
    jobs_list.add_argument("--json", action="store_true")
    for action in ("show", "cancel"):
        one = jobs_commands.add_parser(action)
        _common(one)
        one.add_argument("job_id")
        one.add_argument("--json", action="store_true")
    jobs.set_defaults(handler=cmd_jobs)

    keys = commands.add_parser("keys", help="create, revoke and list API keys")
    keys_commands = keys.add_subparsers(dest="keys_command", required=True)
    create = keys_commands.add_parser("create")
    _common(create)
    create.add_argument("--role", required=True, choices=["reader", "writer", "admin"])
    create.add_argument("--groups")
    create.add_argument("--collections")
    create.add_argument("--name")
    revoke = keys_commands.add_parser("revoke")
    _common(revoke)
    revoke.add_argument("name")
    listing = keys_commands.add_parser("list")
    _common(listing)
    listing.add_argument("--json", action="store_true")
    keys.set_defaults(handler=cmd_keys)

    search = commands.add_parser("search", help="search a collection")
    _common(search)
    search.add_argument("collection")
    search.add_argument("query")
    search.add_argument("--filter")
    _infer_option(search)
    search.add_argument("--mode", default="hybrid", choices=["hybrid", "lexical", "semantic"])
    search.add_argument("--top-k", type=int, default=10)
    search.add_argument("--json", action="store_true")
    search.set_defaults(handler=cmd_search)

    ask = commands.add_parser("ask", help="answer a question with citations")
    _common(ask)
    ask.add_argument("collection")
    ask.add_argument("question")
    ask.add_argument("--filter")
    _infer_option(ask)
    ask.add_argument("--budget", type=int, default=1000)
    ask.add_argument("--generator")
    ask.add_argument("--json", action="store_true")
    ask.set_defaults(handler=cmd_ask)

    explaining = commands.add_parser(
        "explain", help="say why a document's chunks did or did not reach a response"
    )
    _common(explaining)
    explaining.add_argument("collection")
    explaining.add_argument("query")
    target = explaining.add_mutually_exclusive_group(required=True)
    target.add_argument("--document", help="follow every chunk of this document")
    target.add_argument("--chunk", help="follow this one chunk")
    explaining.add_argument("--route", default="search", choices=["search", "context", "answer"])
    explaining.add_argument("--filter")
    _infer_option(explaining)
    explaining.add_argument("--mode", default="hybrid", choices=["hybrid", "lexical", "semantic"])
    explaining.add_argument("--top-k", type=int, default=10)
    explaining.add_argument("--depth", type=int, default=100)
    explaining.add_argument(
        "--budget", type=int, default=1000, help="token budget (context, answer)"
    )
    explaining.add_argument("--generator", help="the answer's generator")
    explaining.add_argument("--as-key", help="explain as the key of this name sees the collection")
    explaining.add_argument("--json", action="store_true")
    explaining.set_defaults(handler=cmd_explain)

    traces = commands.add_parser("traces", help="list recorded traces, newest first")
    _common(traces)
    traces.add_argument("--collection")
    traces.add_argument("--since", help="ISO 8601 with an offset, inclusive")
    traces.add_argument("--until", help="ISO 8601 with an offset, exclusive")
    traces.add_argument("--route", choices=["search", "context", "answer"])
    traces.add_argument("--limit", type=int, default=50)
    traces.add_argument("--cursor", help="the cursor the page before printed")
    traces.add_argument("--json", action="store_true")
    traces.set_defaults(handler=cmd_traces)

    demo = commands.add_parser("demo", help="create the demo collection and key if missing")
    _common(demo)
    demo.add_argument("--corpus", default="corpus_example")
    demo.set_defaults(handler=cmd_demo)

    evaluate = commands.add_parser(
        "eval", help="measure retrieval or answer quality on labeled questions"
    )
    _common(evaluate)
    evaluate.add_argument("collection")
    evaluate.add_argument("--queries", help="TSV (qid<TAB>text) or JSONL: measure retrieval")
    evaluate.add_argument(
        "--answers",
        help="JSONL of questions with the strings and document a right answer holds, or"
        " expect null: measure answers",
    )
    evaluate.add_argument(
        "--budget", type=int, default=1000, help="token budget of each answer (with --answers)"
    )
    evaluate.add_argument("--generator", help="generator of the answers (with --answers)")
    evaluate.add_argument(
        "--qrels",
        help="TREC qrels: qid 0 docid grade (optional when the JSONL queries carry their own)",
    )
    evaluate.add_argument("--modes", default="lexical,semantic,hybrid")
    evaluate.add_argument("--k", type=int, default=10)
    evaluate.add_argument("--depth", type=int, default=100)
    evaluate.add_argument("--filter", help="a CQL2 filter applied to every query")
    _infer_option(
        evaluate,
        "off; suggest compares filters inferred from each question with its labelled one;"
        " apply also ranks with the inferred filters and with none",
    )
    evaluate.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="NAME=V1,V2",
        help="vary rrf_k, k1, b or a hybrid step's setting",
    )
    evaluate.add_argument("--out", default="eval-report", help="directory for the report")
    evaluate.add_argument("--url", help="evaluate through a running server instead of the store")
    evaluate.add_argument("--key", help="API key for --url (or EXCERPTA_KEY)")
    evaluate.add_argument("--no-progress", action="store_true")
    evaluate.set_defaults(handler=cmd_eval)

    tune = commands.add_parser(
        "tune", help="choose ranking settings by cross-validation on labelled queries"
    )
    _common(tune)
    tune.add_argument("collection")
    tune.add_argument("--queries", required=True, help="TSV (qid<TAB>text) or JSONL")
    tune.add_argument("--qrels", required=True, help="TREC qrels: qid 0 docid grade")
    tune.add_argument(
        "--grid",
        action="append",
        metavar="NAME=V1,V2,NAME=V1,...",
        help=f"settings to try (default {DEFAULT_TUNING_GRID})",
    )
    tune.add_argument("--folds", type=int, default=5)
    tune.add_argument(
        "--apply",
        action="store_true",
        help="apply the best settings when the held-out gain is significant at 0.05",
    )
    tune.add_argument("--out", default="tune-report", help="directory for the report")
    tune.add_argument("--no-progress", action="store_true")
    tune.set_defaults(handler=cmd_tune)

    backup = commands.add_parser("backup", help="copy the store to a new file, even while serving")
    _common(backup)
    backup.add_argument("path", help="the new file to write")
    backup.set_defaults(handler=cmd_backup)

    restore = commands.add_parser("restore", help="load a backup into an empty store")
    _common(restore)
    restore.add_argument("path", help="a file written by excerpta backup")
    restore.set_defaults(handler=cmd_restore)

    status = commands.add_parser(
        "index-status", help="show each collection's saved index and whether a start reads it"
    )
    _common(status)
    status.add_argument("collection", nargs="?")
    status.add_argument("--verify", action="store_true", help="also check every file's checksum")
    status.add_argument("--json", action="store_true")
    status.set_defaults(handler=cmd_index_status)

    from service.bench.command import add_bench_arguments

    bench = commands.add_parser("bench", help="benchmark the index against references")
    add_bench_arguments(bench)
    bench.set_defaults(handler=cmd_bench)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        code: int = args.handler(args)
    except ServiceError as exc:
        print(f"error: {exc.message}", file=sys.stderr)
        return 1
    return code


def run() -> None:
    """The ``excerpta`` program. A stop signal ends a command the way an error would, so the
    command's own cleanup runs (a bench's server stopped, a scratch store removed); ``serve``
    and ``worker`` put their own handlers in place while they run."""
    signal.signal(signal.SIGTERM, _stop_as_exit)
    sys.exit(main())


def _stop_as_exit(signum: int, _frame: object) -> NoReturn:
    raise SystemExit(128 + signum)


if __name__ == "__main__":
    run()
