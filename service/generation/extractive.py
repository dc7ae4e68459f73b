"""The offline generator: answer with the passages' own words that best fit the question.

Nothing is paraphrased, so nothing can be invented; the risk is answering with a span that
merely resembles the question, which the answerer guards against three ways: a span must name
what the question names (its model, year, code), must hold what the question asks for (a
number for "how much", a duration for "how long"), and must score above a threshold fitted on
labelled questions, or the answer is declined.
"""

from __future__ import annotations

import re
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.generation.base import (
    INSUFFICIENT_EVIDENCE,
    AnswerSupport,
    ChunkVector,
    GeneratedAnswer,
    SpanScore,
    settle_markers,
    strip_marker_like,
)
from service.generation.reading import (
    CODE_KIND_PREFIX,
    HARD_TYPES,
    YEAR_KIND,
    Entity,
    answer_type,
    conflicting,
    content_words,
    counted_noun,
    given_values,
    holds_type,
    literal_entities,
    proper_words,
)
from service.generation.spans import PassageWindow, Span, passage_spans
from service.ingest.chunking import SECTION_SEPARATOR
from service.packing.packer import Passage

# The weights of a span's score. Similarity of meaning carries most of it; the share of the
# question's idf-weighted terms the span repeats separates near misses that speak of the same
# topic; the answer-type cue prefers the span holding what was asked for; naming a different
# model, year or code than the question costs more than any cue gives.
SEMANTIC_WEIGHT = 0.6
LEXICAL_WEIGHT = 0.3
TYPE_CUE_WEIGHT = 0.1
CONFLICT_PENALTY = 0.3
HEADING_TERM_SHARE = 0.5
"""A question term found only in the span's heading counts this much of its weight."""

# Fitted together on the demo's labelled questions (corpus_example/answer_questions.jsonl): of
# the settings keeping decline precision at 0.9 or more, those with the highest answer accuracy
# plus decline recall form a plateau (threshold 0.38 to 0.40, floors 0.33 to 0.39 and 0.47 to
# 0.53); each value is the middle of its range, the threshold kept where it was. The README
# gives the figures.
DEFAULT_EVIDENCE_THRESHOLD = 0.40
DEFAULT_MIN_LEXICAL = 0.36
DEFAULT_MIN_SEMANTIC = 0.50
"""A best span must repeat this share of the question's weighted terms or lie in a chunk this
similar to the question. Within one chunk every span has the chunk's similarity, so a span
about another part of the same bike scores like the answer; a question worded like the
documents is told apart by its words, one worded otherwise by its chunk's meaning, and a span
weak on both is not evidence."""
DEFAULT_KEEP_RATIO = 0.9
_RULED_OUT = ("does not name", "holds no", "shares no word")
TRACE_SPANS = 8
"""The best spans that could answer, and as many of those that could not, shown in the trace."""

_TERMINAL = re.compile(r"[.!?]+[\"'”’)\]]*$")


def _with_marker(sentence: str, marker: int) -> str:
    """``... five years. [2]``: a line with no closing punctuation (a list item) gets a stop."""
    if _TERMINAL.search(sentence) is None:
        sentence = f"{sentence.rstrip(',;:')}."
    return f"{sentence} [{marker}]"


@dataclass(frozen=True)
class _Candidate:
    span: Span
    text: str
    lexical: float
    type_cue: float
    penalty: float
    eligible: bool
    notes: tuple[str, ...]

    def scored(self, semantic: float) -> SpanScore:
        return SpanScore(
            marker=self.span.marker,
            kind=self.span.kind,
            text=self.text,
            start=self.span.start,
            end=self.span.end,
            semantic=semantic,
            lexical=self.lexical,
            type_cue=self.type_cue,
            penalty=self.penalty,
            total=SEMANTIC_WEIGHT * semantic
            + LEXICAL_WEIGHT * self.lexical
            + TYPE_CUE_WEIGHT * self.type_cue
            - CONFLICT_PENALTY * self.penalty,
            eligible=self.eligible,
            notes=self.notes,
        )


