"""Our cql2-text parser against the `cql2` package (PyPI ``cql2``, Python bindings of the
cql2-rs implementation of OGC 21-065): both turn the same text into the same cql2-json.

The only normalisations: numbers compare numerically (the package makes every number a float)
and property names compare without quoting (the JSON form has none).
"""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path
from typing import Any

import pytest

from service.filters.parse import parse_filter
from service.filters.render import to_json

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "filters" / "cql2_text_filters.jsonl"
CASES = [json.loads(line) for line in FIXTURE.read_text(encoding="utf-8").splitlines() if line]

# Every construct the filter issue lists; each needs at least three fixture filters.
CONSTRUCTS = {
    "and", "or", "not", "parentheses", "comparison", "like", "between", "in", "is_null",
    "string", "number", "boolean", "date", "timestamp", "interval", "open_interval",
    "interval_property", "casei", "accenti", "quoted_property", "keywords_any_case",
    "property_comparison", "a_contains", "a_containedby", "a_overlaps", "a_equals",
    "t_after", "t_before", "t_disjoint", "t_equals", "t_intersects", "t_contains", "t_during",
    "t_finishes", "t_finishedby", "t_meets", "t_metby", "t_overlaps", "t_overlappedby",
    "t_starts", "t_startedby",
}  # fmt: skip


def normalised(value: Any) -> Any:
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int | float):
        return float(value)
    if isinstance(value, list):
        return [normalised(item) for item in value]
    return {key: normalised(item) for key, item in value.items()}


def test_the_fixture_holds_at_least_three_filters_for_every_construct() -> None:
    counts = Counter(construct for case in CASES for construct in case["constructs"])
    assert len(CASES) >= 100
    assert set(counts) <= CONSTRUCTS
    assert {c: counts[c] for c in CONSTRUCTS if counts[c] < 3} == {}


@pytest.mark.parametrize("case", CASES, ids=[case["text"] for case in CASES])
def test_our_cql2_json_equals_the_reference_packages(case: dict[str, Any]) -> None:
    cql2 = pytest.importorskip("cql2")
    expected = cql2.parse_text(case["text"]).to_json()
    assert normalised(to_json(parse_filter(case["text"]))) == normalised(expected)
