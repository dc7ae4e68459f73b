"""The type checker: a parsed filter against a collection schema (OGC 21-065 clause 6).

Engines only ever see trees that passed here, so they may assume every predicate reads at
least one attribute, literals fit the attribute's type, and temporal kinds agree.
"""

from __future__ import annotations

from enum import Enum

from service.attributes import MAX_SAFE_INTEGER, AttributeType, Schema
from service.errors import FilterTypeError, FilterUnknownAttribute
from service.filters.syntax import (
    INTERVAL_ONLY_OPS,
    AccentInsensitive,
    And,
    ArrayLiteral,
    ArrayPredicate,
    Between,
    BooleanConstant,
    BooleanLiteral,
    CaseInsensitive,
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
    TemporalPredicate,
    TimestampLiteral,
    properties_of,
)
from service.filters.text_forms import unwrap


class Kind(Enum):
    KEYWORD = "keyword"
    KEYWORD_LIST = "keyword[]"
    NUMBER = "number"
    BOOLEAN = "boolean"
    DATE = "date"
    DATETIME = "datetime"
    INTERVAL = "interval"
    ARRAY = "array"


_ATTRIBUTE_KINDS = {
    AttributeType.KEYWORD: Kind.KEYWORD,
    AttributeType.KEYWORD_LIST: Kind.KEYWORD_LIST,
    AttributeType.INTEGER: Kind.NUMBER,
    AttributeType.NUMBER: Kind.NUMBER,
    AttributeType.BOOLEAN: Kind.BOOLEAN,
    AttributeType.DATE: Kind.DATE,
    AttributeType.DATETIME: Kind.DATETIME,
}

ARRAY_HINT = "use A_CONTAINS, A_CONTAINEDBY, A_OVERLAPS or A_EQUALS on a keyword[] attribute"


def check_filter(node: Node, schema: Schema) -> Node:
    """Return ``node`` unchanged when it fits ``schema``; raise a ``filter_*`` error if not."""
    _Checker(schema).predicate(node)
    return node