class ExtractiveGenerator:
    """Quotes the passage spans that best answer the question, or declines.

    Each candidate span ``s`` (see ``service.generation.spans``) of the passages scores

        total(s) = 0.6 * cos(q, c(s)) + 0.3 * lexical(s) + 0.1 * cue(s) - 0.3 * conflict(s)

    where ``cos(q, c(s))`` is the similarity of the question's vector to the stored vector of
    the chunk the span lies in (the best of them when it spans two), ``lexical`` the
    idf-weighted share of the question's analysed terms the span holds (a term only in its
    heading counts half), ``cue`` is 1 when the question asks for a type of answer (a number, a
    duration, a price, a date, a name) and the span holds one, and ``conflict`` is 1 when the
    span names another entity of a kind the question or the filter names (another model, year
    or code) and not the one asked about. Nothing is embedded but the question, and only when
    retrieval did not already embed it: embedding spans would cost more than everything else
    the answer route does.

    A span can answer only if its document, heading or text names every kind of entity the
    question names (one of the values the question gives for it) and, for a question asking
    for a number, a duration or a price, if it holds one beyond the values the question gives.
    The answerer declines with ``insufficient_evidence`` when the best span scores below
    ``evidence_threshold``, or when it repeats less than ``min_lexical`` of the question's
    weighted terms and its chunk is less similar than ``min_semantic``; otherwise it quotes the
    spans scoring at least ``max(evidence_threshold, keep_ratio * best)`` that do not overlap a
    better one, at most ``max_sentences``, in passage order and each passage's best first, each
    ending in its marker.
    Passages without stored chunk vectors in the support (a caller outside the answer route)
    are embedded whole, once each.
    """

    name = "extractive"
    token_margin = 1.0

    def __init__(
        self,
        embed_query: Callable[[str], npt.NDArray[np.float32]],
        embed_texts: Callable[[Sequence[str]], npt.NDArray[np.float32]],
        analyzer_tokens: Callable[[str], list[str]],
        *,
        max_sentences: int = 4,
        evidence_threshold: float = DEFAULT_EVIDENCE_THRESHOLD,
        min_lexical: float = DEFAULT_MIN_LEXICAL,
        min_semantic: float = DEFAULT_MIN_SEMANTIC,
        keep_ratio: float = DEFAULT_KEEP_RATIO,
    ) -> None:
        if max_sentences < 1:
            raise ValueError("max_sentences must be at least 1")
        self._embed_query = embed_query
        self._embed_texts = embed_texts
        self._analyzer_tokens = analyzer_tokens
        self.max_sentences = max_sentences
        self.evidence_threshold = evidence_threshold
        self.min_lexical = min_lexical
        self.min_semantic = min_semantic
        self.keep_ratio = keep_ratio

    def candidates(
        self, question: str, passages: Sequence[Passage], support: AnswerSupport
    ) -> tuple[list[_Candidate], bool]:
        """Every distinct span of the passages with the parts of its score that need no
        embedding, and whether it may answer at all; and whether the question has terms of its
        own to weigh (beside the names the rules check)."""
        tokens = support.analyzer_tokens or self._analyzer_tokens
        weight = support.term_weight or _unit_weight
        find = _entity_reader(support)
        kind = answer_type(question)
        given = given_values(question)
        counted = counted_noun(question) if kind == "count" else None
        counted_terms = set(tokens(counted)) if counted else set()
        asked = find(question)
        wanted = asked | support.filter_entities
        # A span's entities matter only for the kinds asked about or pinned by the filter (the
        # rules and the penalty read no others); the collection's names are looked for in each
        # span only when one of those kinds is a name, which is most of the reading's time.
        if not wanted:
            read_span: Callable[[str], frozenset[Entity]] = _no_entities
        elif all(e.kind == YEAR_KIND or e.kind.startswith(CODE_KIND_PREFIX) for e in wanted):
            read_span = literal_entities
        else:
            read_span = find
        asked_kinds = sorted({entity.kind for entity in asked})
        # The words naming the asked model, year or region are checked by the rules below; the
        # lexical part measures whether a span speaks of what is asked about them. A code ("E-21")
        # is itself what is asked about, and stays.
        entity_terms = {
            t
            for entity in asked
            if not entity.kind.startswith(CODE_KIND_PREFIX)
            for t in tokens(entity.value)
        }
        question_weights = {
            term: weight(term)
            for term in set(tokens(content_words(question)))
            if term not in entity_terms
        }
        total_weight = sum(question_weights.values())
        found: list[_Candidate] = []
        seen: set[str] = set()
        heading_cache: dict[str, tuple[set[str], frozenset[Entity]]] = {}
        for passage in passages:
            window = support.windows.get(passage.marker) or PassageWindow(passage)
            headings = passage.section.split(SECTION_SEPARATOR) if passage.section else []
            document = support.document_entities.get(passage.marker, frozenset()) | find(
                passage.title
            )
            in_force = headings[-1] if headings else ""
            for span in passage_spans(window, [*headings, passage.title], heading=in_force):
                text = strip_marker_like(span.text)
                key = " ".join(text.casefold().split())
                if not text or key in seen:
                    continue
                seen.add(key)
                if span.heading not in heading_cache:
                    heading_cache[span.heading] = (set(tokens(span.heading)), find(span.heading))
                heading_terms, heading_entities = heading_cache[span.heading]
                terms = set(tokens(text))
                lexical = 0.0
                if total_weight > 0:
                    held = sum(w for t, w in question_weights.items() if t in terms)
                    headed = sum(
                        w
                        for t, w in question_weights.items()
                        if t in heading_terms and t not in terms
                    )
                    lexical = (held + HEADING_TERM_SHARE * headed) / total_weight
                if total_weight > 0 and lexical == 0:
                    # Ruled out already; naming its entities would only cost time.
                    found.append(
                        _Candidate(
                            span, text, 0.0, 0.0, 0.0, False, ("shares no word with the question",)
                        )
                    )
                    continue
                named = read_span(text)
                context = named | heading_entities | document
                notes: list[str] = []
                for missing in asked_kinds:
                    values = [e for e in asked if e.kind == missing]
                    if not any(e in context for e in values):
                        notes.append("does not name " + " or ".join(sorted(map(str, values))))
                holds = holds_type(kind, text, given) and counted_terms <= terms
                if kind in HARD_TYPES and not holds:
                    notes.append(f"holds no {kind}")
                conflicts = conflicting(named, wanted)
                if conflicts:
                    notes.append("names " + ", ".join(sorted(map(str, conflicts))))
                found.append(
                    _Candidate(
                        span=span,
                        text=text,
                        lexical=lexical,
                        type_cue=1.0 if kind != "any" and holds else 0.0,
                        penalty=1.0 if conflicts else 0.0,
                        eligible=not any(n.startswith(_RULED_OUT) for n in notes),
                        notes=tuple(notes),
                    )
                )
        return found, total_weight > 0

    def generate(
        self,
        question: str,
        passages: Sequence[Passage],
        support: AnswerSupport | None = None,
    ) -> GeneratedAnswer:
        started = time.perf_counter()
        support = support or AnswerSupport()
        unknown = _unknown_names(question, support)
        if unknown:
            return self._declined(
                started,
                [f"answer type: {answer_type(question)}"],
                (),
                f"declined: the collection never mentions {', '.join(unknown)}",
                0.0,
            )
        candidates, weighed = self.candidates(question, passages, support)
        notes = [f"{len(candidates)} spans considered", f"answer type: {answer_type(question)}"]
        if not candidates:
            return self._declined(started, notes, (), "declined: the passages hold no text", 0.0)
        similarity = self._chunk_similarity(question, passages, support)
        scored = sorted(
            (c.scored(similarity(c.span)) for c in candidates),
            key=lambda span: (not span.eligible, -span.total),
        )
        eligible = [span for span in scored if span.eligible]
        ruled_out = [span for span in scored if not span.eligible]
        considered = tuple(eligible[:TRACE_SPANS]) + tuple(ruled_out[:TRACE_SPANS])
        if not eligible:
            reason = ruled_out[0].notes[0] if ruled_out[0].notes else "cannot answer"
            return self._declined(
                started,
                notes,
                considered,
                f"declined: no span can answer (the best one {reason})",
                0.0,
            )
        best = eligible[0]
        if best.total < self.evidence_threshold:
            return self._declined(
                started,
                notes,
                considered,
                f"declined: the best span scored {best.total:.3f}, below the threshold "
                f"{self.evidence_threshold}",
                best.total,
            )
        if weighed and best.lexical < self.min_lexical and best.semantic < self.min_semantic:
            return self._declined(
                started,
                notes,
                considered,
                f"declined: the best span repeats {best.lexical:.3f} of the question's weighted "
                f"terms (below {self.min_lexical}) and its chunk's similarity is "
                f"{best.semantic:.3f} (below {self.min_semantic})",
                best.total,
            )
        floor = max(self.evidence_threshold, self.keep_ratio * best.total)
        chosen: list[SpanScore] = []
        for span in eligible:
            if len(chosen) == self.max_sentences or span.total < floor:
                break
            if not any(_overlap(span, other) for other in chosen):
                chosen.append(span)
        marker_order = {p.marker: rank for rank, p in enumerate(passages)}
        # Passage by passage, each one's best span first: its citation names that span's section.
        chosen.sort(key=lambda span: (marker_order[span.marker], -span.total, span.start))
        text = " ".join(_with_marker(span.text, span.marker) for span in chosen)
        settled = settle_markers(text, [p.marker for p in passages])
        notes.append(f"{len(chosen)} spans quoted")
        return GeneratedAnswer(
            answer=settled.text,
            reason=None,
            markers_used=settled.markers_used,
            evidence_score=best.total,
            notes=tuple(notes),
            milliseconds=_elapsed_ms(started),
            considered=considered,
            threshold=self.evidence_threshold,
            decision=_why_it_won(best, eligible[1:]),
            quoted=tuple(chosen),
        )

    def _chunk_similarity(
        self, question: str, passages: Sequence[Passage], support: AnswerSupport
    ) -> Callable[[Span], float]:
        """The question's similarity to the chunk a span lies in."""
        vector = support.query_vector
        query = _unit(
            np.asarray(self._embed_query(question) if vector is None else vector, np.float64)
        )
        chunks = dict(support.chunk_vectors)
        missing = [p for p in passages if not chunks.get(p.marker)]
        if missing:
            embedded = self._embed_texts([p.text for p in missing])
            for passage, row in zip(missing, embedded, strict=True):
                chunks[passage.marker] = (ChunkVector(passage.char_start, passage.char_end, row),)
        similarities = {
            marker: [
                (c.start, c.end, float(_unit(np.asarray(c.vector, np.float64)) @ query))
                for c in found
            ]
            for marker, found in chunks.items()
        }

        def similarity(span: Span) -> float:
            found = similarities.get(span.marker, [])
            overlapping = [s for start, end, s in found if start < span.end and span.start < end]
            return max(overlapping or [s for _, _, s in found] or [0.0])

        return similarity

    def _declined(
        self,
        started: float,
        notes: list[str],
        considered: tuple[SpanScore, ...],
        decision: str,
        evidence: float,
    ) -> GeneratedAnswer:
        return GeneratedAnswer(
            answer=None,
            reason=INSUFFICIENT_EVIDENCE,
            markers_used=(),
            evidence_score=evidence,
            notes=tuple([*notes, decision]),
            milliseconds=_elapsed_ms(started),
            considered=considered,
            threshold=self.evidence_threshold,
            decision=decision,
        )


