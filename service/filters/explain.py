"""Which clause of a filter keeps a row out: the first one, in the order written, that is not
TRUE for it, found by descending through the ANDs that hold it (an OR or a NOT is named whole,
since no single part of it decides)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from service.filters.columns import AttributeColumns
from service.filters.evaluate import evaluate_truth
from service.filters.inference.engine import node_attributes
from service.filters.render import to_text
from service.filters.syntax import And, Node

ClauseResult = Literal["false", "unknown"]


@dataclass(frozen=True)
class FailedClause:
    """``result`` is ``unknown`` when the clause reads an attribute the row lacks (CQL2's
    three-valued logic), ``false`` otherwise."""

    clause: str
    result: ClauseResult
    attributes: tuple[str, ...]


def failed_clauses(node: Node, columns: AttributeColumns) -> list[FailedClause | None]:
    """For each row of ``columns``: None where ``node`` is TRUE, else its first failing clause."""
    truths: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def truth(part: Node) -> tuple[np.ndarray, np.ndarray]:
        found = truths.get(id(part))
        if found is None:
            found = truths[id(part)] = evaluate_truth(part, columns)
        return found

    def failing(part: Node, row: int) -> FailedClause | None:
        true, false = truth(part)
        if true[row]:
            return None
        if isinstance(part, And):
            for arg in part.args:
                found = failing(arg, row)
                if found is not None:
                    return found
        return FailedClause(
            clause=to_text(part),
            result="false" if false[row] else "unknown",
            attributes=tuple(node_attributes(part)),
        )

    return [failing(node, row) for row in range(len(columns))]
