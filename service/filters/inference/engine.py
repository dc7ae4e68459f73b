"""From a question to checked filter clauses, each with the words that produced it.

Three passes over the question's words, each leaving the words it used to the next: phrases
that name a keyword value, an alias or a boolean (longest match first), times, then numbers.
A number or a time is tied to the attribute whose unit, name words and description words
surround it best; where the best reading would select nothing among the rows the other clauses
select, the next one of the same kind that selects some is taken (a number stays a number and a
date a date), unless the question ties the mention to the attribute by name, unit or a value
beside it. A phrase, number or time that fits several attributes equally is dropped, every
reading with the reason.

Settling keeps the caller in charge: a clause on an attribute the request's own filter names
is dropped; clauses are then applied from the most plainly stated (values and aliases, then
numbers and times, then boolean phrases) to the least, and one that would leave no candidate,
alone, with the request's filter or with the clauses before it, is dropped and reported, never
applied. Only rows the caller may see count, so inference never widens access, and a keyword
value found only in rows hidden from the caller is treated as unknown, so it reveals nothing.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.attributes import AttributeType
from service.filters.columns import AttributeColumns
from service.filters.evaluate import evaluate
from service.filters.inference.lexicon import AttributeFacts, Entry, Lexicon
from service.filters.inference.mentions import (
    NumberMention,
    TimeMention,
    find_numbers,
    find_times,
    negated,
)
from service.filters.inference.words import Word, span_text, words_of
from service.filters.render import timestamp_text, to_text
from service.filters.syntax import (
    And,
    ArrayLiteral,
    ArrayOp,
    ArrayPredicate,
    Between,
    BooleanLiteral,
    Comparison,
    ComparisonOp,
    DateLiteral,
    Expression,
    In,
    IntervalEnd,
    IntervalLiteral,
    IsNull,
    Like,
    Node,
    Not,
    NumberLiteral,
    OpenEnd,
    Or,
    Property,
    StringLiteral,
    TemporalOp,
    TemporalPredicate,
    TimestampLiteral,
    conjunction,
    properties_of,
)
from service.filters.time_window import resolve_time_window

CUE_WINDOW = 5
# How plainly a kind of clause is stated; stronger clauses are settled first.
STRENGTH_VALUE = 3
STRENGTH_NUMBER = 2
STRENGTH_TIME = 2
STRENGTH_PHRASE = 1

_SOURCES = {
    "value": "value in the index",
    "alias": "alias in the schema hints",
    "phrase": "phrase in the schema hints",
    "name": "attribute name",
}


@dataclass(frozen=True)
class InferredClause:
    attribute: str
    op: str
    value: Any
    """JSON-ready: a string, number or boolean, or a list of them."""
    evidence: str
    """The words of the question that produced the clause."""
    source: str
    """How it was found."""
    node: Node

    def as_json(self) -> dict[str, Any]:
        return {
            "attribute": self.attribute,
            "op": self.op,
            "value": self.value,
            "evidence": self.evidence,
            "source": self.source,
            "cql2_text": to_text(self.node),
        }


@dataclass(frozen=True)
class DroppedClause:
    clause: InferredClause
    reason: str

    def as_json(self) -> dict[str, Any]:
        return {"clause": self.clause.as_json(), "reason": self.reason}


@dataclass(frozen=True)
class Inference:
    clauses: tuple[InferredClause, ...]
    dropped: tuple[DroppedClause, ...]

    @property
    def node(self) -> Node | None:
        return conjunction([c.node for c in self.clauses]) if self.clauses else None


@dataclass(frozen=True, kw_only=True)
class InferenceScope:
    """The rows inferred clauses must leave candidates in, and what they may not touch."""

    columns: AttributeColumns | None
    visible: np.ndarray
    """Live rows the caller may see."""
    allowed: np.ndarray
    """Visible rows that also pass the request's own filter and time window."""
    explicit: frozenset[str]
    """Attributes the request's own filter or time window names."""
    now: dt.datetime


@dataclass(frozen=True)
class Proposal:
    """A clause before settling, with what decides the order it is settled in."""

    clause: InferredClause
    strength: int
    position: int
    names_value: bool = False
    """A keyword value or alias: unknown to the caller when no visible row has it."""


