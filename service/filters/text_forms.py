"""The four forms of a string that CASEI and ACCENTI compare (OGC 21-065 clause 10).

One function for all engines: the ingest path stores these forms and the query path folds
literals with the same function, so ``CASEI(ACCENTI(x))`` and ``ACCENTI(CASEI(x))`` mean the
same everywhere (case folding first, then accent stripping).
"""

from __future__ import annotations

from typing import NamedTuple

from service.attributes import fold_case, strip_accents
from service.filters.syntax import AccentInsensitive, CaseInsensitive, Expression


class TextMode(NamedTuple):
    case_insensitive: bool = False
    accent_insensitive: bool = False


ALL_MODES = (
    TextMode(False, False),
    TextMode(True, False),
    TextMode(False, True),
    TextMode(True, True),
)


def text_form(text: str, mode: TextMode) -> str:
    if mode.case_insensitive:
        text = fold_case(text)
    if mode.accent_insensitive:
        text = strip_accents(text)
    return text


def unwrap(expression: Expression) -> tuple[Expression, TextMode]:
    """The expression inside any CASEI/ACCENTI wrappers, and the mode they ask for."""
    case_insensitive = accent_insensitive = False
    while isinstance(expression, CaseInsensitive | AccentInsensitive):
        if isinstance(expression, CaseInsensitive):
            case_insensitive = True
        else:
            accent_insensitive = True
        expression = expression.arg
    return expression, TextMode(case_insensitive, accent_insensitive)
