"""Times and numbers in a question, with the comparison words around them.

Times become half-open UTC ranges ``[start, stop)`` (either end may be open), or, for "the
last six months" and the like, an ISO 8601 duration that the time-window arithmetic resolves
against ``now``. Calendar periods are UTC calendar days, months, quarters and years. A bare
year is left to the numbers, because it may be a model year as much as a date.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from service.attributes import MAX_SAFE_INTEGER
from service.filters.inference.lexicon import UNIT_WORDS
from service.filters.inference.words import Word, number_at
from service.filters.time_window import window_start

MONTHS: Mapping[str, int] = {
    "january": 1, "jan": 1, "february": 2, "feb": 2, "march": 3, "mar": 3, "april": 4,
    "apr": 4, "may": 5, "june": 6, "jun": 6, "july": 7, "jul": 7, "august": 8, "aug": 8,
    "september": 9, "sep": 9, "sept": 9, "october": 10, "oct": 10, "november": 11, "nov": 11,
    "december": 12, "dec": 12,
}  # fmt: skip
_DURATION_UNITS: Mapping[str, str] = {
    "day": "D", "days": "D", "week": "W", "weeks": "W", "fortnight": "2W", "month": "M",
    "months": "M", "quarter": "3M", "quarters": "3M", "year": "Y", "years": "Y",
}  # fmt: skip
_FIRST_YEAR, _LAST_YEAR = 1900, 2100

# Words that put a time or a number in relation to what follows them.
_SINCE = frozenset({"since"})
_AFTER = frozenset({"after"})
_BEFORE = frozenset({"before", "prior"})
_UNTIL = frozenset({"until", "till", "through", "thru"})
# "from 2019" alone names the period ("the policy from 2019"); "from 2019 onwards" or
# "from 2019 to 2021" say more, and the words after the period decide.
_WITHIN = frozenset({"in", "during", "on", "of", "from"})
_RANGE_JOINS = frozenset({"and", "to", "until", "till", "through"})
_TIME_WORDS = _SINCE | _AFTER | _BEFORE | _UNTIL | _WITHIN | {"between"}

# Comparison phrases before a number (folded words) and the operator each gives.
_BEFORE_NUMBER: tuple[tuple[tuple[str, ...], str], ...] = tuple(
    sorted(
        {
            ("at", "least"): ">=", ("no", "less", "than"): ">=", ("not", "less", "than"): ">=",
            ("no", "fewer", "than"): ">=", ("since",): ">=", ("from",): "=",
            ("more", "than"): ">", ("over",): ">", ("above",): ">", ("greater", "than"): ">",
            ("higher", "than"): ">", ("larger", "than"): ">", ("bigger", "than"): ">",
            ("heavier", "than"): ">", ("longer", "than"): ">", ("after",): ">",
            ("newer", "than"): ">", ("later", "than"): ">", ("exceeding",): ">",
            ("beyond",): ">", ("more", "expensive", "than"): ">", ("dearer", "than"): ">",
            ("at", "most"): "<=", ("no", "more", "than"): "<=", ("not", "more", "than"): "<=",
            ("up", "to"): "<=", ("until",): "<=", ("till",): "<=", ("through",): "<=",
            ("less", "than"): "<", ("fewer", "than"): "<", ("under",): "<", ("below",): "<",
            ("lower", "than"): "<", ("smaller", "than"): "<", ("lighter", "than"): "<",
            ("shorter", "than"): "<", ("before",): "<", ("cheaper", "than"): "<",
            ("older", "than"): "<", ("earlier", "than"): "<", ("less", "expensive", "than"): "<",
            ("prior", "to"): "<", ("in",): "=", ("during",): "=",
        }.items(),
        key=lambda item: -len(item[0]),
    )
)  # fmt: skip
_AFTER_NUMBER: tuple[tuple[tuple[str, ...], str], ...] = tuple(
    sorted(
        {
            ("or", "more"): ">=", ("or", "above"): ">=", ("or", "higher"): ">=",
            ("or", "later"): ">=", ("or", "newer"): ">=", ("and", "up"): ">=",
            ("and", "above"): ">=", ("and", "later"): ">=", ("and", "newer"): ">=",
            ("onwards",): ">=", ("onward",): ">=", ("or", "over"): ">=",
            ("or", "less"): "<=", ("or", "fewer"): "<=", ("or", "below"): "<=",
            ("or", "lower"): "<=", ("or", "earlier"): "<=", ("or", "older"): "<=",
            ("and", "earlier"): "<=", ("and", "older"): "<=", ("and", "below"): "<=",
            ("or", "under"): "<=",
        }.items(),
        key=lambda item: -len(item[0]),
    )
)  # fmt: skip
_NEGATIONS = frozenset({"not", "except", "excluding", "without", "besides", "but"})
_NEGATION_PAIRS = frozenset({("other", "than"), ("apart", "from"), ("aside", "from")})
_SKIPPABLE = frozenset(
    {
        "the",
        "a",
        "an",
        "my",
        "our",
        "your",
        "their",
        "its",
        "any",
        "for",
        "of",
        "on",
        "about",
        "from",
    }
)


@dataclass(frozen=True, slots=True)
class TimeMention:
    first: int
    last: int
    start: dt.datetime | None
    stop: dt.datetime | None
    """Exclusive end; None when open (or when ``through_now``)."""
    through_now: bool = False
    duration: str | None = None
    """An ISO 8601 duration back from ``now`` ("last six months"), else None."""
    how: str = "date"


@dataclass(frozen=True, slots=True)
class NumberMention:
    first: int
    last: int
    value: int | float
    high: int | float | None
    """The upper end of "between 2 and 5" / "from 2 to 5" (op ``between``)."""
    op: str
    unit: str | None
    year_shaped: bool
    time_word: bool
    """Preceded by a word that usually introduces a time (since, before, in, ...)."""
    number_first: int
    number_last: int


def negated(words: Sequence[Word], first: int) -> bool:
    """Whether a negation stands just before ``words[first]`` (articles may come between)."""
    position = first - 1
    while position >= 0 and words[position].folded in _SKIPPABLE:
        position -= 1
    if position < 0:
        return False
    if words[position].folded in _NEGATIONS:
        return True
    return position >= 1 and (words[position - 1].folded, words[position].folded) in _NEGATION_PAIRS


# times ------------------------------------------------------------------------------------


def _utc(year: int, month: int = 1, day: int = 1) -> dt.datetime:
    return dt.datetime(year, month, day, tzinfo=dt.UTC)


def _next_month(moment: dt.datetime, months: int = 1) -> dt.datetime:
    index = moment.year * 12 + moment.month - 1 + months
    return _utc(index // 12, index % 12 + 1)


def _year_word(word: Word) -> int | None:
    if word.folded.isdigit() and len(word.folded) == 4:
        year = int(word.folded)
        if _FIRST_YEAR <= year <= _LAST_YEAR:
            return year
    return None


def _day_word(word: Word) -> int | None:
    text = word.folded
    for suffix in ("st", "nd", "rd", "th"):
        if text.endswith(suffix) and text[: -len(suffix)].isdigit():
            text = text[: -len(suffix)]
            break
    if text.isdigit() and 1 <= int(text) <= 31 and len(text) <= 2:
        return int(text)
    return None


def _valid_day(year: int, month: int, day: int) -> dt.datetime | None:
    try:
        return _utc(year, month, day)
    except ValueError:
        return None


Period = tuple[dt.datetime, dt.datetime, int, str]
"""A calendar period as read: (start, exclusive stop, its last word, how it was read)."""


def _day(moment: dt.datetime, last: int, how: str) -> Period:
    return moment, moment + dt.timedelta(days=1), last, how


def _month(year: int, month: int, last: int, how: str) -> Period:
    start = _utc(year, month)
    return start, _next_month(start), last, how


def _iso_period(words: Sequence[Word], i: int) -> Period | None:
    """2024-03-15 or 2024-03."""
    year = _year_word(words[i])
    if year is None or i + 1 >= len(words) or words[i + 1].gap != "-":
        return None
    month_text = words[i + 1].folded
    if len(month_text) != 2 or not month_text.isdigit() or not 1 <= int(month_text) <= 12:
        return None
    month = int(month_text)
    if i + 2 < len(words) and words[i + 2].gap == "-":
        day_text = words[i + 2].folded
        moment = (
            _valid_day(year, month, int(day_text))
            if len(day_text) == 2 and day_text.isdigit()
            else None
        )
        if moment is not None:
            return _day(moment, i + 2, "ISO 8601 date")
    return _month(year, month, i + 1, "ISO 8601 month")


def _day_first(words: Sequence[Word], i: int) -> Period | None:
    """15 March 2024, the 15th of March 2024."""
    day = _day_word(words[i])
    j = i + 1
    if day is None or j >= len(words):
        return None
    if words[j].folded == "of":
        j += 1
    if j + 1 >= len(words):
        return None
    month = MONTHS.get(words[j].folded)
    year = _year_word(words[j + 1])
    moment = None if month is None or year is None else _valid_day(year, month, day)
    return None if moment is None else _day(moment, j + 1, "date")


def _month_first(
    words: Sequence[Word], i: int, now: dt.datetime, bare_month: bool
) -> Period | None:
    """March 15, 2024; March 2024; and, when ``bare_month``, March alone."""
    month = MONTHS.get(words[i].folded)
    if month is None:
        return None
    if i + 2 < len(words):
        day = _day_word(words[i + 1])
        year = _year_word(words[i + 2])
        moment = None if day is None or year is None else _valid_day(year, month, day)
        if moment is not None:
            return _day(moment, i + 2, "date")
    if i + 1 < len(words):
        year = _year_word(words[i + 1])
        if year is not None:
            return _month(year, month, i + 1, "month")
    if bare_month:
        latest_year = now.year if month <= now.month else now.year - 1
        return _month(latest_year, month, i, "month, the latest one up to now")
    return None


def _period_at(
    words: Sequence[Word], i: int, now: dt.datetime, *, bare_month: bool
) -> Period | None:
    """A calendar period written at ``words[i]``.

    Years alone are not read here; a month without a year only when ``bare_month`` (after
    "since", "last" and the like), as the latest such month not after ``now``.
    """
    word = words[i].folded
    if word in ("q1", "q2", "q3", "q4") and i + 1 < len(words):
        year = _year_word(words[i + 1])
        if year is not None:
            start = _utc(year, 3 * int(word[1]) - 2)
            return start, _next_month(start, 3), i + 1, "quarter"
    return _iso_period(words, i) or _day_first(words, i) or _month_first(words, i, now, bare_month)


def _duration_at(words: Sequence[Word], i: int) -> tuple[str, int] | None:
    """``N units`` or ``unit`` at ``words[i]`` as an ISO 8601 duration and its last word."""
    count: int | float = 1
    j = i
    number = number_at(words, i)
    if number is not None:
        count, j = number[0], number[1] + 1
    if j >= len(words) or not isinstance(count, int) or not 0 < count <= 10_000:
        return None
    unit = _DURATION_UNITS.get(words[j].folded)
    if unit is None:
        return None
    if unit[0].isdigit():
        return f"P{count * int(unit[:-1])}{unit[-1]}", j
    return f"P{count}{unit}", j


def _calendar_unit(unit: str, now: dt.datetime, back: int) -> tuple[dt.datetime, dt.datetime]:
    """The calendar year, month or ISO week ``back`` units before the one holding ``now``."""
    if unit in ("year", "years"):
        start = _utc(now.year - back)
        return start, _utc(start.year + 1)
    if unit in ("month", "months"):
        current = _utc(now.year, now.month)
        start = _next_month(current, -back)
        return start, _next_month(start)
    monday = _utc(now.year, now.month, now.day) - dt.timedelta(days=now.weekday())
    start = monday - dt.timedelta(weeks=back)
    return start, start + dt.timedelta(weeks=1)


def find_times(words: Sequence[Word], taken: Sequence[bool], now: dt.datetime) -> list[TimeMention]:
    """Every time expression among the words not ``taken``, left to right."""
    found: list[TimeMention] = []
    i = 0
    n = len(words)
    while i < n:
        mention = None if taken[i] else _time_at(words, taken, i, now)
        if mention is None:
            i += 1
            continue
        found.append(mention)
        i = mention.last + 1
    return found


def _free(taken: Sequence[bool], first: int, last: int) -> bool:
    return not any(taken[first : last + 1])


def _time_at(
    words: Sequence[Word], taken: Sequence[bool], i: int, now: dt.datetime
) -> TimeMention | None:
    """The time expression starting at ``words[i]``; None also when it falls outside the
    calendar (years 1 to 9999) from this ``now``."""
    try:
        return _time_from(words, taken, i, now)
    except (ValueError, OverflowError):
        return None


def _time_from(
    words: Sequence[Word], taken: Sequence[bool], i: int, now: dt.datetime
) -> TimeMention | None:
    n = len(words)
    word = words[i].folded
    # "in the last 30 days", "over the past year", "within the previous six months"
    j = i
    if word in ("in", "within", "over", "during", "for") and j + 1 < n:
        j += 1
    has_the = j < n and words[j].folded == "the"
    if has_the:
        j += 1
    if j < n and words[j].folded in ("last", "past", "previous", "recent") and j + 1 < n:
        duration = _duration_at(words, j + 1)
        if duration is not None and _free(taken, i, duration[1]):
            text, last = duration
            counted = last > j + 1
            calendar = words[j].folded in ("last", "previous") and not has_the and not counted
            if calendar and words[last].folded in ("year", "month", "week"):
                start, stop = _calendar_unit(words[last].folded, now, 1)
                return TimeMention(
                    i, last, start, stop, how=f"the previous calendar {words[last].folded}"
                )
            window_start(text, now)  # raises when the window reaches before year 1
            return TimeMention(
                i, last, None, None, duration=text, how="relative time, back from now"
            )
    # "this year", "this month", "this week"
    if word == "this" and i + 1 < n and words[i + 1].folded in ("year", "month", "week"):
        start, _ = _calendar_unit(words[i + 1].folded, now, 0)
        return TimeMention(
            i, i + 1, start, None, through_now=True, how=f"this calendar {words[i + 1].folded}"
        )
    # since / after / before / until / in + a period, or between/from + a period and another
    lead = word
    j = i + 1 if lead in _TIME_WORDS else i
    if lead == "prior" and j < n and words[j].folded == "to":
        j += 1
    if j >= n:
        return None
    after_last = j < n and words[j].folded in ("last", "this")
    k = j + 1 if after_last else j
    if k >= n:
        return None
    period = _period_at(words, k, now, bare_month=j > i or after_last)
    if period is None:
        return None
    start, stop, last, how = period
    if after_last and words[j].folded == "last" and how.startswith("month, the latest"):
        # "last March" is the latest March before the current month
        if start.month == now.month and start.year == now.year:
            start, stop = (
                _utc(start.year - 1, start.month),
                _next_month(_utc(start.year - 1, start.month)),
            )
        how = "month, the latest one before this month"
    if (
        last + 2 < n
        and words[last + 1].folded in _RANGE_JOINS
        and lead in ("between", "from", *_SINCE, *_WITHIN)
    ):
        second = _period_at(words, last + 2, now, bare_month=False)
        if second is not None and how.startswith("month, the latest"):
            # "between January and June 2023": the first month takes the second one's year
            year = second[0].year - (start.month > second[0].month)
            start, how = _utc(year, start.month), "month"
        if second is not None and second[0] >= start:
            return TimeMention(i, second[2], start, second[1], how=f"{how} to {second[3]}")
    following = _phrase_after(words, last + 1)
    if following is not None and lead not in (_SINCE | _AFTER | _BEFORE | _UNTIL):
        # "March 2024 onwards", "2023-06 or earlier"
        lead = "since" if following[0] == ">=" else "until"
        last = following[1]
    if not _free(taken, i, last):
        return None
    if lead in _SINCE:
        return TimeMention(i, last, start, None, how=f"{how}, from its start")
    if lead in _AFTER:
        return TimeMention(i, last, stop, None, how=f"{how}, after its end")
    if lead in _BEFORE:
        return TimeMention(i, last, None, start, how=f"{how}, before its start")
    if lead in _UNTIL:
        return TimeMention(i, last, None, stop, how=f"{how}, up to its end")
    return TimeMention(i, last, start, stop, how=how)


# numbers ----------------------------------------------------------------------------------


def _indexed(
    phrases: tuple[tuple[tuple[str, ...], str], ...], at: int
) -> dict[str, list[tuple[tuple[str, ...], str]]]:
    """The phrases by their word at ``at`` (0 the first, -1 the last), longest first."""
    index: dict[str, list[tuple[tuple[str, ...], str]]] = {}
    for phrase, op in phrases:
        index.setdefault(phrase[at], []).append((phrase, op))
    return index


_BEFORE_BY_LAST = _indexed(_BEFORE_NUMBER, -1)
_AFTER_BY_FIRST = _indexed(_AFTER_NUMBER, 0)


def _phrase_before(words: Sequence[Word], end: int) -> tuple[str, int] | None:
    """The comparison phrase ending at ``words[end]``: its operator and its first word."""
    for phrase, op in _BEFORE_BY_LAST.get(words[end].folded, ()):
        first = end - len(phrase) + 1
        if first >= 0 and tuple(w.folded for w in words[first : end + 1]) == phrase:
            return op, first
    return None


def _phrase_after(words: Sequence[Word], start: int) -> tuple[str, int] | None:
    if start >= len(words):
        return None
    for phrase, op in _AFTER_BY_FIRST.get(words[start].folded, ()):
        last = start + len(phrase) - 1
        if last < len(words) and tuple(w.folded for w in words[start : last + 1]) == phrase:
            return op, last
    return None


def _unit_after(text: str, words: Sequence[Word], last: int) -> tuple[str, int] | None:
    """The unit written right after a number (a word or a symbol such as % or the euro sign)."""
    following = words[last + 1] if last + 1 < len(words) else None
    gap = following.gap if following is not None else text[words[last].end :]
    symbol = gap.strip()[:1]
    if symbol and symbol in UNIT_WORDS:
        return UNIT_WORDS[symbol], last
    if following is None:
        return None
    if following.folded in UNIT_WORDS:
        return UNIT_WORDS[following.folded], last + 1
    if last + 2 < len(words) and f"{following.folded}-{words[last + 2].folded}" in UNIT_WORDS:
        return UNIT_WORDS[f"{following.folded}-{words[last + 2].folded}"], last + 2
    return None


def _unit_before(words: Sequence[Word], first: int) -> str | None:
    symbol = words[first].gap.strip()
    return UNIT_WORDS.get(symbol) if symbol else None


def find_numbers(text: str, words: Sequence[Word], taken: Sequence[bool]) -> list[NumberMention]:
    """Every number among the words not ``taken``, with its comparison and unit."""
    found: list[NumberMention] = []
    i = 0
    n = len(words)
    while i < n:
        parsed = None if taken[i] else number_at(words, i)
        if parsed is None or not _free(taken, i, parsed[1]):
            i += 1
            continue
        value, number_last = parsed
        if abs(value) > MAX_SAFE_INTEGER:
            i = number_last + 1  # beyond what a filter compares exactly
            continue
        unit = _unit_before(words, i)
        last = number_last
        unit_after = _unit_after(text, words, number_last)
        if unit_after is not None:
            unit, last = unit_after
        op, first = "=", i
        before = _phrase_before(words, i - 1) if i > 0 else None
        if before is not None and _free(taken, before[1], i - 1):
            op, first = before
        elif i > 0 and words[i - 1].folded == "between" and not taken[i - 1]:
            first = i - 1
        lead = words[first].folded if first < i else ""
        high: int | float | None = None
        # between 2 and 5, from 2022 to 2024, 2022-2024
        join = last + 1
        ranged = join < n and (
            (words[join].folded in _RANGE_JOINS and lead in ("between", "from"))
            or (join == number_last + 1 and words[join].gap == "-" and not lead)
        )
        if ranged:
            start_second = join + 1 if words[join].folded in _RANGE_JOINS else join
            second = number_at(words, start_second) if start_second < n else None
            if second is not None and value <= second[0] <= MAX_SAFE_INTEGER:
                high, number_last = second
                last = number_last
                second_unit = _unit_after(text, words, number_last)
                if second_unit is not None:
                    unit, last = second_unit
                op = "between"
        if op == "=" and lead == "between":
            first = i
        if op == "=":
            after = _phrase_after(words, last + 1)
            if after is not None and _free(taken, last + 1, after[1]):
                op, last = after
        year_shaped = (
            isinstance(value, int)
            and unit is None
            and _FIRST_YEAR <= value <= _LAST_YEAR
            and len(words[i].folded) == 4
        )
        time_word = i > 0 and words[i - 1].folded in _TIME_WORDS
        found.append(
            NumberMention(
                first=first,
                last=last,
                value=value,
                high=high,
                op=op,
                unit=unit,
                year_shaped=year_shaped,
                time_word=time_word,
                number_first=i,
                number_last=number_last,
            )
        )
        i = last + 1
    return found