class _Masks:
    """Each clause's rows, computed once per question.

    Keyed by the node's identity (hashing a tree costs more than the lookup saves); the node is
    kept with its rows, so its identity cannot be reused while the question is read.
    """

    def __init__(self, columns: AttributeColumns | None, length: int) -> None:
        self._columns = columns
        self._length = length
        self._found: dict[int, tuple[Node, np.ndarray]] = {}

    def of(self, node: Node) -> np.ndarray:
        found = self._found.get(id(node))
        if found is not None:
            return found[1]
        if self._columns is None:
            rows = np.zeros(self._length, dtype=bool)
        else:
            rows = evaluate(node, self._columns)
        self._found[id(node)] = (node, rows)
        return rows


def infer_clauses(question: str, lexicon: Lexicon, scope: InferenceScope) -> Inference:
    words = words_of(question)
    masks = _Masks(scope.columns, len(scope.visible))
    reader = _Reader(question, words, lexicon, scope, masks)
    reader.read_phrases()
    reader.read_times()
    reader.read_numbers()
    return settle(reader.proposals, lexicon, scope, masks, reader.dropped)


def settle(
    proposals: Sequence[Proposal],
    lexicon: Lexicon,
    scope: InferenceScope,
    masks: _Masks | None = None,
    dropped: Sequence[DroppedClause] = (),
) -> Inference:
    """Keep the proposals that narrow the candidates without emptying them (module docstring)."""
    masks = masks or _Masks(scope.columns, len(scope.visible))
    refused = list(dropped)
    kept: list[Proposal] = []
    running = scope.allowed
    for proposal in sorted(proposals, key=lambda p: (-p.strength, p.position)):
        clause = proposal.clause
        attribute = clause.attribute
        if attribute in scope.explicit:
            refused.append(
                DroppedClause(
                    clause,
                    f"the request's own filter already sets {attribute}; inference never"
                    " overrides it",
                )
            )
            continue
        if attribute not in lexicon.attributes:
            refused.append(
                DroppedClause(clause, f"the collection's hints exclude {attribute} from inference")
            )
            continue
        rows = masks.of(clause.node)
        if not np.any(rows & scope.visible):
            if not proposal.names_value:
                refused.append(DroppedClause(clause, "no document you can see matches it"))
            continue
        if scope.allowed is not scope.visible and not np.any(rows & scope.allowed):
            refused.append(
                DroppedClause(clause, "no document matches it together with the request's filter")
            )
            continue
        narrowed = running & rows
        if not np.any(narrowed):
            before = " AND ".join(to_text(p.clause.node) for p in kept)
            refused.append(DroppedClause(clause, f"no document matches it together with {before}"))
            continue
        running = narrowed
        kept.append(proposal)
    kept.sort(key=lambda p: p.position)
    return Inference(tuple(p.clause for p in kept), tuple(refused))


@dataclass(frozen=True)
class _PhraseMatch:
    first: int
    last: int
    attribute: str
    entries: tuple[Entry, ...]
    negated: bool


