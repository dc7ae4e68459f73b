"""The query routes' fast parse takes a body only where the framework's parse agrees exactly.

Whatever the fast parse declines goes on to the framework's route, so declining is always safe;
taking a body the framework would read differently (or refuse) is the failure looked for here.
The framework's parse is the query routes' strict JSON parse followed by model validation.
"""

from __future__ import annotations

import json
from typing import Any

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from service.api.fast_path import parse_query_body
from service.api.routing import strict_json
from service.api.schemas import AnswerIn, ContextIn, SearchIn

MODELS = (SearchIn, ContextIn, AnswerIn)
FIELDS = [*AnswerIn.model_fields, "extra"]

json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**70), max_value=2**70)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=12),
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4)
    ),
    max_leaves=12,
)
field_values = st.one_of(
    json_values,
    st.text(min_size=1, max_size=20),
    st.integers(min_value=-5, max_value=20_000),
    st.sampled_from(["hybrid", "lexical", "semantic", "HYBRID"]),
    st.lists(st.floats(allow_nan=False, allow_infinity=False, width=32), max_size=4),
    st.fixed_dictionaries({"attribute": st.text(max_size=5), "last": st.text(max_size=5)}),
)


def framework_parse(model: type[SearchIn], raw: bytes) -> SearchIn | None:
    try:
        return model.model_validate(strict_json(raw))
    except (json.JSONDecodeError, ValidationError):
        return None


def agree(model: type[SearchIn], raw: bytes) -> SearchIn | None:
    fast = parse_query_body(model, raw)
    if fast is not None:
        assert fast == framework_parse(model, raw)
    return fast


@settings(max_examples=300, deadline=None)
@given(
    model=st.sampled_from(MODELS),
    pairs=st.lists(st.tuples(st.sampled_from(FIELDS), field_values), max_size=6),
    ensure_ascii=st.booleans(),
)
def test_a_body_the_fast_parse_takes_reads_as_the_framework_reads_it(
    model: type[SearchIn], pairs: list[tuple[str, Any]], ensure_ascii: bool
) -> None:
    # Written by hand so that a field may repeat, as a client's serialiser never would.
    members = [f"{json.dumps(k)}: {json.dumps(v, ensure_ascii=ensure_ascii)}" for k, v in pairs]
    agree(model, ("{" + ", ".join(members) + "}").encode())


@given(raw=st.binary(max_size=200))
@example(raw=b'{"query": "brakes", "top_k": NaN}')
@example(raw=b'{"query": "brakes", "query_vector": [Infinity]}')
@example(raw=b'{"query": "\\ud800"}')
@example(raw=b'{"query": "brakes", "top_k": 1e400}')
@example(raw=b'{"query": "x"' + b"\xff}")
@example(raw=b"[" * 5000 + b"]" * 5000)
def test_arbitrary_bytes_are_taken_only_where_the_framework_agrees(raw: bytes) -> None:
    agree(SearchIn, raw)


@pytest.mark.parametrize(
    "body",
    [
        {"query": "brakes"},
        {"query": "brakes", "filter": "model = 'Ridge'", "top_k": 3, "mode": "lexical"},
        {"query": "brakes", "query_vector": [0.25, -1.5e-3], "depth": 50, "rrf_k": 60},
        {"query": "tyres", "time_window": {"attribute": "published", "last": "P30D"}},
    ],
)
def test_an_ordinary_query_takes_the_fast_parse(body: dict[str, Any]) -> None:
    assert agree(SearchIn, json.dumps(body).encode()) is not None
