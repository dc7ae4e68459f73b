"""What a question asks for, and which things it and a candidate answer name.

Two readings keep the extractive answerer from answering fluently and wrongly. The answer type:
"how much", "how long", "what pressure" ask for a number (with a unit, a duration, a price), so
a sentence without one cannot be the answer, however similar its words. The entities: a
question about the 2025 Ridgeline is not answered by a sentence about the 2024 one, nor a
question about error E-21 by the table row of E-14.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Literal

AnswerType = Literal["money", "duration", "count", "quantity", "date", "name", "any"]

HARD_TYPES: frozenset[AnswerType] = frozenset({"money", "duration", "count", "quantity", "name"})
"""Types a span must hold to be an answer; the others only add to its score."""

YEAR_KIND = "year"
CODE_KIND_PREFIX = "code:"

_NUMBER_WORDS = (
    "one|two|three|four|five|six|seven|eight|nine|ten|eleven|twelve|fifteen|twenty|thirty|"
    "forty|fifty|sixty|hundred|thousand|half|twice|dozen|single|double"
)
_TIME_UNITS = (
    r"(?:seconds?|s|minutes?|min|hours?|h|hrs?|days?|weeks?|months?|years?|decades?|"
    r"working days|rides?)"
)
_DIGIT_NUMBER = r"\d+(?:[.,]\d+)*"
# A number that is a quantity: not a year, and not the digits of a code such as "TW-S4".
_NUMBER = re.compile(rf"(?<![\w-])(?!(?:19|20)\d\d\b)\d|\b(?:{_NUMBER_WORDS})\b", re.IGNORECASE)
_DURATION = re.compile(
    rf"(?:{_DIGIT_NUMBER}|\b(?:{_NUMBER_WORDS}|a|an))[\s-]+(?:\w+[\s-]+)?{_TIME_UNITS}\b"
    r"|\blifetime\b|\b(?:daily|weekly|monthly|yearly|annual|annually)\b"
    # An interval is also written as a distance or a count of uses: "every 300 km".
    rf"|\bevery\s+(?:{_DIGIT_NUMBER}|(?:{_NUMBER_WORDS})\b)",
    re.IGNORECASE,
)
_MONEY = re.compile(
    rf"[€$£]\s?{_DIGIT_NUMBER}|{_DIGIT_NUMBER}\s?(?:€|eur\b|euros?\b|usd\b|dollars?\b|gbp\b|"
    r"pounds?\b)",
    re.IGNORECASE,
)
_DATE = re.compile(
    r"\b(?:1[89]|20)\d{2}\b|\b(?:january|february|march|april|may|june|july|august|september|"
    r"october|november|december)\b|\b(?:after|before|until|within|every|during|at the)\b",
    re.IGNORECASE,
)
# A name is a code ("TW-S4", "E-21") or a capitalised word that does not start the sentence.
_CODE = re.compile(r"\b[A-Za-z]{1,4}-?[A-Za-z]?\d[\w-]*\b")
_NAME = re.compile(r"(?<=\w[\s,;:(])[A-Z][\w-]+")
_YEAR = re.compile(r"\b(?:19|20)\d{2}\b")
_UPPER_CODE = re.compile(r"\b(?=[A-Z0-9-]*[A-Z])(?=[A-Z0-9-]*\d)[A-Z][A-Z0-9]*(?:-[A-Z0-9]+)+\b")

_QUESTION_TYPES: tuple[tuple[AnswerType, re.Pattern[str]], ...] = (
    (
        "money",
        re.compile(
            r"^(?!.*\b(?:cheaper|discount|less|reduced|reduction)\b)"
            r".*\b(?:price|prices|cost|costs|pay|paid|expensive|charge for)\b",
            re.IGNORECASE,
        ),
    ),
    (
        "duration",
        re.compile(
            r"\bhow (?:long|often|soon|frequently)\b|\bhow many (?:years|months|weeks|days|hours|"
            r"minutes)\b|\bwhat (?:interval|period)\b|\bafter how\b",
            re.IGNORECASE,
        ),
    ),
    ("count", re.compile(r"\bhow many\b", re.IGNORECASE)),
    (
        "quantity",
        re.compile(
            r"\bhow (?:much|heavy|far|wide|big|hot|cold|fast|high|low|thick|large|deep|strong|"
            r"tight)\b|\bwhat (?:\w+ ){0,3}(?:pressure|torque|temperature|weight|load|capacity|"
            r"size|width|length|speed|percentage|percent|voltage|travel|thickness|diameter|"
            r"reach|power|rating|range)\b|\b(?:maximum|minimum|widest|largest|smallest|"
            r"heaviest|lightest|longest|highest|lowest)\b|\bthe most\b|\bat what\b",
            re.IGNORECASE,
        ),
    ),
    ("date", re.compile(r"^\W*when\b|\bwhat (?:date|year|day)\b|\bin which year\b", re.I)),
    ("name", re.compile(r"\b(?:which|who|whose)\b", re.IGNORECASE)),
)


@dataclass(frozen=True, order=True)
class Entity:
    """A thing a text names: a value of a named attribute (``model`` "Ridgeline"), a year
    (kind ``year``) or a code (kind ``code:E-`` for "E-21"). Two entities of one kind with
    different values are different things of the same sort."""

    kind: str
    value: str

    def __str__(self) -> str:
        return self.value


EntityFinder = Callable[[str], frozenset[Entity]]
"""The entities a text names, by the collection's own names for them."""


