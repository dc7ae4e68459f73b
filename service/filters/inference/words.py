"""The question's words with their places, in the forms matching compares.

A word is a run of letters and digits (``[^\\W_]+``), so ``SB-2023-07`` is three words and
``e-bike`` two, exactly as attribute values are split; the characters between two words are
kept as the ``gap`` because dates and decimals are told apart by them. Matching compares
``key``: the word case-folded, accent-stripped and stemmed with the English Snowball stemmer,
so "Ampere" meets "Ampère" and "recalls" meets "recall". A possessive ``'s`` is dropped.
"""

from __future__ import annotations

import re
import threading
from collections.abc import Sequence
from dataclasses import dataclass

import Stemmer

from service.attributes import fold_case, strip_accents

_WORD = re.compile(r"[^\W_]+")
_APOSTROPHES = ("'", "\u2019")
_local = threading.local()


@dataclass(frozen=True, slots=True)
class Word:
    text: str
    folded: str
    key: str
    start: int
    end: int
    gap: str
    """The characters between the previous word (or the start) and this one."""


def _stemmer() -> Stemmer.Stemmer:
    # PyStemmer's objects are not safe to share between threads.
    stemmer = getattr(_local, "stemmer", None)
    if stemmer is None:
        stemmer = _local.stemmer = Stemmer.Stemmer("english")
    return stemmer


def fold(text: str) -> str:
    folded = fold_case(text)
    return folded if folded.isascii() else strip_accents(folded)


def stems(folded: Sequence[str]) -> list[str]:
    keys: list[str] = _stemmer().stemWords(list(folded))
    return keys


def words_of(text: str) -> list[Word]:
    found: list[tuple[str, int, int, str]] = []
    previous_end = 0
    for match in _WORD.finditer(text):
        raw, start, end = match.group(), match.start(), match.end()
        gap = text[previous_end:start]
        previous_end = end
        if found and raw in ("s", "S") and gap in _APOSTROPHES:
            text_before, start_before, _, gap_before = found[-1]
            found[-1] = (text_before, start_before, end, gap_before)
            continue
        found.append((raw, start, end, gap))
    folded = [fold(raw) for raw, _, _, _ in found]
    keys = stems(folded)
    return [
        Word(raw, folded_word, key, start, end, gap)
        for (raw, start, end, gap), folded_word, key in zip(found, folded, keys, strict=True)
    ]


def phrase_keys(text: str) -> tuple[str, ...]:
    """The keys of a value, alias or phrase, matched against consecutive question words."""
    return tuple(word.key for word in words_of(text))


def span_text(text: str, words: Sequence[Word], first: int, last: int) -> str:
    """The question as written from word ``first`` to word ``last``, both included."""
    return text[words[first].start : words[last].end]


# Function words never identify an attribute value on their own, so a value spelled like one
# ("AT", "US", "A") is matched only as written, case included; they are also no cue words.
_FUNCTION_WORDS_TEXT = """
    a about above after again against all am an and any are as at be because been before being
    below between both but by can could did do does doing down during each few for from further
    had has have having he her here hers herself him himself his how i if in into is it its
    itself just me more most my myself no nor not now of off on once only or other our ours
    ourselves out over own same she should so some such than that the their theirs them
    themselves then there these they this those through to too under until up very was we were
    what when where which while who whom why will with would you your yours yourself yourselves
    us may might must shall per via vs
"""
FUNCTION_WORDS = frozenset(_FUNCTION_WORDS_TEXT.split())


_UNITS = {
    "zero": 0, "one": 1, "two": 2, "three": 3, "four": 4, "five": 5, "six": 6, "seven": 7,
    "eight": 8, "nine": 9, "ten": 10, "eleven": 11, "twelve": 12, "thirteen": 13,
    "fourteen": 14, "fifteen": 15, "sixteen": 16, "seventeen": 17, "eighteen": 18,
    "nineteen": 19,
}  # fmt: skip
_TENS = {
    "twenty": 20, "thirty": 30, "forty": 40, "fifty": 50, "sixty": 60, "seventy": 70,
    "eighty": 80, "ninety": 90,
}  # fmt: skip
_ORDINAL = re.compile(r"(\d+)(?:st|nd|rd|th)")


def number_at(words: Sequence[Word], index: int) -> tuple[int | float, int] | None:
    """The number that starts at ``words[index]`` and the index of its last word, if any.

    Digits (``2,500``, ``2.5``, ``15th``) and English number words up to the thousands
    (``thirty``, ``twenty-five``, ``two hundred``) are read.
    """
    word = words[index].folded
    if word.isdigit():
        value: int | float = int(word)
        last = index
        while (
            last + 1 < len(words)
            and words[last + 1].gap == ","
            and len(words[last + 1].folded) == 3
            and words[last + 1].folded.isdigit()
            and len(words[index].folded) <= 3
        ):
            value = value * 1000 + int(words[last + 1].folded)
            last += 1
        if (
            last + 1 < len(words)
            and words[last + 1].gap == "."
            and words[last + 1].folded.isdigit()
        ):
            fraction = words[last + 1].folded
            return value + int(fraction) / 10 ** len(fraction), last + 1
        return value, last
    ordinal = _ORDINAL.fullmatch(word)
    if ordinal:
        return int(ordinal.group(1)), index
    return _number_words(words, index)


def _number_words(words: Sequence[Word], index: int) -> tuple[int, int] | None:
    total = current = 0
    previous = ""  # the kind of the last word read: "unit", "tens", "hundred" or "thousand"
    last: int | None = None
    position = index
    while position < len(words):
        word = words[position].folded
        if word in _UNITS and previous in ("", "tens", "hundred", "thousand"):
            if previous == "tens" and _UNITS[word] >= 10:
                break
            current += _UNITS[word]
            previous = "unit"
        elif word in _TENS and previous in ("", "hundred", "thousand"):
            current += _TENS[word]
            previous = "tens"
        elif word == "hundred" and previous in ("unit", "tens") and 0 < current < 100:
            current *= 100
            previous = "hundred"
        elif word == "thousand" and previous in ("unit", "tens", "hundred") and current:
            total, current = total + current * 1000, 0
            previous = "thousand"
        elif (
            word == "and"
            and previous in ("hundred", "thousand")
            and position + 1 < len(words)
            and (words[position + 1].folded in _UNITS or words[position + 1].folded in _TENS)
        ):
            position += 1
            continue
        else:
            break
        last = position
        position += 1
    if last is None:
        return None
    return total + current, last
