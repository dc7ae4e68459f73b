"""The vectorised engine: a checked filter over ``AttributeColumns`` into a boolean row mask.

Three-valued logic (OGC 21-065 clause 7.2): every sub-filter yields a pair of masks, rows where
it is TRUE and rows where it is FALSE; a row in neither is UNKNOWN. NOT swaps the pair, so NOT of
unknown stays unknown, and only TRUE rows are returned. The FALSE mask is computed only where a
NOT above needs it. Work is whole-array numpy; Python loops run over dictionary entries only.
"""

from __future__ import annotations

import operator
import re
from collections.abc import Callable
from typing import Any

import numpy as np

from service.attributes import epoch_days, epoch_micros
from service.filters.columns import (
    AttributeColumns,
    KeywordColumn,
    KeywordListColumn,
    ValueColumn,
)
from service.filters.syntax import (
    And,
    ArrayLiteral,
    ArrayOp,
    ArrayPredicate,
    Between,
    BooleanConstant,
    BooleanLiteral,
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
    TemporalOp,
    TemporalPredicate,
    TimestampLiteral,
)
from service.filters.text_forms import text_form, unwrap

# Open interval ends: beyond every representable epoch microsecond (years 1..9999).
OPEN_START = -(2**62)
OPEN_END = 2**62

COMPARE: dict[ComparisonOp, Callable[[Any, Any], Any]] = {
    ComparisonOp.EQ: operator.eq,
    ComparisonOp.NE: operator.ne,
    ComparisonOp.LT: operator.lt,
    ComparisonOp.LE: operator.le,
    ComparisonOp.GT: operator.gt,
    ComparisonOp.GE: operator.ge,
}
FLIPPED = {
    ComparisonOp.EQ: ComparisonOp.EQ,
    ComparisonOp.NE: ComparisonOp.NE,
    ComparisonOp.LT: ComparisonOp.GT,
    ComparisonOp.LE: ComparisonOp.GE,
    ComparisonOp.GT: ComparisonOp.LT,
    ComparisonOp.GE: ComparisonOp.LE,
}


def temporal_relation(op: TemporalOp, s1: Any, e1: Any, s2: Any, e2: Any) -> Any:
    """OGC 21-065 clause 9.3 relations between closed intervals [s1, e1] and [s2, e2].

    Written with ``&``/``|`` so it works on numpy arrays and on SQL expressions alike.
    """
    if op is TemporalOp.AFTER:
        return s1 > e2
    if op is TemporalOp.BEFORE:
        return e1 < s2
    if op is TemporalOp.DISJOINT:
        return (e1 < s2) | (s1 > e2)
    if op is TemporalOp.EQUALS:
        return (s1 == s2) & (e1 == e2)
    if op is TemporalOp.INTERSECTS:
        return (s1 <= e2) & (e1 >= s2)
    if op is TemporalOp.CONTAINS:
        return (s1 < s2) & (e1 > e2)
    if op is TemporalOp.DURING:
        return (s1 > s2) & (e1 < e2)
    if op is TemporalOp.FINISHES:
        return (s1 > s2) & (e1 == e2)
    if op is TemporalOp.FINISHEDBY:
        return (s1 < s2) & (e1 == e2)
    if op is TemporalOp.MEETS:
        return e1 == s2
    if op is TemporalOp.METBY:
        return s1 == e2
    if op is TemporalOp.OVERLAPS:
        return (s1 < s2) & (e1 > s2) & (e1 < e2)
    if op is TemporalOp.OVERLAPPEDBY:
        return (s1 > s2) & (s1 < e2) & (e1 > e2)
    if op is TemporalOp.STARTS:
        return (s1 == s2) & (e1 < e2)
    return (s1 == s2) & (e1 > e2)


def like_regex(pattern: str) -> re.Pattern[str]:
    """CQL2 LIKE: ``%`` any run, ``_`` one character, ``\\`` escapes the next character."""
    parts: list[str] = []
    escaped = False
    for char in pattern:
        if escaped:
            parts.append(re.escape(char))
            escaped = False
        elif char == "\\":
            escaped = True
        elif char == "%":
            parts.append(".*")
        elif char == "_":
            parts.append(".")
        else:
            parts.append(re.escape(char))
    return re.compile("".join(parts), re.DOTALL)


def evaluate(node: Node, columns: AttributeColumns) -> np.ndarray:
    """Rows (``len(columns)``, dtype bool) where the checked filter ``node`` is TRUE."""
    true, _ = _Evaluator(columns).truth(node, need_false=False)
    return true


def evaluate_truth(node: Node, columns: AttributeColumns) -> tuple[np.ndarray, np.ndarray]:
    """Rows where ``node`` is TRUE and rows where it is FALSE; a row in neither is UNKNOWN."""
    true, false = _Evaluator(columns).truth(node, need_false=True)
    assert false is not None
    return true, false


Truth = tuple[np.ndarray, np.ndarray | None]
Values = tuple[Any, np.ndarray | None]  # (array or constant, present mask or None)