class _Reader:
    """One question's passes; see the module docstring."""

    def __init__(
        self,
        question: str,
        words: list[Word],
        lexicon: Lexicon,
        scope: InferenceScope,
        masks: _Masks,
    ) -> None:
        self.question = question
        self.words = words
        self.lexicon = lexicon
        self.scope = scope
        self.masks = masks
        self.taken = [False] * len(words)
        self.proposals: list[Proposal] = []
        self.dropped: list[DroppedClause] = []
        self.phrase_matches: list[_PhraseMatch] = []
        self._near: dict[tuple[int, int], frozenset[str]] = {}
        self._context: tuple[int, np.ndarray] | None = None

    # shared helpers -----------------------------------------------------------------------

    def text(self, first: int, last: int) -> str:
        return span_text(self.question, self.words, first, last)

    def covering(self, mentions: Sequence[_PhraseMatch | NumberMention]) -> str:
        """The question from the first mention's first word to the last one's last word."""
        return self.text(min(m.first for m in mentions), max(m.last for m in mentions))

    def take(self, first: int, last: int) -> None:
        for position in range(first, last + 1):
            self.taken[position] = True

    def cue_score(self, facts: AttributeFacts, first: int, last: int) -> int:
        """Name words near the mention count twice, description words once."""
        name_hits, description_hits = self.cues(facts, first, last)
        return 2 * name_hits + description_hits

    def cues(self, facts: AttributeFacts, first: int, last: int) -> tuple[int, int]:
        """How many of the attribute's name words and description words are near a mention."""
        keys = self.near(first, last)
        return len(keys & facts.name_cues), len(keys & facts.description_cues)

    def near(self, first: int, last: int) -> frozenset[str]:
        """The keys of the words around a mention (``CUE_WINDOW`` each side)."""
        found = self._near.get((first, last))
        if found is None:
            around = (
                self.words[max(0, first - CUE_WINDOW) : first]
                + self.words[last + 1 : last + 1 + CUE_WINDOW]
            )
            found = self._near[(first, last)] = frozenset(word.key for word in around)
        return found

    def context_rows(self) -> np.ndarray:
        """Allowed rows that the clauses proposed so far select (those that select any)."""
        if self._context is not None and self._context[0] == len(self.proposals):
            return self._context[1]
        rows = self.scope.allowed
        for proposal in self.proposals:
            narrowed = rows & self.masks.of(proposal.clause.node)
            if np.any(narrowed):
                rows = narrowed
        self._context = (len(self.proposals), rows)
        return rows

    def choose(
        self,
        scores: dict[str, int],
        firm: set[str],
        first: int,
        last: int,
        make: Callable[[str], InferredClause],
    ) -> InferredClause | None:
        """The clause on the best-scoring attribute under which the question selects rows.

        Attributes are tried from the best score down, among those of the best one's kind (a
        number stays a number and a date a date). One the question ties ``firm``ly to the
        mention (by name, unit or a value beside it) is taken at its word; any other counts
        only when its clause selects some of the rows the phrase clauses select, since
        otherwise it could only be dropped. A tie at the first score that counts is dropped with
        the reason, once per attribute it could have been.
        """
        if not scores:
            return None
        attributes = self.lexicon.attributes
        best = max(scores.values())
        kinds = {attributes[name].temporal for name, score in scores.items() if score == best}
        context = self.context_rows()
        clauses: dict[str, InferredClause] = {}
        viable: list[str] = []
        for score in sorted(set(scores.values()), reverse=True):
            level = sorted(
                name
                for name, value in scores.items()
                if value == score and attributes[name].temporal in kinds
            )
            for name in level:
                clauses[name] = make(name)
            viable = [
                name
                for name in level
                if name in firm
                or name in self.scope.explicit
                or np.any(self.masks.of(clauses[name].node) & context)
            ]
            if viable:
                break
        if not viable:
            viable = sorted(name for name, score in scores.items() if score == best)
        if len(viable) == 1:
            return clauses[viable[0]]
        evidence = self.text(first, last)
        reason = (
            f"{evidence!r} could be {' or '.join(viable)}, and no word of the question says which"
        )
        self.ambiguous([clauses[name] for name in viable], reason)
        return None

    def named(self, first: int, last: int) -> set[str]:
        """Attributes one of whose name words stands near the mention."""
        return {
            name
            for name, facts in self.lexicon.attributes.items()
            if self.cues(facts, first, last)[0]
        }

    def ambiguous(self, readings: Sequence[InferredClause], reason: str) -> None:
        """Each reading of an undecided mention, dropped with the same reason."""
        self.dropped.extend(DroppedClause(reading, reason) for reading in readings)

    # phrases: keyword values, aliases, boolean phrases ------------------------------------

    def read_phrases(self) -> None:
        words = self.words
        position = 0
        while position < len(words):
            longest, found = _longest_entries(self.lexicon, words, position)
            if not found:
                position += 1
                continue
            last = position + longest - 1
            self.take(position, last)
            self._resolve_phrase(position, last, found)
            position = last + 1
        self._propose_phrases()

    def _resolve_phrase(self, first: int, last: int, found: list[Entry]) -> None:
        by_attribute: dict[str, list[Entry]] = {}
        for entry in found:
            by_attribute.setdefault(entry.attribute, []).append(entry)
        chosen = next(iter(by_attribute)) if len(by_attribute) == 1 else None
        if chosen is None:
            scores = {
                name: self.cue_score(self.lexicon.attributes[name], first, last)
                for name in by_attribute
            }
            best = max(scores.values())
            winners = [name for name, score in scores.items() if score == best]
            if best > 0 and len(winners) == 1:
                chosen = winners[0]
            else:
                evidence = self.text(first, last)
                names = sorted(by_attribute)
                self.ambiguous(
                    [self._value_clause(name, by_attribute[name][0], evidence) for name in names],
                    f"{evidence!r} is a value of {' and of '.join(names)}, and no word of the"
                    " question says which",
                )
                return
        self.phrase_matches.append(
            _PhraseMatch(
                first, last, chosen, tuple(by_attribute[chosen]), negated(self.words, first)
            )
        )

    def _propose_phrases(self) -> None:
        groups: dict[tuple[str, bool], list[_PhraseMatch]] = {}
        for match in self.phrase_matches:
            groups.setdefault((match.attribute, match.negated), []).append(match)
        booleans: dict[str, list[tuple[_PhraseMatch, bool]]] = {}
        for (attribute, is_negated), matches in groups.items():
            type_ = self.lexicon.schema[attribute]
            if type_ is AttributeType.BOOLEAN:
                for match in matches:
                    truths = {bool(entry.value) for entry in match.entries}
                    if len(truths) == 1:
                        booleans.setdefault(attribute, []).append(
                            (match, truths.pop() != is_negated)
                        )
                continue
            values = list(dict.fromkeys(str(e.value) for m in matches for e in m.entries))
            sources = {e.source for m in matches for e in m.entries}
            source = " and ".join(_SOURCES[s] for s in sorted(sources))
            evidence = self.covering(matches)
            position = matches[0].first
            if is_negated:
                for value in values:
                    self._propose_keyword(
                        attribute, type_, [value], True, evidence, source, position
                    )
            else:
                self._propose_keyword(attribute, type_, values, False, evidence, source, position)
        for attribute, readings in booleans.items():
            evidence = self.covering([m for m, _ in readings])
            truths = {truth for _, truth in readings}
            sources = {e.source for m, _ in readings for e in m.entries}
            source = " and ".join(_SOURCES[s] for s in sorted(sources))
            if len(truths) > 1:
                self.ambiguous(
                    [
                        _boolean_clause(attribute, truth, evidence, source)
                        for truth in (True, False)
                    ],
                    f"the question says both true and false of {attribute}",
                )
                continue
            clause = _boolean_clause(attribute, truths.pop(), evidence, source)
            self.proposals.append(Proposal(clause, STRENGTH_PHRASE, readings[0][0].first))

    def _value_clause(self, attribute: str, entry: Entry, evidence: str) -> InferredClause:
        """The clause a phrase would give on one attribute (to show an undecided reading)."""
        source = _SOURCES[entry.source]
        if isinstance(entry.value, bool):
            return _boolean_clause(attribute, entry.value, evidence, source)
        prop, literal = Property(attribute), StringLiteral(entry.value)
        if self.lexicon.schema[attribute] is AttributeType.KEYWORD_LIST:
            node: Node = ArrayPredicate(ArrayOp.CONTAINS, prop, ArrayLiteral((literal,)))
            return InferredClause(
                attribute, ArrayOp.CONTAINS.value, [entry.value], evidence, source, node
            )
        node = Comparison(ComparisonOp.EQ, prop, literal)
        return InferredClause(attribute, "=", entry.value, evidence, source, node)

    def _propose_keyword(
        self,
        attribute: str,
        type_: AttributeType,
        values: list[str],
        is_negated: bool,
        evidence: str,
        source: str,
        position: int,
    ) -> None:
        prop = Property(attribute)
        literals = tuple(StringLiteral(v) for v in values)
        node: Node
        value: Any = values[0] if len(values) == 1 else values
        if type_ is AttributeType.KEYWORD_LIST:
            op = ArrayOp.CONTAINS if len(values) == 1 else ArrayOp.OVERLAPS
            node = ArrayPredicate(op, prop, ArrayLiteral(literals))
            op_name = op.value
            value = values
            if is_negated:
                node, op_name = Not(node), f"not {op_name}"
        elif is_negated:
            node, op_name = Comparison(ComparisonOp.NE, prop, literals[0]), "<>"
        elif len(values) == 1:
            node, op_name = Comparison(ComparisonOp.EQ, prop, literals[0]), "="
        else:
            node, op_name = In(prop, literals), "in"
        clause = InferredClause(attribute, op_name, value, evidence, source, node)
        self.proposals.append(
            Proposal(clause, STRENGTH_VALUE, position, names_value=not is_negated)
        )

    # times ---------------------------------------------------------------------------------

    def read_times(self) -> None:
        temporal = [f for f in self.lexicon.attributes.values() if f.temporal]
        if not temporal:
            return
        for mention in find_times(self.words, self.taken, self.scope.now):
            self.take(mention.first, mention.last)
            if negated(self.words, mention.first):
                continue
            scores = {f.name: self.cue_score(f, mention.first, mention.last) for f in temporal}

            def make(
                attribute: str, mention: TimeMention = mention, scores: dict[str, int] = scores
            ) -> InferredClause:
                return self._time_clause(attribute, mention, scores[attribute] > 0)

            firm = self.named(mention.first, mention.last)
            clause = self.choose(scores, firm, mention.first, mention.last, make)
            if clause is not None:
                self.proposals.append(Proposal(clause, STRENGTH_TIME, mention.first))

    def _time_clause(self, attribute: str, mention: TimeMention, cued: bool) -> InferredClause:
        type_ = self.lexicon.schema[attribute]
        evidence = self.text(mention.first, mention.last)
        how = mention.how + (", by the cue words around it" if cued else "")
        now = self.scope.now
        if mention.duration is not None:
            node, resolved = resolve_time_window(
                attribute, mention.duration, now, self.lexicon.schema
            )
            value = [_time_text(resolved.start), _time_text(resolved.end)]
            return InferredClause(
                attribute, "t_intersects", value, evidence, f"{how} ({mention.duration})", node
            )
        node, op, bound = _range_node(
            attribute, type_, mention.start, mention.stop, now if mention.through_now else None
        )
        return InferredClause(attribute, op, bound, evidence, how, node)

    # numbers -------------------------------------------------------------------------------

    def read_numbers(self) -> None:
        equal: dict[str, list[tuple[NumberMention, InferredClause]]] = {}
        for mention in find_numbers(self.question, self.words, self.taken):
            if negated(self.words, mention.first):
                continue
            scores, firm = self._number_scores(mention)

            def make(attribute: str, mention: NumberMention = mention) -> InferredClause:
                return self._number_clause(attribute, mention)

            clause = self.choose(scores, firm, mention.first, mention.last, make)
            if clause is None:
                continue
            if clause.op == "=" and not self.lexicon.attributes[clause.attribute].temporal:
                equal.setdefault(clause.attribute, []).append((mention, clause))
            else:
                strength = STRENGTH_TIME if clause.op == "t_intersects" else STRENGTH_NUMBER
                self.proposals.append(Proposal(clause, strength, mention.first))
        for attribute, found in equal.items():
            first_mention, first_clause = found[0]
            values = list(dict.fromkeys(m.value for m, _ in found))
            if len(values) > 1:
                node = In(Property(attribute), tuple(NumberLiteral(v) for v in values))
                evidence = self.covering([m for m, _ in found])
                first_clause = InferredClause(
                    attribute, "in", values, evidence, first_clause.source, node
                )
            self.proposals.append(Proposal(first_clause, STRENGTH_NUMBER, first_mention.first))

    def _number_scores(self, mention: NumberMention) -> tuple[dict[str, int], set[str]]:
        """Each attribute the number could be, scored; and those it is firmly tied to."""
        scores: dict[str, int] = {}
        firm = self.named(mention.first, mention.last)
        value = mention.value
        for facts in self.lexicon.attributes.values():
            if facts.numeric:
                if mention.unit is not None:
                    if mention.unit not in facts.units:
                        continue
                    score = 3
                    firm.add(facts.name)
                elif mention.year_shaped and facts.calendar_year:
                    beside = self._beside_phrase(mention)
                    score = 3 + 2 * beside
                    if beside:
                        firm.add(facts.name)
                elif (
                    not facts.calendar_year
                    and facts.low is not None
                    and facts.high is not None
                    and facts.low <= value <= facts.high
                ):
                    score = 0
                else:
                    continue
            elif facts.temporal and mention.year_shaped:
                score = 2 + 2 * mention.time_word
            else:
                continue
            cue = self.cue_score(facts, mention.first, mention.last)
            if score == 0 and cue == 0:
                continue  # a bare number with no unit and no cue word is no evidence
            scores[facts.name] = score + cue
        return scores, firm

    def _beside_phrase(self, mention: NumberMention) -> bool:
        """A year written next to a value ("2022 Ridgeline") belongs with that value."""
        return any(
            m.last + 1 == mention.number_first or m.first == mention.number_last + 1
            for m in self.phrase_matches
        )

    def _number_clause(self, attribute: str, mention: NumberMention) -> InferredClause:
        facts = self.lexicon.attributes[attribute]
        evidence = self.text(mention.first, mention.last)
        if facts.temporal:
            return self._year_as_time(attribute, mention, evidence)
        if mention.unit:
            how = f"number with unit {mention.unit}"
        elif mention.year_shaped and facts.calendar_year:
            how = "year"
        else:
            how = "number, by the cue words around it"
        prop = Property(attribute)
        node: Node
        value: int | float | list[int | float]
        if mention.op == "between" and mention.high is not None:
            node = Between(prop, NumberLiteral(mention.value), NumberLiteral(mention.high))
            return InferredClause(
                attribute, "between", [mention.value, mention.high], evidence, how, node
            )
        op = mention.op
        if op == "=" and facts.bound is not None and not mention.year_shaped:
            # "a 45 kg rider" against a maximum: the limit must be at least 45 kg
            op = ">=" if facts.bound == "max" else "<="
            how = f"{how}; {attribute} is a {'maximum' if facts.bound == 'max' else 'minimum'}"
        node = Comparison(ComparisonOp(op), prop, NumberLiteral(mention.value))
        value = mention.value
        return InferredClause(attribute, op, value, evidence, how, node)

    def _year_as_time(
        self, attribute: str, mention: NumberMention, evidence: str
    ) -> InferredClause:
        year = int(mention.value)
        start: dt.datetime | None = _year_start(year)
        stop: dt.datetime | None = _year_start(year + 1)
        if mention.op == "between" and mention.high is not None:
            stop = _year_start(int(mention.high) + 1)
        elif mention.op == ">=":
            stop = None
        elif mention.op == ">":
            start, stop = stop, None
        elif mention.op == "<":
            start, stop = None, start
        elif mention.op == "<=":
            start = None
        type_ = self.lexicon.schema[attribute]
        node, op, value = _range_node(attribute, type_, start, stop, None)
        return InferredClause(attribute, op, value, evidence, "year", node)


