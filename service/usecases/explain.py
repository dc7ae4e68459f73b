"""Why a document's chunks did or did not reach a response.

Explain runs the request it is given as search, context or answer run it: the same check and
retrieval (``answering.run_query``), the same packer (``answering.pack_hits``), and the same
generator with the same support (``answering.support_for``). It then follows each chunk of the
named document through those stages and reports the first one that left it out, and why: the key
may not see it, a filter clause (the request's own, the time window's, or the inferred one
applied) was false or unknown for it, a ranking placed it beyond depth, its fused rank was
beyond the cut, the packer turned it away, or the answer did not cite it. Ranks beyond depth
come from a second run of ``retrieve`` whose rankings are cut at the number of candidates, that
is, not at all.

A document the caller may not see is reported exactly like a missing one. An admin may ask as
another key (``as_key``): that key's groups and collections then decide what is seen, and a
document hidden from it is explained as such.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from functools import cache, partial
from typing import Any, Literal

import numpy as np

from service.attributes import to_json_value
from service.errors import DocumentNotFound, InvalidRequest
from service.filters.explain import FailedClause, failed_clauses
from service.filters.render import to_text
from service.filters.syntax import Node
from service.generation.base import ConsideredSpan, GeneratedAnswer
from service.index.collection_index import IndexSnapshot
from service.packing.packer import PackedContext, PackOutcome, Passage, normalize_for_duplicates
from service.retrieval.query import RetrievalResult, retrieve
from service.retrieval.ranking import Ranking
from service.usecases.answering import check_budget, pack_hits, run_query, support_for
from service.usecases.callers import Caller, Role
from service.usecases.inference import InferredFilter
from service.usecases.keys import caller_named
from service.usecases.runtime import Runtime
from service.usecases.search import FilterParts, SearchOptions

ExplainRoute = Literal["search", "context", "answer"]
ClauseSource = Literal["filter", "time_window", "inferred_filter"]
Stage = Literal[
    "access",
    "filter",
    "time_window",
    "inferred_filter",
    "lexical",
    "semantic",
    "fusion",
    "top_k",
    "packing",
    "generation",
]


@dataclass(frozen=True, kw_only=True)
class ExplainRequest:
    """A search, context or answer request (``route``) and the document or chunk to follow."""

    options: SearchOptions
    route: ExplainRoute = "search"
    token_budget: int = 1000
    generator: str | None = None
    document_id: str | None = None
    chunk_id: str | None = None
    as_key: str | None = None


@dataclass(frozen=True)
class Standing:
    """A chunk's place in one ranking of the candidates, not cut at depth; ``rank`` is None
    where the ranking cannot place it (the lexical ranking, for a chunk with no query term)."""

    rank: int | None
    score: float | None


@dataclass(frozen=True)
class RankingCut:
    """The last chunk a ranking handed on: ``cut_at`` is where the ranking is cut (depth, or
    ``top_k`` for the hits a search returns); ``rank`` below it means every ranked chunk made
    it. ``chunk_id`` is None when the ranking placed no chunk at all."""

    stage: Stage
    cut_at: int
    chunk_id: str | None
    rank: int | None
    score: float | None


@dataclass(frozen=True)
class ClauseFinding:
    """The clause that was not TRUE for the chunk, and the values it read (None: absent)."""

    source: ClauseSource
    clause: str
    result: Literal["false", "unknown"]
    values: Mapping[str, Any]


@dataclass(frozen=True)
class PackingFinding:
    """The packer's outcome for the chunk; ``passage_chunk_ids`` are those of the passage it
    is in (included or merged)."""

    outcome: str
    marker: int | None
    duplicate_of: str | None
    passage_chunk_ids: tuple[str, ...]
    tokens: int


@dataclass(frozen=True)
class AnswerFinding:
    """Whether the answer cited the chunk's passage, and the spans of the chunk the generator
    weighed (None when the generator cannot say which it weighed)."""

    answered: bool
    reason: str | None
    cited: bool
    spans: tuple[ConsideredSpan, ...] | None


@dataclass(frozen=True)
class ChunkExplanation:
    """``stage`` is the first stage that left the chunk out, None when it reached the
    response; ``outcome`` a short code and ``reason`` one sentence saying what happened."""

    chunk_id: str
    ordinal: int
    section: str
    stage: Stage | None
    outcome: str
    reason: str
    clause: ClauseFinding | None = None
    ranks: Mapping[str, Standing] | None = None
    packing: PackingFinding | None = None
    answer: AnswerFinding | None = None


@dataclass(frozen=True)
class Explanation:
    collection: str
    document_id: str
    route: ExplainRoute
    mode: str
    as_key: str | None
    candidates: int
    top_k: int
    depth: int
    token_budget: int | None
    cuts: tuple[RankingCut, ...]
    inferred_filter: InferredFilter | None
    chunks: tuple[ChunkExplanation, ...]


def explain(
    runtime: Runtime, caller: Caller, collection: str, request: ExplainRequest
) -> Explanation:
    options = request.options
    if request.route != "search":
        check_budget(runtime, request.token_budget)
    subject = _subject(runtime, caller, request.as_key)
    generator = runtime.generators.get(request.generator) if request.route == "answer" else None
    run = run_query(
        runtime,
        caller,
        collection,
        options,
        subject.visible_groups,
        whole_ranking=request.route != "search",
    )
    snapshot = run.view.snapshot
    document_id, rows = _target(snapshot, caller, request)
    prepared = run.prepared
    query = prepared.retrieval
    result = run.result
    uncut = retrieve(snapshot, replace(query, depth=max(query.depth, result.candidates), keep=1))
    followed = _Followed(
        snapshot,
        result,
        uncut,
        request=request,
        top_k=query.top_k,
        depth=query.depth,
        mode=query.mode,
    )

    packed = None
    answer: Callable[[], GeneratedAnswer] | None = None
    if request.route != "search" and result.hits:
        margin = 1.0 if generator is None else generator.token_margin
        packed = pack_hits(runtime, snapshot, result.hits, request.token_budget, margin)
        if generator is not None:
            # Generated only once a chunk of the document is found in the context.
            support = support_for(run, options.query, packed.passages)
            answer = cache(partial(generator.generate, options.query, packed.passages, support))

    reads_collection = subject.collections is None or collection in subject.collections
    verdicts = _filter_verdicts(snapshot, rows, prepared.filter_parts)
    chunks = []
    for row, verdict in zip(rows, verdicts, strict=True):
        record = snapshot.record(row)
        base = ChunkExplanation(
            chunk_id=record.chunk_id,
            ordinal=record.ordinal,
            section=record.section,
            stage=None,
            outcome="",
            reason="",
        )
        if not reads_collection:
            chunks.append(
                replace(
                    base,
                    stage="access",
                    outcome="not_visible",
                    reason=f"Key {subject.name!r} may not read collection {collection!r}.",
                )
            )
        elif not subject.may_see(record.access):
            chunks.append(
                replace(
                    base,
                    stage="access",
                    outcome="not_visible",
                    reason=(
                        f"Key {subject.name!r} shares no access group with the document "
                        f"(the document's: {', '.join(record.access)}; the key's: "
                        f"{', '.join(sorted(subject.groups)) or 'none'})."
                    ),
                )
            )
        elif verdict is not None:
            chunks.append(_clause_excluded(base, record.attributes, verdict, prepared.filter_parts))
        else:
            chunks.append(followed.through_ranking(base, row, packed, answer))
    return Explanation(
        collection=collection,
        document_id=document_id,
        route=request.route,
        mode=query.mode,
        as_key=request.as_key,
        candidates=result.candidates,
        top_k=query.top_k,
        depth=query.depth,
        token_budget=None if request.route == "search" else request.token_budget,
        cuts=followed.cuts(),
        inferred_filter=prepared.inferred,
        chunks=tuple(chunks),
    )


def _subject(runtime: Runtime, caller: Caller, as_key: str | None) -> Caller:
    """Whose view of the collection is explained: the caller's, or a named key's (admins)."""
    if as_key is None:
        return caller
    caller.require(Role.ADMIN)
    with runtime.transaction() as session:
        subject = caller_named(session, as_key)
    if subject is None:
        raise InvalidRequest(f"No key is named {as_key!r}.", field="as_key")
    return subject


def _target(
    snapshot: IndexSnapshot, caller: Caller, request: ExplainRequest
) -> tuple[str, list[int]]:
    """The document and the rows to follow; hidden from the caller reads as missing."""
    if (request.document_id is None) == (request.chunk_id is None):
        raise InvalidRequest(
            "Name exactly one of document_id and chunk_id.",
            field="document_id" if request.document_id is None else "chunk_id",
        )
    if request.document_id is not None:
        document_id = request.document_id
        missing = DocumentNotFound(f"Document {document_id!r} does not exist.")
    else:
        assert request.chunk_id is not None
        document_id, mark, _ = request.chunk_id.rpartition("#")
        if not mark or not document_id:
            raise InvalidRequest(
                "chunk_id must be a document id, '#' and an ordinal.", field="chunk_id"
            )
        missing = DocumentNotFound(f"Chunk {request.chunk_id!r} does not exist.")
    rows = snapshot.rows_of(document_id).tolist()
    if request.chunk_id is not None:
        rows = [row for row in rows if snapshot.chunk_ids[row] == request.chunk_id]
    if not rows or not caller.may_see(snapshot.access_lists[rows[0]]):
        raise missing
    return document_id, rows


def _filter_verdicts(
    snapshot: IndexSnapshot, rows: Sequence[int], parts: FilterParts
) -> list[tuple[ClauseSource, FailedClause] | None]:
    """Per row, the first part of the candidate filter that leaves it out, and its clause."""
    verdicts: list[tuple[ClauseSource, FailedClause] | None] = [None] * len(rows)
    sources: tuple[tuple[ClauseSource, Node | None], ...] = (
        ("filter", parts.request),
        ("time_window", parts.window),
        ("inferred_filter", parts.inferred),
    )
    columns = snapshot.columns
    taken = None if columns is None else columns.take(np.asarray(rows, dtype=np.int64))
    for source, node in sources:
        if node is None:
            continue
        if taken is None:
            # A checked filter names declared attributes; with no columns no row has a value.
            found: list[FailedClause | None] = [
                FailedClause(to_text(node), "unknown", ()) for _ in rows
            ]
        else:
            found = failed_clauses(node, taken)
        for index, clause in enumerate(found):
            if verdicts[index] is None and clause is not None:
                verdicts[index] = (source, clause)
    return verdicts


def _clause_excluded(
    base: ChunkExplanation,
    attributes: Mapping[str, Any],
    verdict: tuple[ClauseSource, FailedClause],
    parts: FilterParts,
) -> ChunkExplanation:
    source, failed = verdict
    values = {name: _value(attributes.get(name)) for name in failed.attributes}
    finding = ClauseFinding(source, failed.clause, failed.result, values)
    if source == "time_window" and parts.resolved_window is not None:
        window = parts.resolved_window
        span = f"{window.start.isoformat()} to {window.end.isoformat()}"
        if failed.result == "false":
            outcome = "outside_window"
            reason = (
                f"Its {window.attribute} ({values.get(window.attribute)}) lies outside the "
                f"time window {span}."
            )
        else:
            outcome = "no_value"
            reason = f"It has no {window.attribute}, so the time window {span} leaves it out."
        return replace(base, stage=source, outcome=outcome, reason=reason, clause=finding)
    which = "inferred filter's clause" if source == "inferred_filter" else "filter clause"
    shown = ", ".join(
        f"{name} is {'absent' if value is None else _quoted(value)}"
        for name, value in values.items()
    )
    reason = f"The {which} {failed.clause} is {failed.result} for it" + (
        f" ({shown})." if shown else "."
    )
    return replace(
        base, stage=source, outcome=f"clause_{failed.result}", reason=reason, clause=finding
    )


def _value(value: Any) -> Any:
    if value is None:
        return None
    if isinstance(value, list | tuple):
        return [to_json_value(item) for item in value]
    return to_json_value(value)


def _quoted(value: Any) -> str:
    return repr(value) if isinstance(value, str) else str(value)


class _Followed:
    """One chunk followed from the candidates through the rankings, the packer and the answer."""

    def __init__(
        self,
        snapshot: IndexSnapshot,
        result: RetrievalResult,
        uncut: RetrievalResult,
        *,
        request: ExplainRequest,
        top_k: int,
        depth: int,
        mode: str,
    ) -> None:
        self.snapshot = snapshot
        self.result = result
        self.route = request.route
        self.token_budget = request.token_budget
        self.top_k = top_k
        self.depth = depth
        self.mode = mode
        rankings: tuple[Literal["lexical", "semantic"], ...] = ("lexical", "semantic")
        self.names = [name for name in rankings if name in result.rankings]
        self.uncut: dict[str, Ranking] = {name: uncut.rankings[name] for name in self.names}
        self.uncut_ranks = {name: ranking.rank_of() for name, ranking in self.uncut.items()}
        self.final: Ranking = result.rankings["fused" if mode == "hybrid" else mode]
        self.final_ranks = self.final.rank_of()
        self.kept = len(result.hits)

    def standing(self, name: str, row: int) -> Standing:
        if name == "fused":
            ranking, rank = self.final, self.final_ranks.get(row)
        else:
            ranking, rank = self.uncut[name], self.uncut_ranks[name].get(row)
        return Standing(rank, None if rank is None else float(ranking.scores[rank - 1]))

    def cuts(self) -> tuple[RankingCut, ...]:
        cuts = [
            self._cut(name, self.depth, self.result.rankings[name], len(self.result.rankings[name]))
            for name in self.names
        ]
        if self.route == "search":
            cuts.append(self._cut("top_k", self.top_k, self.final, self.kept))
        elif self.mode == "hybrid":
            cuts.append(self._cut("fusion", self.depth, self.final, self.kept))
        return tuple(cuts)

    def _cut(self, stage: Stage, cut_at: int, ranking: Ranking, handed_on: int) -> RankingCut:
        if handed_on == 0:
            return RankingCut(stage, cut_at, None, None, None)
        row = int(ranking.rows[handed_on - 1])
        score = float(ranking.scores[handed_on - 1])
        return RankingCut(stage, cut_at, self.snapshot.chunk_ids[row], handed_on, score)

    def through_ranking(
        self,
        base: ChunkExplanation,
        row: int,
        packed: PackedContext | None,
        answer: Callable[[], GeneratedAnswer] | None,
    ) -> ChunkExplanation:
        ranks: dict[str, Standing] = {name: self.standing(name, row) for name in self.names}
        if self.mode == "hybrid":
            ranks["fused"] = self.standing("fused", row)
        base = replace(base, ranks=ranks)
        position = self.final_ranks.get(row)
        if self.mode != "hybrid":
            own = ranks[self.mode]
            if own.rank is None:
                return replace(
                    base,
                    stage="lexical",
                    outcome="no_query_term",
                    reason="It holds none of the query's terms, so the lexical ranking cannot "
                    "place it.",
                )
            if position is None:
                return replace(
                    base,
                    stage="semantic" if self.mode == "semantic" else "lexical",
                    outcome="below_depth",
                    reason=f"Its {self.mode} rank {own.rank} is beyond depth {self.depth}"
                    f"{self._last_within(self.mode)}.",
                )
        elif position is None:
            placed = ", ".join(f"{name} rank {ranks[name].rank or 'none'}" for name in self.names)
            return replace(
                base,
                stage="fusion",
                outcome="below_depth",
                reason=f"No ranking placed it within depth {self.depth} ({placed}), so fusion "
                "left it out.",
            )
        if position > self.kept:
            if self.route == "search":
                last = self.final.scores[self.kept - 1] if self.kept else None
                return replace(
                    base,
                    stage="top_k",
                    outcome="below_top_k",
                    reason=f"Its {self._final_name()} rank {position} is beyond top_k "
                    f"{self.top_k}"
                    + ("" if last is None else f"; the last hit returned scored {last:.6g}")
                    + ".",
                )
            return replace(
                base,
                stage="fusion",
                outcome="below_depth",
                reason=f"Its fused rank {position} is beyond depth {self.depth}, where the "
                "chunks handed to the packer end.",
            )
        if self.route == "search":
            return replace(
                base,
                outcome="returned",
                reason=f"Returned as hit {position} of {self.kept}.",
            )
        assert packed is not None
        return self._through_packing(base, row, position, packed, answer)

    def _final_name(self) -> str:
        return "fused" if self.mode == "hybrid" else self.mode

    def _last_within(self, name: str) -> str:
        ranking = self.result.rankings[name]
        if not len(ranking):
            return ""
        return f"; the last within depth scored {float(ranking.scores[-1]):.6g}"

    def _through_packing(
        self,
        base: ChunkExplanation,
        row: int,
        position: int,
        packed: PackedContext,
        answer: Callable[[], GeneratedAnswer] | None,
    ) -> ChunkExplanation:
        outcome = _outcome_of(packed.considered, base.chunk_id)
        passage = _passage_of(packed.passages, outcome.marker)
        finding = PackingFinding(
            outcome=outcome.outcome,
            marker=outcome.marker,
            duplicate_of=outcome.duplicate_of,
            passage_chunk_ids=() if passage is None else passage.chunk_ids,
            tokens=int(self.snapshot.token_counts[row]),
        )
        base = replace(base, packing=finding)
        if outcome.outcome == "budget":
            return replace(
                base,
                stage="packing",
                outcome="budget",
                reason=f"Its {finding.tokens} tokens did not fit in the token budget of "
                f"{self.token_budget} when its turn came (fused rank {position}).",
            )
        if outcome.outcome == "duplicate":
            return replace(
                base,
                stage="packing",
                outcome="duplicate",
                reason=f"It repeats chunk {outcome.duplicate_of}, already in the context.",
            )
        if outcome.outcome == "merged":
            packed_as = f"It was merged into passage [{outcome.marker}]"
        else:
            packed_as = f"It begins passage [{outcome.marker}]"
        if answer is None:
            return replace(base, outcome=outcome.outcome, reason=f"{packed_as}.")
        return self._through_answer(base, row, packed_as, outcome.marker, answer())

    def _through_answer(
        self,
        base: ChunkExplanation,
        row: int,
        packed_as: str,
        marker: int | None,
        generated: GeneratedAnswer,
    ) -> ChunkExplanation:
        text = normalize_for_duplicates(self.snapshot.texts[row])
        spans = None
        # A generator that weighs no spans (a chat model is handed whole passages) lists none.
        if generated.considered:
            quoted = {(span.marker, span.start) for span in generated.quoted}
            spans = tuple(
                ConsideredSpan(
                    span.marker, span.text, span.total, (span.marker, span.start) in quoted
                )
                for span in generated.considered
                if span.marker == marker and normalize_for_duplicates(span.text) in text
            )
        cited = generated.answer is not None and marker in generated.markers_used
        finding = AnswerFinding(
            answered=generated.answer is not None,
            reason=generated.reason,
            cited=cited,
            spans=spans,
        )
        base = replace(base, answer=finding)
        weighed = _weighed(spans)
        if generated.answer is None:
            return replace(
                base,
                stage="generation",
                outcome="declined",
                reason=f"{packed_as}, but the answer was declined ({generated.reason}){weighed}.",
            )
        if not cited:
            return replace(
                base,
                stage="generation",
                outcome="not_cited",
                reason=f"{packed_as}, which the answer does not cite{weighed}.",
            )
        return replace(
            base, outcome="cited", reason=f"{packed_as}, which the answer cites{weighed}."
        )


def _weighed(spans: tuple[ConsideredSpan, ...] | None) -> str:
    if spans is None:
        return "; the generator does not say which of its spans it weighed"
    if not spans:
        return "; none of its sentences was weighed"
    chosen = sum(1 for span in spans if span.chosen)
    best = max(span.score for span in spans)
    weighed = "1 of its sentences was" if len(spans) == 1 else f"{len(spans)} of its sentences were"
    return f"; {weighed} weighed (best score {best:.3f}), {chosen} chosen"


def _outcome_of(considered: Sequence[PackOutcome], chunk_id: str) -> PackOutcome:
    for outcome in considered:
        if outcome.chunk_id == chunk_id:
            return outcome
    raise ValueError(f"the packer did not consider {chunk_id}")


def _passage_of(passages: Sequence[Passage], marker: int | None) -> Passage | None:
    return next((p for p in passages if p.marker == marker), None)