class _Evaluator:
    def __init__(self, columns: AttributeColumns) -> None:
        self.columns = columns
        self.length = len(columns)

    def full(self, value: bool) -> np.ndarray:
        return np.full(self.length, value, dtype=bool)

    def atom(self, condition: Any, present: np.ndarray | None, need_false: bool) -> Truth:
        condition = np.broadcast_to(np.asarray(condition, dtype=bool), (self.length,))
        if present is None:
            return condition.copy(), (~condition if need_false else None)
        return condition & present, ((~condition & present) if need_false else None)

    def truth(self, node: Node, need_false: bool) -> Truth:
        if isinstance(node, And | Or):
            parts = [self.truth(arg, need_false) for arg in node.args]
            combine, dual = (
                (np.logical_and, np.logical_or)
                if isinstance(node, And)
                else (np.logical_or, np.logical_and)
            )
            true = parts[0][0].copy()
            for part_true, _ in parts[1:]:
                combine(true, part_true, out=true)
            if not need_false:
                return true, None
            falses = [part_false for _, part_false in parts if part_false is not None]
            false = falses[0].copy()
            for part_false in falses[1:]:
                dual(false, part_false, out=false)
            return true, false
        if isinstance(node, Not):
            inner_true, inner_false = self.truth(node.arg, need_false=True)
            assert inner_false is not None
            return inner_false, inner_true
        if isinstance(node, BooleanConstant):
            return self.full(node.value), self.full(not node.value)
        if isinstance(node, IsNull):
            assert isinstance(node.value, Property)
            present = self.present(node.value.name)
            return ~present, present.copy()
        if isinstance(node, Comparison):
            return self.comparison(node, need_false)
        if isinstance(node, Like):
            return self.like(node, need_false)
        if isinstance(node, Between):
            value, low, high = (self.values(e) for e in (node.value, node.low, node.high))
            condition = (low[0] <= value[0]) & (value[0] <= high[0])
            return self.atom(condition, _joint(value[1], low[1], high[1]), need_false)
        if isinstance(node, In):
            return self.in_list(node, need_false)
        if isinstance(node, TemporalPredicate):
            s1, e1, p1 = self.bounds(node.left)
            s2, e2, p2 = self.bounds(node.right)
            condition = temporal_relation(node.op, s1, e1, s2, e2)
            return self.atom(condition, _joint(p1, p2), need_false)
        return self.array(node, need_false)

    # operands

    def present(self, name: str) -> np.ndarray:
        column = self.columns.columns.get(name)
        return column.present if column is not None else self.full(False)

    def values(self, expression: Expression | IntervalEnd) -> Values:
        if isinstance(expression, Property):
            column = self.columns.columns.get(expression.name)
            if not isinstance(column, ValueColumn):
                return np.zeros(self.length, dtype=np.int64), self.full(False)
            return column.values, column.present
        if isinstance(expression, NumberLiteral):
            return float(expression.value), None
        if isinstance(expression, BooleanLiteral):
            return expression.value, None
        if isinstance(expression, DateLiteral):
            return epoch_days(expression.value), None
        if isinstance(expression, TimestampLiteral):
            return epoch_micros(expression.value), None
        raise TypeError(f"not a single value: {expression!r}")

    def bounds(self, expression: Expression) -> tuple[Any, Any, np.ndarray | None]:
        if not isinstance(expression, IntervalLiteral):
            value, present = self.values(expression)
            return value, value, present
        start, start_present = (
            (OPEN_START, None)
            if isinstance(expression.start, OpenEnd)
            else self.values(expression.start)
        )
        end, end_present = (
            (OPEN_END, None) if isinstance(expression.end, OpenEnd) else self.values(expression.end)
        )
        return start, end, _joint(start_present, end_present)

    def keyword(self, expression: Expression) -> tuple[KeywordColumn | None, Any]:
        """(column, codes) for a keyword attribute, or (None, form) for a string literal."""
        inner, mode = unwrap(expression)
        if isinstance(inner, Property):
            column = self.columns.columns.get(inner.name)
            if not isinstance(column, KeywordColumn):
                return None, None
            return column, (column.forms[mode], column.codes[mode])
        assert isinstance(inner, StringLiteral)
        return None, text_form(inner.value, mode)

    # predicates

    def comparison(self, node: Comparison, need_false: bool) -> Truth:
        left_inner, _ = unwrap(node.left)
        right_inner, _ = unwrap(node.right)
        if (
            isinstance(left_inner, StringLiteral)
            or isinstance(right_inner, StringLiteral)
            or (self.is_keyword(left_inner) or self.is_keyword(right_inner))
        ):
            return self.keyword_comparison(node, need_false)
        left, right = self.values(node.left), self.values(node.right)
        return self.atom(COMPARE[node.op](left[0], right[0]), _joint(left[1], right[1]), need_false)

    def is_keyword(self, expression: Expression) -> bool:
        return isinstance(expression, Property) and isinstance(
            self.columns.columns.get(expression.name), KeywordColumn
        )

    def keyword_comparison(self, node: Comparison, need_false: bool) -> Truth:
        op, left_expr, right_expr = node.op, node.left, node.right
        if not isinstance(unwrap(left_expr)[0], Property):
            op, left_expr, right_expr = FLIPPED[op], right_expr, left_expr
        left_column, left = self.keyword(left_expr)
        right_column, right = self.keyword(right_expr)
        if left_column is None or (
            isinstance(unwrap(right_expr)[0], Property) and right_column is None
        ):
            return self.atom(False, self.full(False), need_false)
        forms, codes = left
        if right_column is None:
            return self.atom(
                _codes_against(op, forms, codes, right), left_column.present, need_false
            )
        other_forms, other_codes = right
        if not len(forms) or not len(other_forms):
            return self.atom(False, self.full(False), need_false)
        vocabulary = np.unique(np.concatenate([forms, other_forms]))
        left_rank = np.searchsorted(vocabulary, forms)[np.maximum(codes, 0)]
        right_rank = np.searchsorted(vocabulary, other_forms)[np.maximum(other_codes, 0)]
        return self.atom(
            COMPARE[op](left_rank, right_rank),
            left_column.present & right_column.present,
            need_false,
        )

    def like(self, node: Like, need_false: bool) -> Truth:
        column, operand = self.keyword(node.value)
        if column is None:
            return self.atom(False, self.full(False), need_false)
        forms, codes = operand
        pattern_inner, pattern_mode = unwrap(node.pattern)
        assert isinstance(pattern_inner, StringLiteral)
        regex = like_regex(text_form(pattern_inner.value, pattern_mode))
        table = np.zeros(len(forms) + 1, dtype=bool)
        table[:-1] = [regex.fullmatch(str(form)) is not None for form in forms]
        return self.atom(table[codes], column.present, need_false)

    def in_list(self, node: In, need_false: bool) -> Truth:
        if self.is_keyword(unwrap(node.value)[0]):
            column, operand = self.keyword(node.value)
            assert column is not None
            forms, codes = operand
            table = np.zeros(len(forms) + 1, dtype=bool)
            for item in node.items:
                inner, mode = unwrap(item)
                assert isinstance(inner, StringLiteral)
                found = _find(forms, text_form(inner.value, mode))
                if found is not None:
                    table[found] = True
            return self.atom(table[codes], column.present, need_false)
        inner = unwrap(node.value)[0]
        if isinstance(inner, Property) and not isinstance(
            self.columns.columns.get(inner.name), ValueColumn
        ):
            return self.atom(False, self.full(False), need_false)
        values, present = self.values(node.value)
        items = np.array([self.values(item)[0] for item in node.items])
        return self.atom(np.isin(values, items), present, need_false)

    def array(self, node: ArrayPredicate, need_false: bool) -> Truth:
        assert isinstance(node.left, Property) and isinstance(node.right, ArrayLiteral)
        column = self.columns.columns.get(node.left.name)
        if not isinstance(column, KeywordListColumn):
            return self.atom(False, self.full(False), need_false)
        wanted: set[int] = set()
        missing = False
        for item in node.right.items:
            assert isinstance(item, StringLiteral)
            found = _find(column.dictionary, item.value)
            if found is None:
                missing = True
            else:
                wanted.add(found)
        member = np.zeros(len(column.dictionary), dtype=bool)
        member[list(wanted)] = True
        element_in = member[column.element_codes]

        def rows_with(elements: np.ndarray) -> np.ndarray:
            return np.bincount(column.element_rows[elements], minlength=self.length) > 0

        def contains() -> np.ndarray:
            if missing:
                return self.full(False)
            result = self.full(True)
            for code in wanted:
                result &= rows_with(column.element_codes == code)
            return result

        if node.op is ArrayOp.OVERLAPS:
            condition = rows_with(element_in)
        elif node.op is ArrayOp.CONTAINS:
            condition = contains()
        else:
            condition = ~rows_with(~element_in)
            if node.op is ArrayOp.EQUALS:
                condition &= contains()
        return self.atom(condition, column.present, need_false)


def _joint(*masks: np.ndarray | None) -> np.ndarray | None:
    result: np.ndarray | None = None
    for mask in masks:
        if mask is not None:
            result = mask if result is None else result & mask
    return result


def _find(forms: np.ndarray, text: str) -> int | None:
    index = int(np.searchsorted(forms, text))
    return index if index < len(forms) and forms[index] == text else None


def _codes_against(op: ComparisonOp, forms: np.ndarray, codes: np.ndarray, text: str) -> Any:
    """``form(code) op text`` as a comparison of codes: forms are sorted by code point."""
    index = int(np.searchsorted(forms, text))
    found = index < len(forms) and forms[index] == text
    if op is ComparisonOp.EQ:
        return codes == index if found else False
    if op is ComparisonOp.NE:
        return codes != index if found else True
    if op is ComparisonOp.LT:
        return codes < index
    if op is ComparisonOp.LE:
        return codes <= index if found else codes < index
    if op is ComparisonOp.GT:
        return codes > index if found else codes >= index
    return codes >= index
