"""The filter tree as a SQLAlchemy Core condition over ``documents`` (same semantics as numpy).

Every predicate becomes a pair of conditions, "TRUE" and "FALSE", each an EXISTS over the
document's ``attribute_values`` rows and therefore never NULL; NOT swaps the pair, exactly as
the in-memory engine does, so SQL's own NULL logic is never relied on and unknown never
matches (OGC 21-065 clause 7.2). Every caller-written value travels as a bound parameter;
strings compare in binary collation and CASEI/ACCENTI use the forms stored at ingest.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import (
    BigInteger,
    Boolean,
    ColumnElement,
    Float,
    String,
    and_,
    exists,
    false,
    literal,
    not_,
    or_,
    select,
    true,
)
from sqlalchemy.ext.compiler import compiles
from sqlalchemy.sql.visitors import InternalTraversal

from service.attributes import AttributeType, Schema, epoch_days, epoch_micros
from service.filters.evaluate import COMPARE, OPEN_END, OPEN_START, temporal_relation
from service.filters.syntax import (
    And,
    ArrayLiteral,
    ArrayOp,
    ArrayPredicate,
    Between,
    BooleanConstant,
    BooleanLiteral,
    Comparison,
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
from service.filters.text_forms import TextMode, text_form, unwrap
from service.store.tables import AttributeValueRow, DocumentRow

_TEXT_COLUMNS = {
    TextMode(False, False): "text_value",
    TextMode(True, False): "text_folded",
    TextMode(False, True): "text_unaccented",
    TextMode(True, True): "text_folded_unaccented",
}
_VALUE_COLUMNS = {
    AttributeType.INTEGER: "real_value",
    AttributeType.NUMBER: "real_value",
    AttributeType.BOOLEAN: "bool_value",
    AttributeType.DATE: "int_value",
    AttributeType.DATETIME: "int_value",
}

Pair = tuple[ColumnElement[bool], ColumnElement[bool]]


class CaseSensitiveLike(ColumnElement[bool]):
    """``LIKE ... ESCAPE '\\'`` with case kept: SQLite's LIKE folds ASCII, so there it is GLOB.

    Both patterns are bound parameters; only the one the dialect needs is rendered.
    """

    type = Boolean()
    inherit_cache = True
    _traverse_internals = [  # noqa: RUF012 (the base class declares it this way)
        ("column", InternalTraversal.dp_clauseelement),
        ("like_pattern", InternalTraversal.dp_clauseelement),
        ("glob_pattern", InternalTraversal.dp_clauseelement),
    ]

    def __init__(self, column: ColumnElement[Any], pattern: str) -> None:
        self.column = column
        self.like_pattern = literal(pattern, String())
        self.glob_pattern = literal(_glob_pattern(pattern), String())


@compiles(CaseSensitiveLike)
def _compile_like(element: CaseSensitiveLike, compiler: Any, **kw: Any) -> str:
    return compiler.process(element.column.like(element.like_pattern, escape="\\"), **kw)


@compiles(CaseSensitiveLike, "sqlite")
def _compile_glob(element: CaseSensitiveLike, compiler: Any, **kw: Any) -> str:
    return compiler.process(element.column.op("GLOB")(element.glob_pattern), **kw)


def _glob_pattern(pattern: str) -> str:
    """A CQL2 LIKE pattern as a GLOB pattern: ``*``, ``?`` and ``[`` are put in brackets."""
    parts: list[str] = []
    escaped = False
    for char in pattern:
        if escaped:
            parts.append(f"[{char}]" if char in "*?[" else char)
            escaped = False
        elif char == "\\":
            escaped = True
        elif char == "%":
            parts.append("*")
        elif char == "_":
            parts.append("?")
        else:
            parts.append(f"[{char}]" if char in "*?[" else char)
    return "".join(parts)


def compile_filter(node: Node, schema: Schema) -> ColumnElement[bool]:
    """A condition TRUE exactly for the ``DocumentRow`` rows the checked ``node`` matches."""
    return _Compiler(schema).pair(node)[0]


class _Compiler:
    def __init__(self, schema: Schema) -> None:
        self.schema = schema

    def rows(self, names: list[str]) -> dict[str, Any]:
        return {name: AttributeValueRow.__table__.alias() for name in names}

    def exists_over(self, aliases: dict[str, Any], *conditions: Any) -> ColumnElement[bool]:
        bindings = [
            condition
            for name, alias in aliases.items()
            for condition in (alias.c.document_id == DocumentRow.id, alias.c.name == name)
        ]
        return exists(
            select(literal(1)).select_from(*aliases.values()).where(*bindings, *conditions)
        )

    def atom(self, names: list[str], build: Any) -> Pair:
        aliases = self.rows(names)
        condition = build(aliases)
        return self.exists_over(aliases, condition), self.exists_over(aliases, not_(condition))

    def pair(self, node: Node) -> Pair:
        if isinstance(node, And | Or):
            pairs = [self.pair(arg) for arg in node.args]
            trues, falses = [p[0] for p in pairs], [p[1] for p in pairs]
            if isinstance(node, And):
                return and_(*trues), or_(*falses)
            return or_(*trues), and_(*falses)
        if isinstance(node, Not):
            inner_true, inner_false = self.pair(node.arg)
            return inner_false, inner_true
        if isinstance(node, BooleanConstant):
            return (true(), false()) if node.value else (false(), true())
        if isinstance(node, IsNull):
            assert isinstance(node.value, Property)
            present = self.exists_over(self.rows([node.value.name]))
            return not_(present), present
        if isinstance(node, ArrayPredicate):
            return self.array(node)
        names = self.names(node)
        return self.atom(names, lambda aliases: self.condition(node, aliases))

    def names(self, node: Node) -> list[str]:
        expressions: list[Expression] = []
        if isinstance(node, Comparison | TemporalPredicate):
            expressions = [node.left, node.right]
        elif isinstance(node, Like):
            expressions = [node.value]
        elif isinstance(node, Between):
            expressions = [node.value, node.low, node.high]
        elif isinstance(node, In):
            expressions = [node.value]
        names: list[str] = []
        for expression in expressions:
            names.extend(n for n in properties_of(expression) if n not in names)
        return names

    # values

    def value(self, expression: Expression | IntervalEnd, aliases: dict[str, Any]) -> Any:
        inner, mode = (
            unwrap(expression)
            if not isinstance(expression, OpenEnd)
            else (
                expression,
                TextMode(),
            )
        )
        if isinstance(inner, Property):
            type_ = self.schema[inner.name]
            column = (
                _TEXT_COLUMNS[mode] if type_ is AttributeType.KEYWORD else _VALUE_COLUMNS[type_]
            )
            return aliases[inner.name].c[column]
        if isinstance(inner, StringLiteral):
            return literal(text_form(inner.value, mode), String())
        if isinstance(inner, BooleanLiteral):
            return literal(inner.value, Boolean())
        if isinstance(inner, NumberLiteral):
            return literal(float(inner.value), Float())
        if isinstance(inner, DateLiteral):
            return literal(epoch_days(inner.value), BigInteger())
        if isinstance(inner, TimestampLiteral):
            return literal(epoch_micros(inner.value), BigInteger())
        raise TypeError(f"not a single value: {expression!r}")

    def bounds(self, expression: Expression, aliases: dict[str, Any]) -> tuple[Any, Any]:
        if not isinstance(expression, IntervalLiteral):
            value = self.value(expression, aliases)
            return value, value
        start = (
            literal(OPEN_START, BigInteger())
            if isinstance(expression.start, OpenEnd)
            else self.value(expression.start, aliases)
        )
        end = (
            literal(OPEN_END, BigInteger())
            if isinstance(expression.end, OpenEnd)
            else self.value(expression.end, aliases)
        )
        return start, end

    def condition(self, node: Node, aliases: dict[str, Any]) -> Any:
        if isinstance(node, Comparison):
            return COMPARE[node.op](self.value(node.left, aliases), self.value(node.right, aliases))
        if isinstance(node, Like):
            pattern, mode = unwrap(node.pattern)
            assert isinstance(pattern, StringLiteral)
            return CaseSensitiveLike(
                self.value(node.value, aliases), text_form(pattern.value, mode)
            )
        if isinstance(node, Between):
            value = self.value(node.value, aliases)
            return and_(
                self.value(node.low, aliases) <= value, value <= self.value(node.high, aliases)
            )
        if isinstance(node, In):
            return self.value(node.value, aliases).in_(
                [self.value(item, aliases) for item in node.items]
            )
        assert isinstance(node, TemporalPredicate)
        s1, e1 = self.bounds(node.left, aliases)
        s2, e2 = self.bounds(node.right, aliases)
        return temporal_relation(node.op, s1, e1, s2, e2)

    def array(self, node: ArrayPredicate) -> Pair:
        assert isinstance(node.left, Property) and isinstance(node.right, ArrayLiteral)
        name = node.left.name
        wanted = sorted(
            {item.value for item in node.right.items if isinstance(item, StringLiteral)}
        )

        def has(value: str) -> ColumnElement[bool]:
            aliases = self.rows([name])
            return self.exists_over(
                aliases,
                aliases[name].c.position >= 0,
                aliases[name].c.text_value == literal(value, String()),
            )

        present = self.exists_over(self.rows([name]))
        contains = and_(present, *(has(v) for v in wanted))

        def outside() -> ColumnElement[bool]:
            aliases = self.rows([name])
            row = aliases[name]
            conditions = [row.c.position >= 0]
            if wanted:
                conditions.append(row.c.text_value.not_in([literal(v, String()) for v in wanted]))
            return self.exists_over(aliases, *conditions)

        condition: ColumnElement[bool]
        if node.op is ArrayOp.OVERLAPS:
            if not wanted:
                condition = false()
            else:
                aliases = self.rows([name])
                row = aliases[name]
                condition = self.exists_over(
                    aliases,
                    row.c.position >= 0,
                    row.c.text_value.in_([literal(v, String()) for v in wanted]),
                )
        elif node.op is ArrayOp.CONTAINS:
            condition = contains
        else:
            condition = and_(present, not_(outside()))
            if node.op is ArrayOp.EQUALS:
                condition = and_(condition, contains)
        return and_(present, condition), and_(present, not_(condition))
