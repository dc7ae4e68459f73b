"""What inference knows of one collection version, built once per index snapshot.

Entries are the phrases that name a clause: every keyword value present in the index, the
aliases and boolean phrases of the schema hints, and each boolean attribute's own name. They
are indexed by their first word's key, so matching a question costs a dictionary lookup per
word. Beside them, per attribute: the words of its name and description (the cue words that
tie a number or a date to it), its units, and the range of its values.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from service.attributes import AttributeType, Schema
from service.filters.columns import (
    PLAIN,
    AttributeColumns,
    KeywordColumn,
    KeywordListColumn,
    ValueColumn,
)
from service.filters.inference.hints import NO_HINTS, AttributeHints, InferenceHints
from service.filters.inference.words import FUNCTION_WORDS, fold, stems, words_of

# An attribute with more distinct values than this holds identifiers rather than names people
# say; its values are matched only through aliases.
MAX_VALUES_PER_ATTRIBUTE = 10_000
MAX_VALUE_WORDS = 12

UNIT_WORDS: Mapping[str, str] = {
    **dict.fromkeys(("kg", "kgs", "kilo", "kilos", "kilogram", "kilograms"), "kg"),
    **dict.fromkeys(("gram", "grams"), "g"),
    **dict.fromkeys(("wh", "watt-hour", "watt-hours"), "wh"),
    **dict.fromkeys(("kwh",), "kwh"),
    **dict.fromkeys(("watt", "watts"), "w"),
    **dict.fromkeys(("eur", "euro", "euros", "\u20ac"), "eur"),
    **dict.fromkeys(("usd", "dollar", "dollars", "$"), "usd"),
    **dict.fromkeys(("gbp", "\u00a3"), "gbp"),
    **dict.fromkeys(("km", "kilometre", "kilometres", "kilometer", "kilometers"), "km"),
    **dict.fromkeys(("mm", "millimetre", "millimetres", "millimeter", "millimeters"), "mm"),
    **dict.fromkeys(("cm", "centimetre", "centimetres", "centimeter", "centimeters"), "cm"),
    **dict.fromkeys(("nm",), "nm"),
    **dict.fromkeys(("bar",), "bar"),
    **dict.fromkeys(("psi",), "psi"),
    **dict.fromkeys(("percent", "pct", "%"), "percent"),
    **dict.fromkeys(("volt", "volts"), "v"),
    **dict.fromkeys(("litre", "litres", "liter", "liters"), "l"),
    **dict.fromkeys(("hour", "hours", "hr", "hrs"), "hour"),
    **dict.fromkeys(("day", "days"), "day"),
    **dict.fromkeys(("week", "weeks"), "week"),
    **dict.fromkeys(("month", "months"), "month"),
    **dict.fromkeys(("year", "years"), "year"),
}
"""Unit spellings (folded words and symbols) and the unit each one names."""


@dataclass(frozen=True, slots=True)
class Entry:
    keys: tuple[str, ...]
    attribute: str
    value: str | bool
    source: str
    """``value``, ``alias`` or ``phrase`` (from the hints), or ``name`` (the attribute's)."""
    exact: tuple[str, ...] | None
    """The words as written, when only that spelling counts (acronyms, function words)."""
    after_name: bool = False
    """A value spelled like a common word ("a", "on", "x") counts only right after a word of
    its attribute's name ("tier a")."""


@dataclass(frozen=True)
class AttributeFacts:
    name: str
    type: AttributeType
    name_cues: frozenset[str]
    description_cues: frozenset[str]
    units: frozenset[str]
    low: float | None
    high: float | None
    """The range of the attribute's values in the index (epoch days or microseconds for
    dates and datetimes); None when no row has one."""
    calendar_year: bool
    """An integer attribute whose name says it holds a calendar year."""
    bound: str | None
    """``max`` or ``min`` when the name says the attribute is an upper or lower limit."""

    @property
    def temporal(self) -> bool:
        return self.type in (AttributeType.DATE, AttributeType.DATETIME)

    @property
    def numeric(self) -> bool:
        return self.type in (AttributeType.INTEGER, AttributeType.NUMBER)


@dataclass(frozen=True)
class Lexicon:
    schema: Schema
    hints: InferenceHints
    entries: Mapping[str, tuple[Entry, ...]]
    attributes: Mapping[str, AttributeFacts]
    """The attributes inference may use (those the hints do not exclude)."""

    def hints_of(self, attribute: str) -> AttributeHints:
        return self.hints.get(attribute, NO_HINTS)


def build_lexicon(
    schema: Schema, hints: InferenceHints, columns: AttributeColumns | None
) -> Lexicon:
    entries: dict[str, list[Entry]] = {}
    facts: dict[str, AttributeFacts] = {}
    for name, type_ in schema.items():
        attribute_hints = hints.get(name, NO_HINTS)
        if not attribute_hints.infer:
            continue
        column = None if columns is None else columns.columns.get(name)
        facts[name] = _facts(name, type_, attribute_hints, column)
        for entry in _entries(name, type_, attribute_hints, column):
            entries.setdefault(entry.keys[0], []).append(entry)
    return Lexicon(
        schema=dict(schema),
        hints=dict(hints),
        entries={key: tuple(found) for key, found in entries.items()},
        attributes=facts,
    )


def _entries(name: str, type_: AttributeType, hints: AttributeHints, column: object) -> list[Entry]:
    """Every phrase naming a value of the attribute: (text, value, source) analysed."""
    named: list[tuple[str, str | bool, str]] = []
    if type_ in (AttributeType.KEYWORD, AttributeType.KEYWORD_LIST):
        named += [(value, value, "value") for value in _keyword_values(column)]
        named += [
            (alias, value, "alias") for value, aliases in hints.aliases.items() for alias in aliases
        ]
    elif type_ is AttributeType.BOOLEAN:
        named.append((name.replace("_", " "), True, "name"))
        named += [
            (phrase, truth, "phrase")
            for truth, phrases in hints.phrases.items()
            for phrase in phrases
        ]
    found = (_entry(text, name, value, source) for text, value, source in named)
    return [entry for entry in found if entry is not None]


def _keyword_values(column: object) -> Sequence[str]:
    if isinstance(column, KeywordColumn):
        dictionary = column.forms[PLAIN]
    elif isinstance(column, KeywordListColumn):
        dictionary = column.dictionary
    else:
        return ()
    if len(dictionary) > MAX_VALUES_PER_ATTRIBUTE:
        return ()
    return [str(value) for value in dictionary.tolist()]


def _entry(text: str, attribute: str, value: str | bool, source: str) -> Entry | None:
    analysed = _analysed(text)
    if analysed is None:
        return None
    keys, written, after_name = analysed
    return Entry(keys, attribute, value, source, written, after_name)


@lru_cache(maxsize=65_536)
def _analysed(text: str) -> tuple[tuple[str, ...], tuple[str, ...] | None, bool] | None:
    """Keys of a phrase, its words as written when only that spelling may match, and whether
    it counts only after a word of its attribute's name.

    A short upper-case value ("AT", "US") is an acronym: it must be written in capitals. A
    value that is a function word or at most two characters long cannot be told from an
    ordinary word, so it also needs its attribute's name just before it. Analyses are cached
    across index versions, which share most of their values.
    """
    words = words_of(text)
    if not words or len(words) > MAX_VALUE_WORDS:
        return None
    if all(word.folded in FUNCTION_WORDS for word in words):
        if len(words) > 1:
            return None
    elif len(words) == 1 and words[0].folded.isdigit():
        return None  # a bare number is read as a number, not as a keyword
    keys = tuple(word.key for word in words)
    if len(words) > 1:
        return keys, None, False
    single = words[0]
    common = single.folded in FUNCTION_WORDS or len(single.text) <= 2
    acronym = single.text.isupper() and 2 <= len(single.text) <= 4 and single.text.isalpha()
    if acronym:
        return keys, (single.text,), False
    if common:
        return keys, (single.text,), True
    return keys, None, False


def _facts(
    name: str, type_: AttributeType, hints: AttributeHints, column: object
) -> AttributeFacts:
    name_words = [fold(part) for part in name.split("_") if part]
    calendar_year = type_ is AttributeType.INTEGER and "year" in name_words
    units = {UNIT_WORDS[w] for w in name_words if w in UNIT_WORDS}
    description_words = [w.folded for w in words_of(hints.description or "")]
    units |= {UNIT_WORDS[w] for w in description_words if len(w) > 1 and w in UNIT_WORDS}
    if calendar_year:
        units.discard("year")
    name_cues = frozenset(stems([w for w in name_words if w not in UNIT_WORDS]))
    description_cues = (
        frozenset(
            stems(
                [
                    w
                    for w in description_words
                    if w not in FUNCTION_WORDS and w not in UNIT_WORDS and not w.isdigit()
                ]
            )
        )
        - name_cues
    )
    low = high = None
    if isinstance(column, ValueColumn) and type_ is not AttributeType.BOOLEAN:
        present = column.values[column.present]
        if len(present):
            low, high = float(np.min(present)), float(np.max(present))
    bound = None
    if name_words and name_words[0] in ("max", "maximum"):
        bound = "max"
    elif name_words and name_words[0] in ("min", "minimum"):
        bound = "min"
    return AttributeFacts(
        name=name,
        type=type_,
        name_cues=name_cues,
        description_cues=description_cues,
        units=frozenset(units),
        low=low,
        high=high,
        calendar_year=calendar_year,
        bound=bound,
    )