def _entity_reader(support: AnswerSupport) -> Callable[[str], frozenset[Entity]]:
    """Years and codes in any text, and the collection's own names when the support has them."""
    finder = support.find_entities
    if finder is None:
        return literal_entities

    def read(text: str) -> frozenset[Entity]:
        return literal_entities(text) | finder(text)

    return read


def _no_entities(_text: str) -> frozenset[Entity]:
    return frozenset()


def _unknown_names(question: str, support: AnswerSupport) -> list[str]:
    """Capitalised words of the question no chunk of the collection holds: a question about
    Canada is not answered from the policies of other countries."""
    known, tokens = support.known_term, support.analyzer_tokens
    if known is None or tokens is None:
        return []
    return [word for word in proper_words(question) if any(not known(t) for t in tokens(word))]


def _why_it_won(best: SpanScore, others: Sequence[SpanScore]) -> str:
    parts = (
        f"semantic {best.semantic:.3f}, lexical {best.lexical:.3f}, "
        f"type cue {best.type_cue:.0f}, penalty {best.penalty:.0f}"
    )
    if not others:
        return f"answered: the only span that could answer ({parts})"
    return (
        f"answered: the best span scored {best.total:.3f} ({parts}); the next {others[0].total:.3f}"
    )


def _overlap(first: SpanScore, second: SpanScore) -> bool:
    return first.marker == second.marker and first.start < second.end and second.start < first.end


def _unit_weight(_term: str) -> float:
    return 1.0


def _unit(vector: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    norm = float(np.linalg.norm(vector))
    return vector / norm if norm > 0 else vector


def _elapsed_ms(started: float) -> float:
    return (time.perf_counter() - started) * 1000.0
