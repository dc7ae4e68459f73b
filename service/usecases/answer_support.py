"""What the answering use case hands a generator beside the passages, read from one snapshot.

The extractive answerer weighs a question's terms by how rare they are in the collection, needs
the document text around each passage (a chunk may begin inside a sentence), and checks that
an answer names what the question names, by the collection's own names for things: its keyword
values and their aliases, as filter inference knows them.
"""

from __future__ import annotations

import math
import threading
import weakref
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from service.filters.inference.lexicon import Entry, Lexicon
from service.filters.inference.words import words_of
from service.filters.syntax import (
    And,
    Comparison,
    ComparisonOp,
    Node,
    NumberLiteral,
    Property,
    StringLiteral,
)
from service.generation.base import AnswerSupport, ChunkVector
from service.generation.reading import YEAR_KIND, Entity
from service.generation.spans import PassageWindow
from service.index.collection_index import IndexSnapshot
from service.index.view import IndexView
from service.packing.packer import Passage
from service.usecases.inference import lexicon_for

TEXT_BEFORE = 2000
"""Characters of document text read before a passage: enough to reach the start of the
sentence it begins inside and the header row of a table it begins inside."""
TEXT_AFTER = 400
YEARS = range(1800, 2200)


def answer_support(
    view: IndexView,
    passages: Sequence[Passage],
    query_vector: np.ndarray | None,
    filter_node: Node | None,
) -> AnswerSupport:
    snapshot = view.snapshot
    names = _names_for(view)
    live_rows = snapshot.lexical.live_rows

    def term_weight(term: str) -> float:
        # Robertson and Spärck Jones's idf as BM25 smooths it; a term no chunk holds weighs
        # the most, so a question about something the collection never mentions stays unmatched.
        df = snapshot.lexical.document_frequency(term)
        return math.log1p((live_rows - df + 0.5) / (df + 0.5))

    return AnswerSupport(
        query_vector=query_vector,
        analyzer_tokens=view.analyzer.tokens,
        term_weight=term_weight,
        known_term=lambda term: snapshot.lexical.document_frequency(term) > 0,
        find_entities=names.find,
        filter_entities=_filter_entities(filter_node, names),
        windows={p.marker: _window(snapshot, p) for p in passages},
        document_entities={
            p.marker: _document_entities(snapshot, p.document_id, names) for p in passages
        },
        chunk_vectors={p.marker: _chunk_vectors(snapshot, p) for p in passages},
    )


def _chunk_vectors(snapshot: IndexSnapshot, passage: Passage) -> tuple[ChunkVector, ...]:
    chunk_ids = set(passage.chunk_ids)
    return tuple(
        ChunkVector(
            int(snapshot.char_starts[row]), int(snapshot.char_ends[row]), snapshot.vector(row)
        )
        for row in snapshot.rows_of(passage.document_id).tolist()
        if snapshot.chunk_ids[row] in chunk_ids
    )


def _window(snapshot: IndexSnapshot, passage: Passage) -> PassageWindow:
    rows = snapshot.rows_of(passage.document_id)
    if not len(rows):
        return PassageWindow(passage)
    first = int(snapshot.char_starts[int(rows[0])])
    last = int(snapshot.char_ends[int(rows[-1])])
    before_start = max(first, passage.char_start - TEXT_BEFORE)
    after_end = min(last, passage.char_end + TEXT_AFTER)
    before = snapshot.document_span(passage.document_id, before_start, passage.char_start) or ""
    after = snapshot.document_span(passage.document_id, passage.char_end, after_end) or ""
    # Only the blocks the passage begins and ends inside can widen a candidate (every candidate
    # overlaps the passage and none crosses a blank line), so the window keeps no other block:
    # it starts where the passage's first block starts (a table read from there starts at its
    # header) and ends where its last block ends.
    cut = before.rfind("\n\n")
    if cut >= 0:
        before = before[cut + 2 :]
    elif before_start > first:
        before = before[before.find("\n") + 1 :]
    cut = after.find("\n\n")
    if cut >= 0:
        after = after[:cut]
    return PassageWindow(passage, before, after)


