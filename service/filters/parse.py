"""cql2-text and cql2-json into the syntax tree of ``syntax.py`` (OGC 21-065, clauses 7 and 8).

Both encodings go through the same limits (text size, nesting depth, list length) so that a
caller cannot make the service do unbounded work, and every failure is an ``InvalidFilter``.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NoReturn

from service.errors import FilterSyntaxError, FilterTooLarge
from service.filters.syntax import (
    AccentInsensitive,
    ArrayLiteral,
    ArrayOp,
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
    Property,
    StringLiteral,
    TemporalOp,
    TemporalPredicate,
    TimestampLiteral,
    conjunction,
    disjunction,
)

MAX_TEXT_BYTES = 8192
MAX_DEPTH = 32
MAX_LIST_ITEMS = 1000
# Longer digit strings cannot be a usable number and would make int() slow.
MAX_NUMBER_CHARS = 64

TIMESTAMP_FORM = "TIMESTAMP('2024-05-01T09:30:00Z')"
DATE_FORM = "DATE('2024-05-01')"

_DATE_TEXT = re.compile(r"\d{4}-\d{2}-\d{2}")
_TIMESTAMP_TEXT = re.compile(r"(\d{4}-\d{2}-\d{2})T(\d{2}):(\d{2}):(\d{2})(?:\.(\d{1,6}))?Z")
_TIMESTAMP_LIKE = re.compile(r"\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}")

# Words with a grammatical role; as property names they must be double-quoted.
KEYWORDS = frozenset({"and", "or", "not", "like", "between", "in", "is", "null", "true", "false"})
FUNCTIONS = frozenset(
    {"date", "timestamp", "interval", "casei", "accenti"}
    | {op.value.lower() for op in TemporalOp}
    | {op.value.lower() for op in ArrayOp}
)
RESERVED_WORDS = KEYWORDS | FUNCTIONS


def parse_filter(value: str | dict[str, Any] | bool) -> Node:
    """A ``str`` is always cql2-text; a ``dict`` (or bare boolean) is decoded cql2-json."""
    if isinstance(value, str):
        return _TextParser(value).parse()
    if isinstance(value, dict | bool):
        return parse_json(value)
    raise FilterSyntaxError(
        "a filter must be cql2-text (a string) or cql2-json (an object)", position=0
    )


_COMPARISONS = {op.value: op for op in ComparisonOp}
_TEMPORALS = {op.value.lower(): op for op in TemporalOp}
_ARRAYS = {op.value.lower(): op for op in ArrayOp}


# cql2-text ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Token:
    kind: str  # "word", "quoted", "string", "number", "punct", "op", "end"
    text: str
    position: int
    value: Any = None


_TOKEN = re.compile(
    r"""
    (?P<space>\s+)
  | (?P<number>[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)
  | (?P<word>[^\W\d][\w.:]*)
  | (?P<op><>|<=|>=|=|<|>)
  | (?P<punct>[(),])
    """,
    re.VERBOSE,
)


def caret_excerpt(text: str, position: int, width: int = 60) -> str:
    """The line holding ``position`` (cut to ``width`` around it) and a caret under it."""
    line_start = text.rfind("\n", 0, position) + 1
    line_end = text.find("\n", position)
    line = text[line_start : line_end if line_end != -1 else len(text)]
    column = position - line_start
    cut = max(0, column - width // 2)
    shown = line[cut : cut + width]
    return f"{shown}\n{' ' * (column - cut)}^"


class _TextParser:
    def __init__(self, text: str) -> None:
        if len(text.encode("utf-8", "surrogatepass")) > MAX_TEXT_BYTES:
            raise FilterTooLarge(
                f"the filter is longer than {MAX_TEXT_BYTES} bytes", limit=MAX_TEXT_BYTES
            )
        self.text = text
        self.tokens = self._tokenize()
        self.index = 0
        self.depth = 0

    # tokens

    def fail(self, message: str, position: int) -> NoReturn:
        raise FilterSyntaxError(
            message, position=position, excerpt=caret_excerpt(self.text, position)
        )

    def _tokenize(self) -> list[_Token]:
        text = self.text
        tokens: list[_Token] = []
        position = 0
        while position < len(text):
            char = text[position]
            if char in "'\"":
                end, value = self._quoted(position, char)
                tokens.append(
                    _Token(
                        "string" if char == "'" else "quoted", text[position:end], position, value
                    )
                )
                position = end
                continue
            match = _TOKEN.match(text, position)
            if match is None:
                self.fail(f"unexpected character {char!r}", position)
            kind = match.lastgroup or ""
            if kind != "space":
                tokens.append(_Token(kind, match.group(), position))
            position = match.end()
        tokens.append(_Token("end", "", len(text)))
        return tokens

    def _quoted(self, start: int, quote: str) -> tuple[int, str]:
        parts: list[str] = []
        position = start + 1
        while True:
            end = self.text.find(quote, position)
            if end == -1:
                what = "string" if quote == "'" else "quoted property name"
                self.fail(f"this {what} is never closed", start)
            parts.append(self.text[position:end])
            if self.text.startswith(quote, end + 1):
                parts.append(quote)
                position = end + 2
                continue
            return end + 1, "".join(parts)

    def peek(self, offset: int = 0) -> _Token:
        return self.tokens[min(self.index + offset, len(self.tokens) - 1)]

    def advance(self) -> _Token:
        token = self.tokens[self.index]
        self.index = min(self.index + 1, len(self.tokens) - 1)
        return token

    def at_word(self, *words: str, offset: int = 0) -> bool:
        token = self.peek(offset)
        return token.kind == "word" and token.text.lower() in words

    def at_punct(self, text: str) -> bool:
        token = self.peek()
        return token.kind == "punct" and token.text == text

    def expect_punct(self, text: str, context: str) -> _Token:
        if not self.at_punct(text):
            self.fail(f"expected {text!r} {context}", self.peek().position)
        return self.advance()

    def expect_word(self, word: str, context: str) -> None:
        if not self.at_word(word):
            self.fail(f"expected {word.upper()} {context}", self.peek().position)
        self.advance()

    def enter(self, position: int) -> None:
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise FilterTooLarge(
                f"the filter nests deeper than {MAX_DEPTH} levels",
                limit=MAX_DEPTH,
                position=position,
            )

    def leave(self) -> None:
        self.depth -= 1

    # grammar

    def parse(self) -> Node:
        if self.peek().kind == "end":
            self.fail("the filter is empty", 0)
        node = self.boolean_expression()
        token = self.peek()
        if token.kind != "end":
            self.fail(f"unexpected {token.text!r} after a complete condition", token.position)
        return node

    def boolean_expression(self) -> Node:
        terms = [self.boolean_term()]
        while self.at_word("or"):
            self.advance()
            terms.append(self.boolean_term())
        return disjunction(terms)

    def boolean_term(self) -> Node:
        factors = [self.boolean_factor()]
        while self.at_word("and"):
            self.advance()
            factors.append(self.boolean_factor())
        return conjunction(factors)

    def boolean_factor(self) -> Node:
        if self.at_word("not"):
            token = self.advance()
            self.enter(token.position)
            node = Not(self.boolean_factor())
            self.leave()
            return node
        return self.boolean_primary()

    def boolean_primary(self) -> Node:
        token = self.peek()
        if token.kind == "punct" and token.text == "(":
            self.advance()
            self.enter(token.position)
            node = self.boolean_expression()
            self.leave()
            self.expect_punct(")", "to close the parenthesis")
            return node
        if token.kind == "word" and self.peek(1).text == "(":
            name = token.text.lower()
            if name in _TEMPORALS:
                left, right = self.function_arguments(self.temporal_argument)
                return TemporalPredicate(_TEMPORALS[name], left, right)
            if name in _ARRAYS:
                left, right = self.function_arguments(self.array_argument)
                return ArrayPredicate(_ARRAYS[name], left, right)
        return self.predicate()

    def function_arguments(
        self, argument: Callable[[], Expression]
    ) -> tuple[Expression, Expression]:
        name = self.advance()
        self.enter(name.position)
        self.advance()
        left = argument()
        self.expect_punct(",", f"between the two arguments of {name.text.upper()}")
        right = argument()
        self.expect_punct(")", f"after the two arguments of {name.text.upper()}")
        self.leave()
        return left, right

    def temporal_argument(self) -> Expression:
        if self.at_word("interval") and self.peek(1).text == "(":
            return self.interval()
        return self.scalar()

    def array_argument(self) -> Expression:
        if self.at_punct("("):
            return self.array()
        return self.scalar()

    def predicate(self) -> Node:
        start = self.peek()
        left = self.scalar()
        negated = False
        if self.at_word("not") and self.at_word("like", "between", "in", offset=1):
            self.advance()
            negated = True
        token = self.peek()
        node: Node
        if token.kind == "op":
            self.advance()
            node = Comparison(ComparisonOp(token.text), left, self.scalar())
        elif self.at_word("like"):
            self.advance()
            node = Like(left, self.scalar())
        elif self.at_word("between"):
            self.advance()
            low = self.scalar()
            self.expect_word("and", "between the two ends of BETWEEN")
            node = Between(left, low, self.scalar())
        elif self.at_word("in"):
            self.advance()
            node = In(left, self.in_list())
        elif self.at_word("is"):
            self.advance()
            if self.at_word("not"):
                self.advance()
                negated = True
            self.expect_word("null", "after IS")
            node = IsNull(left)
        elif isinstance(left, BooleanLiteral):
            return BooleanConstant(left.value)
        else:
            self.fail(
                "expected a comparison (=, <>, <, <=, >, >=), LIKE, BETWEEN, IN or IS NULL",
                token.position if token.kind != "end" else start.position,
            )
        return Not(node) if negated else node

    def in_list(self) -> tuple[Expression, ...]:
        open_token = self.expect_punct("(", "to start the IN list")
        self.enter(open_token.position)
        items = [self.scalar()]
        while self.at_punct(","):
            self.advance()
            items.append(self.scalar())
            if len(items) > MAX_LIST_ITEMS:
                raise FilterTooLarge(
                    f"an IN list holds more than {MAX_LIST_ITEMS} values", limit=MAX_LIST_ITEMS
                )
        self.expect_punct(")", "to close the IN list")
        self.leave()
        return tuple(items)

    def array(self) -> ArrayLiteral:
        open_token = self.advance()
        self.enter(open_token.position)
        items: list[Expression] = []
        if not self.at_punct(")"):
            items.append(self.scalar())
            while self.at_punct(","):
                self.advance()
                items.append(self.scalar())
                if len(items) > MAX_LIST_ITEMS:
                    raise FilterTooLarge(
                        f"an array holds more than {MAX_LIST_ITEMS} values",
                        limit=MAX_LIST_ITEMS,
                    )
        self.expect_punct(")", "to close the array")
        self.leave()
        return ArrayLiteral(tuple(items))

    def interval(self) -> IntervalLiteral:
        name = self.advance()
        self.enter(name.position)
        self.advance()
        start = self.interval_end()
        self.expect_punct(",", "between the two ends of INTERVAL")
        end = self.interval_end()
        self.expect_punct(")", "after the two ends of INTERVAL")
        self.leave()
        return IntervalLiteral(start, end)

    def interval_end(self) -> IntervalEnd:
        token = self.peek()
        if token.kind == "string":
            self.advance()
            return self.instant_string(token.value, token.position + 1)
        value = self.scalar()
        if isinstance(value, DateLiteral | TimestampLiteral | Property):
            return value
        self.fail("an interval end is '..', a date, a timestamp or a property", token.position)

    def instant_string(self, text: str, position: int) -> IntervalEnd:
        if text == "..":
            return OpenEnd()
        if _DATE_TEXT.fullmatch(text):
            return DateLiteral(self.date_value(text, position))
        return TimestampLiteral(self.timestamp_value(text, position))

    def scalar(self) -> Expression:
        token = self.peek()
        if token.kind == "string":
            self.advance()
            return StringLiteral(token.value)
        if token.kind == "number":
            self.advance()
            return NumberLiteral(self.number_value(token))
        if token.kind == "quoted":
            self.advance()
            if not token.value:
                self.fail("a property name cannot be empty", token.position)
            return Property(token.value)
        if token.kind == "word":
            word = token.text.lower()
            if word in ("true", "false"):
                self.advance()
                return BooleanLiteral(word == "true")
            if self.peek(1).text == "(" and self.peek(1).kind == "punct":
                return self.scalar_function(token)
            if word in RESERVED_WORDS:
                self.fail(
                    f"{token.text!r} is a reserved word; write a property of that name in"
                    f' double quotes ("{token.text}")',
                    token.position,
                )
            self.advance()
            return Property(token.text)
        if token.kind == "end":
            self.fail("the filter ends where a value or property was expected", token.position)
        self.fail(f"expected a value or property, found {token.text!r}", token.position)

    def scalar_function(self, token: _Token) -> Expression:
        word = token.text.lower()
        if word not in ("date", "timestamp", "casei", "accenti", "interval"):
            self.fail(f"{token.text!r} is not a function this service knows", token.position)
        if word == "interval":
            return self.interval()
        self.advance()
        self.enter(token.position)
        self.advance()
        result: Expression
        if word in ("casei", "accenti"):
            inner = self.scalar()
            result = CaseInsensitive(inner) if word == "casei" else AccentInsensitive(inner)
        else:
            literal = self.peek()
            if literal.kind != "string":
                form = DATE_FORM if word == "date" else TIMESTAMP_FORM
                self.fail(f"{word.upper()} takes a quoted string, as in {form}", literal.position)
            self.advance()
            if word == "date":
                result = DateLiteral(self.date_value(literal.value, literal.position + 1))
            else:
                result = TimestampLiteral(self.timestamp_value(literal.value, literal.position + 1))
        self.expect_punct(")", f"to close {word.upper()}")
        self.leave()
        return result

    # literal values

    def number_value(self, token: _Token) -> int | float:
        try:
            return read_number(token.text)
        except ValueError as error:
            self.fail(str(error), token.position)

    def date_value(self, text: str, position: int) -> dt.date:
        try:
            return read_date(text)
        except ValueError as error:
            self.fail(str(error), position)

    def timestamp_value(self, text: str, position: int) -> dt.datetime:
        try:
            return read_timestamp(text)
        except ValueError as error:
            self.fail(str(error), position)


def read_number(text: str) -> int | float:
    if len(text) > MAX_NUMBER_CHARS:
        raise ValueError(f"this number is longer than {MAX_NUMBER_CHARS} characters")
    if re.fullmatch(r"[+-]?\d+", text):
        return int(text)
    number = float(text)
    if not math.isfinite(number):
        raise ValueError("this number is out of range")
    return number


def read_date(text: str) -> dt.date:
    if not _DATE_TEXT.fullmatch(text):
        raise ValueError(f"a date is written YYYY-MM-DD, as in {DATE_FORM}")
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise ValueError(f"{text!r} is not a calendar date") from None


def read_timestamp(text: str) -> dt.datetime:
    match = _TIMESTAMP_TEXT.fullmatch(text)
    if match is None:
        if _TIMESTAMP_LIKE.match(text):
            raise ValueError(f"a timestamp must be in UTC and end with Z, as in {TIMESTAMP_FORM}")
        raise ValueError(f"a timestamp is written as in {TIMESTAMP_FORM}")
    day, hour, minute, second, fraction = match.groups()
    try:
        date = dt.date.fromisoformat(day)
        return dt.datetime(
            date.year,
            date.month,
            date.day,
            int(hour),
            int(minute),
            int(second),
            int((fraction or "0").ljust(6, "0")),
            tzinfo=dt.UTC,
        )
    except ValueError:
        raise ValueError(f"{text!r} is not a valid UTC timestamp") from None


# cql2-json ---------------------------------------------------------------------------------


def parse_json(value: Any) -> Node:
    """Decoded cql2-json into the tree; errors carry ``path``, a JSON path to the fault."""
    _check_json_shape(value)
    return _JsonParser().predicate(value, "$")


def _check_json_shape(value: Any) -> None:
    """Depth and size limits, checked iteratively before any recursion."""
    stack: list[tuple[Any, int]] = [(value, 0)]
    while stack:
        item, depth = stack.pop()
        if depth > 2 * MAX_DEPTH + 2:
            raise FilterTooLarge(
                f"the filter nests deeper than {MAX_DEPTH} levels", limit=MAX_DEPTH
            )
        if isinstance(item, dict):
            stack.extend((child, depth + 1) for child in item.values())
        elif isinstance(item, list):
            if len(item) > MAX_LIST_ITEMS:
                raise FilterTooLarge(
                    f"a list holds more than {MAX_LIST_ITEMS} values", limit=MAX_LIST_ITEMS
                )
            stack.extend((child, depth + 1) for child in item)
    try:
        size = len(json.dumps(value, ensure_ascii=False).encode("utf-8", "surrogatepass"))
    except (TypeError, ValueError):
        raise FilterSyntaxError("the filter is not valid JSON data", position=0) from None
    if size > MAX_TEXT_BYTES:
        raise FilterTooLarge(
            f"the filter is longer than {MAX_TEXT_BYTES} bytes", limit=MAX_TEXT_BYTES
        )


class _JsonParser:
    def __init__(self) -> None:
        self.depth = 0

    def fail(self, message: str, path: str) -> NoReturn:
        raise FilterSyntaxError(f"{message} (at {path})", position=0, path=path)

    def enter(self) -> None:
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise FilterTooLarge(
                f"the filter nests deeper than {MAX_DEPTH} levels", limit=MAX_DEPTH
            )

    def operation(self, value: Any, path: str) -> tuple[str, list[Any]]:
        if not isinstance(value, dict) or set(value) != {"op", "args"}:
            self.fail('expected an object {"op": ..., "args": [...]}', path)
        op, args = value["op"], value["args"]
        if not isinstance(op, str) or not isinstance(args, list):
            self.fail('"op" must be a string and "args" a list', path)
        return op.lower(), args

    def arity(self, op: str, args: list[Any], count: int, path: str) -> None:
        if len(args) != count:
            self.fail(f"{op!r} takes {count} arguments, not {len(args)}", path)

    def predicate(self, value: Any, path: str) -> Node:
        if isinstance(value, bool):
            return BooleanConstant(value)
        op, args = self.operation(value, path)
        self.enter()
        try:
            return self._predicate(op, args, path)
        finally:
            self.depth -= 1

    def _predicate(self, op: str, args: list[Any], path: str) -> Node:
        def sub(index: int) -> str:
            return f"{path}.args[{index}]"

        if op in ("and", "or"):
            if len(args) < 2:
                self.fail(f"{op!r} takes at least 2 arguments", path)
            parts = [self.predicate(arg, sub(i)) for i, arg in enumerate(args)]
            return conjunction(parts) if op == "and" else disjunction(parts)
        if op == "not":
            self.arity(op, args, 1, path)
            return Not(self.predicate(args[0], sub(0)))
        if op in _COMPARISONS:
            self.arity(op, args, 2, path)
            return Comparison(
                _COMPARISONS[op], self.scalar(args[0], sub(0)), self.scalar(args[1], sub(1))
            )
        if op == "like":
            self.arity(op, args, 2, path)
            return Like(self.scalar(args[0], sub(0)), self.scalar(args[1], sub(1)))
        if op == "between":
            self.arity(op, args, 3, path)
            return Between(*(self.scalar(arg, sub(i)) for i, arg in enumerate(args)))
        if op == "in":
            self.arity(op, args, 2, path)
            if not isinstance(args[1], list) or not args[1]:
                self.fail("the second argument of 'in' must be a non-empty list", sub(1))
            items = tuple(self.scalar(item, f"{sub(1)}[{i}]") for i, item in enumerate(args[1]))
            return In(self.scalar(args[0], sub(0)), items)
        if op == "isnull":
            self.arity(op, args, 1, path)
            return IsNull(self.scalar(args[0], sub(0)))
        if op in _TEMPORALS:
            self.arity(op, args, 2, path)
            return TemporalPredicate(
                _TEMPORALS[op], self.scalar(args[0], sub(0)), self.scalar(args[1], sub(1))
            )
        if op in _ARRAYS:
            self.arity(op, args, 2, path)
            return ArrayPredicate(
                _ARRAYS[op], self.scalar(args[0], sub(0)), self.scalar(args[1], sub(1))
            )
        self.fail(f"{op!r} is not an operator this service knows", path)

    def scalar(self, value: Any, path: str) -> Expression:
        if isinstance(value, bool):
            return BooleanLiteral(value)
        if isinstance(value, int | float):
            if isinstance(value, float) and not math.isfinite(value):
                self.fail("numbers must be finite", path)
            return NumberLiteral(value)
        if isinstance(value, str):
            return StringLiteral(value)
        if isinstance(value, list):
            self.enter()
            items = tuple(self.scalar(item, f"{path}[{i}]") for i, item in enumerate(value))
            self.depth -= 1
            return ArrayLiteral(items)
        if not isinstance(value, dict):
            self.fail("expected a value, a property or a function", path)
        if set(value) == {"property"}:
            name = value["property"]
            if not isinstance(name, str) or not name:
                self.fail("a property name must be a non-empty string", path)
            return Property(name)
        if set(value) == {"date"}:
            return DateLiteral(self.instant(read_date, value["date"], path))
        if set(value) == {"timestamp"}:
            return TimestampLiteral(self.instant(read_timestamp, value["timestamp"], path))
        if set(value) == {"interval"}:
            ends = value["interval"]
            if not isinstance(ends, list) or len(ends) != 2:
                self.fail("an interval is a list of two ends", path)
            return IntervalLiteral(
                self.interval_end(ends[0], f"{path}.interval[0]"),
                self.interval_end(ends[1], f"{path}.interval[1]"),
            )
        op, args = self.operation(value, path)
        if op not in ("casei", "accenti"):
            self.fail(f"{op!r} is not a function that gives a value", path)
        self.arity(op, args, 1, path)
        self.enter()
        inner = self.scalar(args[0], f"{path}.args[0]")
        self.depth -= 1
        return CaseInsensitive(inner) if op == "casei" else AccentInsensitive(inner)

    def instant(self, reader: Callable[[str], Any], text: Any, path: str) -> Any:
        if not isinstance(text, str):
            self.fail("dates and timestamps are strings", path)
        try:
            return reader(text)
        except ValueError as error:
            self.fail(str(error), path)

    def interval_end(self, value: Any, path: str) -> IntervalEnd:
        if value == "..":
            return OpenEnd()
        if isinstance(value, str):
            if _DATE_TEXT.fullmatch(value):
                return DateLiteral(self.instant(read_date, value, path))
            return TimestampLiteral(self.instant(read_timestamp, value, path))
        end = self.scalar(value, path)
        if isinstance(end, DateLiteral | TimestampLiteral | Property):
            return end
        self.fail("an interval end is '..', a date, a timestamp or a property", path)
