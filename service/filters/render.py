"""The syntax tree back into cql2-text and cql2-json; ``parse_filter`` of either gives it back."""

from __future__ import annotations

import datetime as dt
import re
from typing import Any

from service.filters.parse import RESERVED_WORDS
from service.filters.syntax import (
    And,
    ArrayLiteral,
    ArrayPredicate,
    Between,
    BooleanConstant,
    BooleanLiteral,
    CaseInsensitive,
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
)

_BARE_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def timestamp_text(value: dt.datetime) -> str:
    """UTC with ``Z``; fractional seconds only when present, without trailing zeros."""
    value = value.astimezone(dt.UTC)
    text = value.replace(tzinfo=None, microsecond=0).isoformat()
    if value.microsecond:
        text += f".{value.microsecond:06d}".rstrip("0")
    return text + "Z"


def property_text(name: str) -> str:
    if _BARE_NAME.fullmatch(name) and name.lower() not in RESERVED_WORDS:
        return name
    return '"' + name.replace('"', '""') + '"'


def _string_text(value: str) -> str:
    return "'" + value.replace("'", "''") + "'"


def _number_text(value: int | float) -> str:
    return str(value) if isinstance(value, int) else repr(float(value))


def to_text(node: Node) -> str:
    if isinstance(node, And | Or):
        word = " AND " if isinstance(node, And) else " OR "
        return word.join(_grouped(arg) for arg in node.args)
    if isinstance(node, Not):
        return "NOT " + _grouped(node.arg)
    if isinstance(node, Comparison):
        return f"{_expression_text(node.left)} {node.op.value} {_expression_text(node.right)}"
    if isinstance(node, Like):
        return f"{_expression_text(node.value)} LIKE {_expression_text(node.pattern)}"
    if isinstance(node, Between):
        return (
            f"{_expression_text(node.value)} BETWEEN {_expression_text(node.low)}"
            f" AND {_expression_text(node.high)}"
        )
    if isinstance(node, In):
        items = ", ".join(_expression_text(item) for item in node.items)
        return f"{_expression_text(node.value)} IN ({items})"
    if isinstance(node, IsNull):
        return f"{_expression_text(node.value)} IS NULL"
    if isinstance(node, TemporalPredicate | ArrayPredicate):
        return (
            f"{node.op.value.upper()}({_expression_text(node.left)},"
            f" {_expression_text(node.right)})"
        )
    return "TRUE" if node.value else "FALSE"


def _grouped(node: Node) -> str:
    text = to_text(node)
    return f"({text})" if isinstance(node, And | Or) else text


def _expression_text(expression: Expression) -> str:
    if isinstance(expression, Property):
        return property_text(expression.name)
    if isinstance(expression, StringLiteral):
        return _string_text(expression.value)
    if isinstance(expression, BooleanLiteral):
        return "TRUE" if expression.value else "FALSE"
    if isinstance(expression, NumberLiteral):
        return _number_text(expression.value)
    if isinstance(expression, DateLiteral):
        return f"DATE('{expression.value.isoformat()}')"
    if isinstance(expression, TimestampLiteral):
        return f"TIMESTAMP('{timestamp_text(expression.value)}')"
    if isinstance(expression, IntervalLiteral):
        return f"INTERVAL({_end_text(expression.start)}, {_end_text(expression.end)})"
    if isinstance(expression, ArrayLiteral):
        return "(" + ", ".join(_expression_text(item) for item in expression.items) + ")"
    if isinstance(expression, CaseInsensitive):
        return f"CASEI({_expression_text(expression.arg)})"
    return f"ACCENTI({_expression_text(expression.arg)})"


def _end_text(end: IntervalEnd) -> str:
    if isinstance(end, OpenEnd):
        return "'..'"
    if isinstance(end, DateLiteral):
        return _string_text(end.value.isoformat())
    if isinstance(end, TimestampLiteral):
        return _string_text(timestamp_text(end.value))
    return property_text(end.name)


def to_json(node: Node) -> Any:
    """cql2-json; a bare ``TRUE``/``FALSE`` condition is the JSON boolean itself."""
    if isinstance(node, BooleanConstant):
        return node.value
    if isinstance(node, And | Or):
        return {
            "op": "and" if isinstance(node, And) else "or",
            "args": [to_json(arg) for arg in node.args],
        }
    if isinstance(node, Not):
        return {"op": "not", "args": [to_json(node.arg)]}
    if isinstance(node, Comparison):
        return {
            "op": node.op.value,
            "args": [_expression_json(node.left), _expression_json(node.right)],
        }
    if isinstance(node, Like):
        return {
            "op": "like",
            "args": [_expression_json(node.value), _expression_json(node.pattern)],
        }
    if isinstance(node, Between):
        return {
            "op": "between",
            "args": [_expression_json(e) for e in (node.value, node.low, node.high)],
        }
    if isinstance(node, In):
        return {
            "op": "in",
            "args": [_expression_json(node.value), [_expression_json(i) for i in node.items]],
        }
    if isinstance(node, IsNull):
        return {"op": "isNull", "args": [_expression_json(node.value)]}
    return {
        "op": node.op.value,
        "args": [_expression_json(node.left), _expression_json(node.right)],
    }


def _expression_json(expression: Expression) -> Any:
    if isinstance(expression, Property):
        return {"property": expression.name}
    if isinstance(expression, StringLiteral | BooleanLiteral | NumberLiteral):
        return expression.value
    if isinstance(expression, DateLiteral):
        return {"date": expression.value.isoformat()}
    if isinstance(expression, TimestampLiteral):
        return {"timestamp": timestamp_text(expression.value)}
    if isinstance(expression, IntervalLiteral):
        return {"interval": [_end_json(expression.start), _end_json(expression.end)]}
    if isinstance(expression, ArrayLiteral):
        return [_expression_json(item) for item in expression.items]
    name = "casei" if isinstance(expression, CaseInsensitive) else "accenti"
    return {"op": name, "args": [_expression_json(expression.arg)]}


def _end_json(end: IntervalEnd) -> Any:
    if isinstance(end, OpenEnd):
        return ".."
    if isinstance(end, DateLiteral):
        return end.value.isoformat()
    if isinstance(end, TimestampLiteral):
        return timestamp_text(end.value)
    return {"property": end.name}