def proposals_from_filter(node: Node, source: str) -> list[Proposal]:
    """A checked filter's top-level conjuncts as proposals to settle, in their order.

    For filters that come from elsewhere (a model): they carry no words of the question.
    """
    parts = node.args if isinstance(node, And) else (node,)
    return [
        Proposal(_clause_of(part, source), STRENGTH_NUMBER, position)
        for position, part in enumerate(parts)
    ]


def _clause_of(node: Node, source: str) -> InferredClause:
    attribute = next(iter(node_attributes(node)), "")
    op, value = _described(node)
    return InferredClause(attribute, op, value, "", source, node)


def node_attributes(node: Node) -> list[str]:
    """The attributes a filter reads, in order of appearance."""
    names: list[str] = []
    if isinstance(node, And | Or):
        for arg in node.args:
            names += node_attributes(arg)
    elif isinstance(node, Not):
        names += node_attributes(node.arg)
    elif isinstance(node, Comparison | TemporalPredicate | ArrayPredicate):
        names += properties_of(node.left) + properties_of(node.right)
    elif isinstance(node, Between | In | IsNull | Like):
        names += properties_of(node.value)
    return list(dict.fromkeys(names))


def _described(node: Node) -> tuple[str, Any]:
    """The operator and the literal value of a clause, as the response shows them."""
    if isinstance(node, Comparison):
        return node.op.value, _plain(node.right)
    if isinstance(node, In):
        return "in", [_plain(item) for item in node.items]
    if isinstance(node, Between):
        return "between", [_plain(node.low), _plain(node.high)]
    if isinstance(node, TemporalPredicate | ArrayPredicate):
        return node.op.value, _plain(node.right)
    if isinstance(node, IsNull):
        return "is_null", None
    if isinstance(node, Not) and not isinstance(node.arg, And | Or):
        op, value = _described(node.arg)
        return f"not {op}", value
    return "cql2", to_text(node)