def answer_type(question: str) -> AnswerType:
    """The first type whose wording the question uses; "any" when none does."""
    for kind, pattern in _QUESTION_TYPES:
        if pattern.search(question):
            return kind
    return "any"


# The numbers, codes and names a question gives: a span repeating them has not yet answered it.
_GIVEN = re.compile(r"[\w.-]*\d[\w.-]*|(?<=\w[\s,;:(])[A-Z][\w-]+")


def given_values(question: str) -> re.Pattern[str] | None:
    """A pattern of the numbers, codes and names ``question`` itself gives ("75 kg", "E-21",
    "Ridgeline"), or None when it gives none."""
    values = {match.group(0).strip(".-") for match in _GIVEN.finditer(question)}
    values.discard("")
    if not values:
        return None
    alternatives = "|".join(re.escape(v) for v in sorted(values, key=len, reverse=True))
    return re.compile(rf"(?<![\w-])(?:{alternatives})(?![\w-]|[.,]\d)")


_COUNTED = re.compile(r"\bhow many\s+([\w-]+)", re.IGNORECASE)


def counted_noun(question: str) -> str | None:
    """What a "how many" question counts, by the word that follows it ("how many passengers",
    "how many charge cycles"): a number answers it only beside that word, for "about 83,000
    pounds" counts no passengers."""
    found = _COUNTED.search(question)
    if found is None or found.group(1).casefold() in QUESTION_WORDS:
        return None
    return found.group(1)


def holds_type(kind: AnswerType, text: str, given: re.Pattern[str] | None = None) -> bool:
    """Whether ``text`` holds what a question of ``kind`` asks for, beyond the values the
    question gives (``given``, from ``given_values``): a span that only repeats the question's
    "75 kg" or "Ridgeline" holds no answer."""
    if given is not None:
        text = given.sub(" ", text)
    if kind == "money":
        return bool(_MONEY.search(text))
    if kind == "duration":
        return bool(_DURATION.search(text))
    if kind in ("count", "quantity"):
        return bool(_NUMBER.search(text))
    if kind == "date":
        return bool(_DATE.search(text) or _DURATION.search(text))
    if kind == "name":
        return bool(_CODE.search(text) or _NAME.search(text) or _NUMBER.search(text))
    return False


def literal_entities(text: str) -> frozenset[Entity]:
    """Years and codes, which every collection writes the same way."""
    found = {Entity(YEAR_KIND, year) for year in _YEAR.findall(text)}
    for code in _UPPER_CODE.findall(text):
        if _YEAR.fullmatch(code):
            continue
        # "E-21" and "E-14" are of one kind, "TW-S4" and "TW-S3" of another.
        kind = re.split(r"\d", code, maxsplit=1)[0].rstrip("-")
        found.add(Entity(CODE_KIND_PREFIX + kind, code))
    return frozenset(found)


# Words that frame a question rather than say what it is about (common practice in question
# answering: "wh-" words, auxiliaries, pronouns, and the measuring words of "how much/long"),
# and the light verbs of English ("does it take", "should I run", "do they use"), which carry
# the question's grammar while its nouns carry what it asks about.
_QUESTION_WORD_TEXT = (
    "a about after an and any are as at be been before by can could did do does for from"
    " get had has have how i if in into is it its me much many my long often far of on or"
    " our should so than that the their them there these they this those to too up us was"
    " we were what when where which who whom whose why will with would you your"
    " take takes took taken use uses used need needs run runs give gives make makes keep"
    " keeps kept go goes put puts come comes got gets"
)
QUESTION_WORDS = frozenset(_QUESTION_WORD_TEXT.split())
_QUESTION_WORD = re.compile(r"[\w'-]+")


def content_words(question: str) -> str:
    """The question without its framing words: what its terms should be weighed on."""
    return " ".join(
        word for word in _QUESTION_WORD.findall(question) if word.casefold() not in QUESTION_WORDS
    )


_PROPER_WORD = re.compile(r"(?<=[\w,;:)] )[A-Z][a-z]\w*")


def proper_words(question: str) -> list[str]:
    """Capitalised words inside the question (not its first word): names of places, makers,
    models, which a collection that never mentions them cannot be asked about."""
    return _PROPER_WORD.findall(question)


def conflicting(named: Iterable[Entity], wanted: Iterable[Entity]) -> frozenset[Entity]:
    """Entities in ``named`` of a kind ``wanted`` has, when none of that kind's wanted values
    is named: "2023" in a span answering about 2024, "E-14" for a question about "E-21"."""
    named_set = frozenset(named)
    wanted_by_kind: dict[str, set[str]] = {}
    for entity in wanted:
        wanted_by_kind.setdefault(entity.kind, set()).add(entity.value)
    conflicts = set()
    for entity in named_set:
        values = wanted_by_kind.get(entity.kind)
        if (
            values
            and entity.value not in values
            and not any(Entity(entity.kind, value) in named_set for value in values)
        ):
            conflicts.add(entity)
    return frozenset(conflicts)