@dataclass(frozen=True)
class _Names:
    """The collection's names for things: keyword values that read as names (they hold a
    capital letter: "Ridgeline", "US"; not "manual") and their aliases, indexed by the key of
    their first word."""

    entries: Mapping[str, tuple[Entry, ...]]
    attributes: frozenset[str]

    def find(self, text: str) -> frozenset[Entity]:
        if not self.entries:
            return frozenset()
        words = words_of(text)
        found: set[Entity] = set()
        for index, word in enumerate(words):
            for entry in self.entries.get(word.key, ()):
                end = index + len(entry.keys)
                if tuple(w.key for w in words[index:end]) != entry.keys:
                    continue
                if entry.exact is not None and tuple(w.text for w in words[index:end]) != (
                    entry.exact
                ):
                    continue
                found.add(Entity(entry.attribute, str(entry.value)))
        return frozenset(found)

    def value_entity(self, attribute: str, value: object) -> Entity | None:
        if isinstance(value, bool):
            return None
        if isinstance(value, int) and value in YEARS:
            return Entity(YEAR_KIND, str(value))
        if isinstance(value, str) and attribute in self.attributes and _reads_as_name(value):
            return Entity(attribute, value)
        return None


def _reads_as_name(value: str) -> bool:
    return any(character.isupper() for character in value)


class _NamesBySnapshot:
    """One name index per snapshot (its lexicon's), dropped with the snapshot."""

    def __init__(self) -> None:
        self._built: weakref.WeakKeyDictionary[IndexSnapshot, tuple[Lexicon, _Names]] = (
            weakref.WeakKeyDictionary()
        )
        self._lock = threading.Lock()

    def of(self, view: IndexView) -> _Names:
        lexicon = lexicon_for(view.snapshot, view.facts.schema, view.facts.inference_hints)
        with self._lock:
            found = self._built.get(view.snapshot)
        if found is not None and found[0] is lexicon:
            return found[1]
        names = _build_names(lexicon)
        with self._lock:
            self._built[view.snapshot] = (lexicon, names)
        return names


def _build_names(lexicon: Lexicon) -> _Names:
    entries: dict[str, list[Entry]] = {}
    attributes: set[str] = set()
    for key, found in lexicon.entries.items():
        for entry in found:
            if entry.source not in ("value", "alias") or entry.after_name:
                continue
            if not isinstance(entry.value, str) or not _reads_as_name(entry.value):
                continue
            entries.setdefault(key, []).append(entry)
            attributes.add(entry.attribute)
    return _Names({key: tuple(found) for key, found in entries.items()}, frozenset(attributes))


_NAMES = _NamesBySnapshot()


def _names_for(view: IndexView) -> _Names:
    return _NAMES.of(view)


def _document_entities(
    snapshot: IndexSnapshot, document_id: str, names: _Names
) -> frozenset[Entity]:
    rows = snapshot.rows_of(document_id)
    if not len(rows):
        return frozenset()
    found: set[Entity] = set()
    for attribute, value in snapshot.attributes[int(rows[0])].items():
        values = value if isinstance(value, list | tuple) else [value]
        for item in values:
            entity = names.value_entity(attribute, item)
            if entity is not None:
                found.add(entity)
    return frozenset(found)


def _filter_entities(node: Node | None, names: _Names) -> frozenset[Entity]:
    """The values the filter pins down (``model = 'Larkspur'`` in a conjunction); a value it
    only bounds or offers among others pins nothing."""
    if node is None:
        return frozenset()
    if isinstance(node, And):
        found: set[Entity] = set()
        for arg in node.args:
            found |= _filter_entities(arg, names)
        return frozenset(found)
    if (
        isinstance(node, Comparison)
        and node.op is ComparisonOp.EQ
        and isinstance(node.left, Property)
        and isinstance(node.right, StringLiteral | NumberLiteral)
    ):
        entity = names.value_entity(node.left.name, node.right.value)
        return frozenset() if entity is None else frozenset({entity})
    return frozenset()