def _plain(expression: Expression | IntervalEnd) -> Any:
    if isinstance(expression, StringLiteral | NumberLiteral | BooleanLiteral):
        return expression.value
    if isinstance(expression, DateLiteral | TimestampLiteral):
        return _time_text(expression.value)
    if isinstance(expression, IntervalLiteral):
        return [_plain(expression.start), _plain(expression.end)]
    if isinstance(expression, ArrayLiteral):
        return [_plain(item) for item in expression.items]
    if isinstance(expression, OpenEnd):
        return ".."
    if isinstance(expression, Property):
        return {"property": expression.name}
    return _plain(expression.arg)  # CASEI or ACCENTI around a string


def _boolean_clause(attribute: str, truth: bool, evidence: str, source: str) -> InferredClause:
    node = Comparison(ComparisonOp.EQ, Property(attribute), BooleanLiteral(truth))
    return InferredClause(attribute, "=", truth, evidence, source, node)


def _longest_entries(
    lexicon: Lexicon, words: Sequence[Word], position: int
) -> tuple[int, list[Entry]]:
    longest = 0
    found: list[Entry] = []
    for entry in lexicon.entries.get(words[position].key, ()):
        length = len(entry.keys)
        if length < longest or position + length > len(words):
            continue
        span = words[position : position + length]
        if any(word.key != key for word, key in zip(span, entry.keys, strict=True)):
            continue
        if entry.exact is not None and tuple(w.text for w in span) != entry.exact:
            continue
        if entry.after_name and (
            position == 0
            or words[position - 1].key not in lexicon.attributes[entry.attribute].name_cues
        ):
            continue
        if length > longest:
            longest, found = length, []
        found.append(entry)
    return longest, found


