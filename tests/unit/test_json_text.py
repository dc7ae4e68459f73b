"""``json_text`` against the standard library's encoder, the reference it replaces.

The reference is Python's ``json`` module as the framework's ``JSONResponse`` renders a body and
as SQLAlchemy writes a JSON column by default. The property: for any value of the kinds the
service encodes (strings, booleans, null, integers within JSON's exact range, finite floats,
lists and objects whose keys are strings or integers), both give the same JSON value when read
back, floats to the last bit.
"""

from __future__ import annotations

import json
from typing import Any

from fastapi.responses import JSONResponse
from hypothesis import given
from hypothesis import strategies as st

from service.api.responses import QueryResponse
from service.json_text import json_bytes, json_text

_EXACT_INTEGER = 2**53 - 1

_scalars = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-_EXACT_INTEGER, max_value=_EXACT_INTEGER)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(st.characters(codec="utf-8"))
)
_keys = st.text(st.characters(codec="utf-8")) | st.integers(-1000, 1000)
_values = st.recursive(
    _scalars,
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(_keys, inner, max_size=5),
    max_leaves=40,
)


@given(_values)
def test_the_store_encoding_reads_back_as_the_standard_library_s(value: Any) -> None:
    assert json.loads(json_text(value)) == json.loads(json.dumps(value))


@given(_values)
def test_a_query_response_reads_back_as_the_framework_s_json_response(value: Any) -> None:
    ours = QueryResponse(value)
    reference = JSONResponse(value)
    assert json.loads(ours.body) == json.loads(reference.body)
    assert ours.headers["content-type"] == reference.headers["content-type"]
    assert ours.headers["content-length"] == str(len(ours.body))


def test_floats_keep_every_bit_and_text_stays_unescaped() -> None:
    value = {"score": 0.1 + 0.2, "tiny": 5e-324, "big": 1.7976931348623157e308, "text": "Größe ✓"}
    encoded = json_bytes(value)
    assert json.loads(encoded) == value
    assert "Größe ✓".encode() in encoded


def test_an_integer_beyond_64_bits_is_written_exactly_as_the_standard_library_writes_it() -> None:
    # A caller may send one (a fuzzed top_k did); its trace records the body it sent.
    value = {"top_k": 10**30, "nested": [-(2**70), {"k": 2**64}], "text": "Größe"}
    assert json.loads(json_text(value)) == value
    assert (
        json_bytes(value) == json.dumps(value, ensure_ascii=False, separators=(",", ":")).encode()
    )
