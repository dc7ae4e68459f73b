"""The typed syntax tree that both filter encodings parse into and both engines evaluate.

Nodes are frozen dataclasses so a tree can be hashed, compared and shared between requests.
``AND`` and ``OR`` are n-ary and never directly contain a node of their own kind: the parser
flattens them because they are associative, which also keeps the cql2-json output identical
to other implementations of the standard.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from enum import StrEnum


class ComparisonOp(StrEnum):
    EQ = "="
    NE = "<>"
    LT = "<"
    LE = "<="
    GT = ">"
    GE = ">="


class TemporalOp(StrEnum):
    """Temporal relations of OGC 21-065 clause 9 (after Allen's interval algebra).

    Values are the cql2-json spellings; the text encoding matches them case-insensitively.
    """

    AFTER = "t_after"
    BEFORE = "t_before"
    DISJOINT = "t_disjoint"
    EQUALS = "t_equals"
    INTERSECTS = "t_intersects"
    CONTAINS = "t_contains"
    DURING = "t_during"
    FINISHES = "t_finishes"
    FINISHEDBY = "t_finishedBy"
    MEETS = "t_meets"
    METBY = "t_metBy"
    OVERLAPS = "t_overlaps"
    OVERLAPPEDBY = "t_overlappedBy"
    STARTS = "t_starts"
    STARTEDBY = "t_startedBy"


# The standard defines these only between intervals; an instant there is a type error.
INTERVAL_ONLY_OPS = frozenset(
    {
        TemporalOp.CONTAINS,
        TemporalOp.DURING,
        TemporalOp.FINISHES,
        TemporalOp.FINISHEDBY,
        TemporalOp.MEETS,
        TemporalOp.METBY,
        TemporalOp.OVERLAPS,
        TemporalOp.OVERLAPPEDBY,
        TemporalOp.STARTS,
        TemporalOp.STARTEDBY,
    }
)


class ArrayOp(StrEnum):
    CONTAINS = "a_contains"
    CONTAINEDBY = "a_containedBy"
    OVERLAPS = "a_overlaps"
    EQUALS = "a_equals"


# Scalar expressions ------------------------------------------------------------------------


@dataclass(frozen=True)
class Property:
    name: str


@dataclass(frozen=True)
class StringLiteral:
    value: str


@dataclass(frozen=True)
class NumberLiteral:
    """``int`` when written without a fraction or exponent, so 2^53 checks stay exact."""

    value: int | float


@dataclass(frozen=True)
class BooleanLiteral:
    value: bool


@dataclass(frozen=True)
class DateLiteral:
    value: dt.date


@dataclass(frozen=True)
class TimestampLiteral:
    """Always UTC-aware."""

    value: dt.datetime


@dataclass(frozen=True)
class OpenEnd:
    """The ``'..'`` end of an interval."""


@dataclass(frozen=True)
class IntervalLiteral:
    start: IntervalEnd
    end: IntervalEnd


@dataclass(frozen=True)
class ArrayLiteral:
    items: tuple[Expression, ...]


@dataclass(frozen=True)
class CaseInsensitive:
    arg: Expression


@dataclass(frozen=True)
class AccentInsensitive:
    arg: Expression


IntervalEnd = DateLiteral | TimestampLiteral | Property | OpenEnd
Literal = StringLiteral | NumberLiteral | BooleanLiteral | DateLiteral | TimestampLiteral
Expression = (
    Property | Literal | IntervalLiteral | ArrayLiteral | CaseInsensitive | AccentInsensitive
)


# Predicates --------------------------------------------------------------------------------


@dataclass(frozen=True)
class And:
    args: tuple[Node, ...]


@dataclass(frozen=True)
class Or:
    args: tuple[Node, ...]


@dataclass(frozen=True)
class Not:
    arg: Node


@dataclass(frozen=True)
class Comparison:
    op: ComparisonOp
    left: Expression
    right: Expression


@dataclass(frozen=True)
class Like:
    value: Expression
    pattern: Expression


@dataclass(frozen=True)
class Between:
    value: Expression
    low: Expression
    high: Expression


@dataclass(frozen=True)
class In:
    value: Expression
    items: tuple[Expression, ...]


@dataclass(frozen=True)
class IsNull:
    value: Expression


@dataclass(frozen=True)
class TemporalPredicate:
    op: TemporalOp
    left: Expression
    right: Expression


@dataclass(frozen=True)
class ArrayPredicate:
    op: ArrayOp
    left: Expression
    right: Expression


@dataclass(frozen=True)
class BooleanConstant:
    """A bare ``TRUE`` or ``FALSE`` used as a whole condition."""

    value: bool


Node = (
    And
    | Or
    | Not
    | Comparison
    | Like
    | Between
    | In
    | IsNull
    | TemporalPredicate
    | ArrayPredicate
    | BooleanConstant
)


def conjunction(args: list[Node] | tuple[Node, ...]) -> Node:
    """AND of ``args`` with nested ANDs flattened; a single argument stands alone."""
    flat: list[Node] = []
    for arg in args:
        flat.extend(arg.args if isinstance(arg, And) else (arg,))
    return flat[0] if len(flat) == 1 else And(tuple(flat))


def disjunction(args: list[Node] | tuple[Node, ...]) -> Node:
    """OR of ``args`` with nested ORs flattened; a single argument stands alone."""
    flat: list[Node] = []
    for arg in args:
        flat.extend(arg.args if isinstance(arg, Or) else (arg,))
    return flat[0] if len(flat) == 1 else Or(tuple(flat))


def properties_of(expression: Expression | IntervalEnd) -> list[str]:
    """Attribute names an expression reads, in order of appearance, without repeats."""
    names: list[str] = []

    def walk(item: Expression | IntervalEnd) -> None:
        if isinstance(item, Property):
            if item.name not in names:
                names.append(item.name)
        elif isinstance(item, CaseInsensitive | AccentInsensitive):
            walk(item.arg)
        elif isinstance(item, IntervalLiteral):
            walk(item.start)
            walk(item.end)
        elif isinstance(item, ArrayLiteral):
            for element in item.items:
                walk(element)

    walk(expression)
    return names