def _year_start(year: int) -> dt.datetime:
    return dt.datetime(year, 1, 1, tzinfo=dt.UTC)


def _time_text(value: dt.date | dt.datetime) -> str:
    return timestamp_text(value) if isinstance(value, dt.datetime) else value.isoformat()


def _range_node(
    attribute: str,
    type_: AttributeType,
    start: dt.datetime | None,
    stop: dt.datetime | None,
    until_now: dt.datetime | None,
) -> tuple[Node, str, Any]:
    """``[start, stop)`` (or ``[start, now]``) on a date or datetime attribute."""
    literal: Callable[[dt.datetime], DateLiteral | TimestampLiteral]
    last: DateLiteral | TimestampLiteral | None = None
    if type_ is AttributeType.DATE:
        literal = lambda moment: DateLiteral(moment.date())  # noqa: E731
        if stop is not None:
            last = DateLiteral((stop - dt.timedelta(days=1)).date())
    else:
        literal = TimestampLiteral
        if stop is not None:
            last = TimestampLiteral(stop - dt.timedelta(microseconds=1))
    if until_now is not None:
        last = literal(until_now)
    prop = Property(attribute)
    if start is not None and last is not None:
        first = literal(start)
        node = TemporalPredicate(TemporalOp.INTERSECTS, prop, IntervalLiteral(first, last))
        return node, "t_intersects", [_time_text(first.value), _time_text(last.value)]
    if start is not None:
        first = literal(start)
        return Comparison(ComparisonOp.GE, prop, first), ">=", _time_text(first.value)
    assert stop is not None
    end = literal(stop)
    return Comparison(ComparisonOp.LT, prop, end), "<", _time_text(end.value)