class _Checker:
    def __init__(self, schema: Schema) -> None:
        self.schema = schema

    # expressions

    def kind(self, expression: Expression | IntervalEnd) -> Kind:
        if isinstance(expression, Property):
            if expression.name not in self.schema:
                known = sorted(self.schema)
                listing = ", ".join(known) if known else "none"
                raise FilterUnknownAttribute(
                    f"the collection has no attribute {expression.name!r};"
                    f" its attributes are: {listing}",
                    known=known,
                )
            return _ATTRIBUTE_KINDS[self.schema[expression.name]]
        if isinstance(expression, StringLiteral):
            return Kind.KEYWORD
        if isinstance(expression, BooleanLiteral):
            return Kind.BOOLEAN
        if isinstance(expression, NumberLiteral):
            value = expression.value
            if isinstance(value, int) and abs(value) > MAX_SAFE_INTEGER:
                raise FilterTypeError(
                    f"the integer {value} is beyond 2^53 - 1 in magnitude and cannot be"
                    " compared exactly"
                )
            return Kind.NUMBER
        if isinstance(expression, DateLiteral):
            return Kind.DATE
        if isinstance(expression, TimestampLiteral):
            return Kind.DATETIME
        if isinstance(expression, IntervalLiteral):
            self.interval_kind(expression)
            return Kind.INTERVAL
        if isinstance(expression, ArrayLiteral):
            for item in expression.items:
                self.kind(item)
            return Kind.ARRAY
        if isinstance(expression, CaseInsensitive | AccentInsensitive):
            inner_kind = self.kind(expression.arg)
            if inner_kind is not Kind.KEYWORD:
                function = "CASEI" if isinstance(expression, CaseInsensitive) else "ACCENTI"
                raise FilterTypeError(
                    f"{function} applies to keyword attributes and strings, not to"
                    f" {_describe(expression.arg, inner_kind)}"
                )
            return Kind.KEYWORD
        return Kind.INTERVAL  # an open end, only ever met inside an interval

    def interval_kind(self, interval: IntervalLiteral) -> Kind | None:
        """DATE or DATETIME for the interval's ends; None when both ends are open."""
        kinds: set[Kind] = set()
        for end in (interval.start, interval.end):
            if isinstance(end, OpenEnd):
                continue
            end_kind = self.kind(end)
            if end_kind not in (Kind.DATE, Kind.DATETIME):
                raise FilterTypeError(
                    f"an interval end must be a date or datetime, not {_describe(end, end_kind)}"
                )
            kinds.add(end_kind)
        if len(kinds) > 1:
            raise FilterTypeError("an interval cannot mix a date end with a timestamp end")
        start, end = interval.start, interval.end
        if (
            isinstance(start, DateLiteral | TimestampLiteral)
            and type(start) is type(end)
            and isinstance(end, DateLiteral | TimestampLiteral)
            and start.value > end.value
        ):
            raise FilterTypeError("the interval starts after it ends")
        return kinds.pop() if kinds else None

    def time_kind(self, expression: Expression) -> tuple[Kind | None, bool]:
        """(DATE/DATETIME/None, is_interval) of a temporal function argument."""
        if isinstance(expression, IntervalLiteral):
            return self.interval_kind(expression), True
        kind = self.kind(expression)
        if kind not in (Kind.DATE, Kind.DATETIME):
            raise FilterTypeError(
                "temporal functions take dates, timestamps and intervals, not"
                f" {_describe(expression, kind)}"
            )
        return kind, False

    # predicates

    def predicate(self, node: Node) -> None:
        if isinstance(node, And | Or):
            for arg in node.args:
                self.predicate(arg)
        elif isinstance(node, Not):
            self.predicate(node.arg)
        elif isinstance(node, BooleanConstant):
            return
        elif isinstance(node, Comparison):
            self.comparison(node)
        elif isinstance(node, Like):
            self.like(node)
        elif isinstance(node, Between):
            self.between(node)
        elif isinstance(node, In):
            self.in_list(node)
        elif isinstance(node, IsNull):
            if not isinstance(node.value, Property):
                raise FilterTypeError("IS NULL applies to an attribute")
            self.kind(node.value)
        elif isinstance(node, TemporalPredicate):
            self.temporal(node)
        else:
            self.array(node)

    def needs_attribute(self, expressions: list[Expression], what: str) -> None:
        if not any(properties_of(e) for e in expressions):
            raise FilterTypeError(f"{what} compares only literals; name an attribute")

    def comparison(self, node: Comparison) -> None:
        self.needs_attribute([node.left, node.right], "this comparison")
        left, right = self.kind(node.left), self.kind(node.right)
        if Kind.KEYWORD_LIST in (left, right):
            raise FilterTypeError(
                f"{node.op.value} does not apply to a keyword[] value; {ARRAY_HINT}"
            )
        self.compatible(node.left, left, node.right, right, node.op.value)
        if left is Kind.BOOLEAN and node.op not in (ComparisonOp.EQ, ComparisonOp.NE):
            raise FilterTypeError("booleans are compared only with = and <>")
        if left in (Kind.INTERVAL, Kind.ARRAY):
            raise FilterTypeError(
                f"{node.op.value} compares single values; use the T_ functions for intervals"
                " and the A_ functions for arrays"
            )

    def compatible(
        self, left: Expression, left_kind: Kind, right: Expression, right_kind: Kind, op: str
    ) -> None:
        if left_kind is right_kind:
            return
        kinds = {left_kind, right_kind}
        if kinds == {Kind.DATE, Kind.DATETIME}:
            date_side = left if left_kind is Kind.DATE else right
            if isinstance(date_side, DateLiteral):
                raise FilterTypeError(
                    "a DATE compared with a datetime attribute is ambiguous; use TIMESTAMP"
                    " or an INTERVAL of timestamps"
                )
            raise FilterTypeError(
                "a date attribute is compared with DATE(...), not with a timestamp or a"
                " datetime attribute"
            )
        raise FilterTypeError(
            f"{op} cannot compare {_describe(left, left_kind)} with {_describe(right, right_kind)}"
        )

    def like(self, node: Like) -> None:
        pattern, _ = unwrap(node.pattern)
        if not isinstance(pattern, StringLiteral):
            raise FilterTypeError("the pattern of LIKE must be a string")
        self.kind(node.pattern)
        if not properties_of(node.value):
            raise FilterTypeError("LIKE compares only literals; name an attribute")
        value_kind = self.kind(node.value)
        if value_kind is Kind.KEYWORD_LIST:
            raise FilterTypeError(f"LIKE does not apply to a keyword[] value; {ARRAY_HINT}")
        if value_kind is not Kind.KEYWORD:
            raise FilterTypeError(
                f"LIKE applies to keyword attributes, not to {_describe(node.value, value_kind)}"
            )
        escaped = False
        for char in pattern.value:
            escaped = not escaped and char == "\\"
        if escaped:
            raise FilterTypeError("a LIKE pattern cannot end with the escape character \\")

    def between(self, node: Between) -> None:
        self.needs_attribute([node.value, node.low, node.high], "BETWEEN")
        kind = self.kind(node.value)
        if kind not in (Kind.NUMBER, Kind.DATE, Kind.DATETIME):
            raise FilterTypeError(
                "BETWEEN applies to numbers, dates and datetimes, not to"
                f" {_describe(node.value, kind)}"
            )
        for end in (node.low, node.high):
            self.compatible(node.value, kind, end, self.kind(end), "BETWEEN")

    def in_list(self, node: In) -> None:
        if not properties_of(node.value):
            raise FilterTypeError("IN compares only literals; name an attribute")
        kind = self.kind(node.value)
        if kind is Kind.KEYWORD_LIST:
            raise FilterTypeError(f"IN does not apply to a keyword[] value; {ARRAY_HINT}")
        if kind in (Kind.INTERVAL, Kind.ARRAY):
            raise FilterTypeError("IN compares single values")
        for item in node.items:
            if properties_of(item):
                raise FilterTypeError("the values of an IN list must be literals")
            self.compatible(node.value, kind, item, self.kind(item), "IN")

    def temporal(self, node: TemporalPredicate) -> None:
        self.needs_attribute([node.left, node.right], node.op.value.upper())
        left, left_interval = self.time_kind(node.left)
        right, right_interval = self.time_kind(node.right)
        if node.op in INTERVAL_ONLY_OPS and not (left_interval and right_interval):
            raise FilterTypeError(
                f"{node.op.value.upper()} relates two intervals; write the instant as"
                " INTERVAL(x, x)"
            )
        if left is not None and right is not None and left is not right:
            raise FilterTypeError(
                f"{node.op.value.upper()} cannot relate a date to a timestamp; a DATE compared"
                " with a datetime attribute is ambiguous, so use TIMESTAMP or an INTERVAL of"
                " timestamps"
            )

    def array(self, node: ArrayPredicate) -> None:
        name = node.op.value.upper()
        left_kind = self.kind(node.left)
        if not isinstance(node.left, Property) or left_kind is not Kind.KEYWORD_LIST:
            raise FilterTypeError(f"the first argument of {name} must be a keyword[] attribute")
        if not isinstance(node.right, ArrayLiteral):
            raise FilterTypeError(
                f"the second argument of {name} must be a list of strings, such as ('a', 'b')"
            )
        for item in node.right.items:
            if not isinstance(item, StringLiteral):
                raise FilterTypeError(
                    f"{name} compares keyword[] values with strings, not with"
                    f" {_describe(item, self.kind(item))}"
                )


def _describe(expression: Expression | IntervalEnd, kind: Kind) -> str:
    if isinstance(expression, Property):
        return f"the {kind.value} attribute {expression.name!r}"
    return {
        Kind.KEYWORD: "a string",
        Kind.NUMBER: "a number",
        Kind.BOOLEAN: "a boolean",
        Kind.DATE: "a DATE",
        Kind.DATETIME: "a TIMESTAMP",
        Kind.INTERVAL: "an INTERVAL",
        Kind.ARRAY: "an array",
        Kind.KEYWORD_LIST: "a keyword[] value",
    }[kind]
