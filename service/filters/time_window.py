"""``"time_window": {"attribute": ..., "last": "P30D", "now": ...}`` as an interval predicate."""

from __future__ import annotations

import calendar
import datetime as dt
import re
from dataclasses import dataclass

from service.attributes import AttributeType, Schema
from service.errors import InvalidRequest
from service.filters.syntax import (
    DateLiteral,
    IntervalLiteral,
    Node,
    Property,
    TemporalOp,
    TemporalPredicate,
    TimestampLiteral,
)

_DURATION = re.compile(
    r"P(?:(?P<years>\d+)Y)?(?:(?P<months>\d+)M)?(?:(?P<weeks>\d+)W)?(?:(?P<days>\d+)D)?"
    r"(?:T(?:(?P<hours>\d+)H)?(?:(?P<minutes>\d+)M)?(?:(?P<seconds>\d+(?:\.\d{1,6})?)S)?)?"
)
# Far enough for any real window, near enough that date arithmetic cannot overflow.
_MAX_PART = 10_000


@dataclass(frozen=True)
class ResolvedWindow:
    """What the trace records: the closed interval the window selected."""

    attribute: str
    last: str
    start: dt.date | dt.datetime
    end: dt.date | dt.datetime


def _months_back(moment: dt.datetime, months: int) -> dt.datetime:
    """Calendar months earlier, the day clamped to the month's length (31 Mar - 1M = 28/29 Feb)."""
    index = moment.year * 12 + moment.month - 1 - months
    year, month = divmod(index, 12)
    if year < 1:
        raise OverflowError
    day = min(moment.day, calendar.monthrange(year, month + 1)[1])
    return moment.replace(year=year, month=month + 1, day=day)


class WindowTooEarly(ValueError):
    """The window would begin before the first representable moment (year 1)."""


def window_start(last: str, now: dt.datetime) -> dt.datetime:
    """``now`` minus the ISO 8601 duration ``last``.

    Raises ``ValueError`` when ``last`` is unreadable and ``WindowTooEarly`` when the start
    would fall before year 1.
    """
    match = _DURATION.fullmatch(last)
    if match is None or last in ("P", "PT") or last.endswith("T"):
        raise ValueError(last)
    parts = {name: float(value) if value else 0.0 for name, value in match.groupdict().items()}
    if any(value > _MAX_PART for value in parts.values()):
        raise ValueError(last)
    try:
        start = _months_back(now, int(parts["years"]) * 12 + int(parts["months"]))
        return start - dt.timedelta(
            weeks=parts["weeks"],
            days=parts["days"],
            hours=parts["hours"],
            minutes=parts["minutes"],
            seconds=parts["seconds"],
        )
    except (OverflowError, ValueError):
        raise WindowTooEarly(last) from None


def resolve_time_window(
    attribute: str, last: str, now: dt.datetime | None, schema: Schema
) -> tuple[Node, ResolvedWindow]:
    """The predicate ``T_INTERSECTS(attribute, INTERVAL(now - last, now))`` and its bounds."""
    type_ = schema.get(attribute)
    if type_ not in (AttributeType.DATE, AttributeType.DATETIME):
        raise InvalidRequest(
            f"time_window needs a date or datetime attribute; {attribute!r} is "
            + ("not an attribute of the collection" if type_ is None else f"a {type_.value}"),
            field="time_window.attribute",
        )
    if now is None:
        now = dt.datetime.now(dt.UTC)
    elif now.tzinfo is None:
        raise InvalidRequest(
            "time_window.now needs a UTC offset, such as 2024-05-01T09:30:00Z",
            field="time_window.now",
        )
    now = now.astimezone(dt.UTC)
    try:
        start = window_start(last, now)
    except WindowTooEarly:
        raise InvalidRequest(
            f"time_window.now {now.isoformat()} is too early: {last} before it falls before "
            "the year 1.",
            field="time_window.now",
        ) from None
    except ValueError:
        raise InvalidRequest(
            f"time_window.last {last!r} is not an ISO 8601 duration such as P30D, PT12H or P1Y2M",
            field="time_window.last",
        ) from None
    interval: IntervalLiteral
    resolved: ResolvedWindow
    if type_ is AttributeType.DATE:
        interval = IntervalLiteral(DateLiteral(start.date()), DateLiteral(now.date()))
        resolved = ResolvedWindow(attribute, last, start.date(), now.date())
    else:
        interval = IntervalLiteral(TimestampLiteral(start), TimestampLiteral(now))
        resolved = ResolvedWindow(attribute, last, start, now)
    return TemporalPredicate(TemporalOp.INTERSECTS, Property(attribute), interval), resolved
