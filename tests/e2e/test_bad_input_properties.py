"""Property tests: whatever a caller sends as a filter or a batch, the answer is the contract's.

Bodies are serialised here, not by the HTTP client, so they can hold what clients refuse to
write: ``NaN`` and ``Infinity`` (which Python's own parser accepts), lone surrogates, invalid
UTF-8 and arbitrary bytes. A rejected write must leave the store exactly as it was.
"""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

from hypothesis import HealthCheck, event, example, given, settings
from hypothesis import strategies as st

from tests.api_helpers import BIKE_SCHEMA, Api

PROPERTY_SETTINGS = settings(
    max_examples=40,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
FILTER_CODES = {"filter_syntax", "filter_unknown_attribute", "filter_type", "filter_too_large"}
ALLOWED = {
    400: FILTER_CODES | {"malformed_json"},
    422: {"invalid_request", "invalid_documents", "limit_exceeded"},
}
ATTRIBUTES = [*BIKE_SCHEMA["attributes"], "colour", "id", "title"]
OPS = ["=", "<>", "<", "<=", ">", ">=", "and", "or", "not", "like", "in", "between", "isNull"]
OPS += ["a_contains", "t_after", "t_before", "t_intersects", "date", "timestamp", "interval"]
SEED_DOCUMENTS = [
    {
        "id": "ridge-2023",
        "title": "Ridge manual",
        "text": "Brakes: squeeze both levers before every ride.",
        "attributes": {"model": "Ridge", "model_year": 2023, "effective": "2023-04-01"},
    },
    {
        "id": "summit-2021",
        "text": "Tyres: check the pressure weekly.",
        "attributes": {"model": "Summit", "price": 12.5, "published": "2021-06-01T08:00:00Z"},
        "access": ["staff"],
    },
]


def is_standard_json(raw: bytes) -> bool:
    def refuse(constant: str) -> Any:
        raise ValueError(constant)

    try:
        json.loads(raw.decode("utf-8"), parse_constant=refuse)
    except (ValueError, RecursionError):
        return False
    return True


def send(api: Api, path: str, raw: bytes) -> Any:
    return api.post(path, content=raw, headers={"Content-Type": "application/json"})


def encode(body: Any) -> bytes:
    """JSON text as a careless client writes it: NaN, Infinity and lone surrogates allowed."""
    return json.dumps(body, allow_nan=True, ensure_ascii=True).encode("ascii")


def assert_contract_error_or_success(response: Any, raw: bytes | None = None) -> None:
    status = response.status_code
    assert status < 500, response.text
    event(f"{status} {response.json().get('error', {}).get('code', '') if status != 200 else ''}")
    if raw is not None and not is_standard_json(raw):
        assert status == 400, response.text
        assert response.json()["error"]["code"] == "malformed_json"
        return
    if status == 200:
        return
    assert status in ALLOWED, response.text
    error = response.json()["error"]
    assert error["code"] in ALLOWED[status], response.text
    assert isinstance(error["message"], str) and error["message"]
    if error["code"] == "filter_syntax":
        assert isinstance(error["position"], int)
    if error["code"] == "invalid_request":
        assert isinstance(error["field"], str)
    if error["code"] == "limit_exceeded":
        assert isinstance(error["limit"], str)
    text = response.text.lower()
    assert "traceback" not in text and "sqlalchemy" not in text


def store_snapshot(api: Api) -> Any:
    listing = api.get("/v1/collections/bikes/documents", params={"limit": 1000}).json()
    collection = api.get("/v1/collections/bikes").json()
    full = [
        api.get(f"/v1/collections/bikes/documents/{d['id']}").json() for d in listing["documents"]
    ]
    return full, collection["documents"], collection["chunks"], collection["revision"]


def seeded(bikes: Api) -> Api:
    response = bikes.post("/v1/collections/bikes/documents", json={"documents": SEED_DOCUMENTS})
    assert response.status_code == 200, response.text
    return bikes


# -- values ---------------------------------------------------------------------------------------

huge_integers = st.one_of(
    st.integers(),
    st.integers(min_value=2**53 - 2, max_value=2**53 + 2),
    st.integers(min_value=10**300, max_value=10**400),
    st.integers(min_value=-(10**400), max_value=-(10**300)),
)
any_floats = st.floats(allow_nan=True, allow_infinity=True)
any_strings = st.text(max_size=40)
# Dates and datetimes at and past the edges of the calendar, and ones that are not dates at all.
date_strings = st.one_of(
    st.dates().map(lambda d: d.isoformat()),
    st.sampled_from(["0000-01-01", "10000-01-01", "2024-02-30", "2023-13-01", "99999-12-31"]),
    st.from_regex(r"\A\d{4}-\d{2}-\d{2}\Z"),
)
datetime_strings = st.one_of(
    st.datetimes(timezones=st.timezones()).map(lambda d: d.isoformat()),
    st.datetimes().map(lambda d: d.isoformat()),
    st.datetimes(min_value=dt.datetime(9999, 12, 31), timezones=st.just(dt.UTC)).map(
        lambda d: d.replace(tzinfo=dt.timezone(dt.timedelta(hours=-12))).isoformat()
    ),
    st.sampled_from(
        [
            "0001-01-01T00:00:00+14:00",
            "9999-12-31T23:59:59-14:00",
            "2024-05-01T25:00:00Z",
            "2024-05-01T09:30:00+24:00",
        ]
    ),
    st.from_regex(r"\A\d{4}-\d{2}-\d{2}T\d{2}:\d{2}(:\d{2})?(Z|[+-]\d{2}:\d{2})\Z"),
)
scalars = st.one_of(
    st.none(), st.booleans(), huge_integers, any_floats, any_strings, date_strings, datetime_strings
)
json_values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(any_strings, inner, max_size=4),
    max_leaves=12,
)


def deeply_nested(depth: int, leaf: Any) -> Any:
    value = leaf
    for level in range(depth):
        value = [value] if level % 2 else {"a": value}
    return value


deep_values = st.builds(deeply_nested, st.integers(min_value=1, max_value=900), scalars)


# -- filters --------------------------------------------------------------------------------------

valid_filter_texts = st.sampled_from(
    [
        "model = 'Ridge' AND model_year >= 2022",
        "price BETWEEN 9.5 AND 20",
        "effective > DATE('2023-01-01')",
        "published <= TIMESTAMP('2024-05-01T09:30:00Z')",
        "A_CONTAINS(tags, ('brakes'))",
        "NOT (model IN ('Ridge', 'Summit') OR discontinued = true)",
        "T_INTERSECTS(effective, INTERVAL('2023-01-01', '..'))",
    ]
)


def mutate(text: str, position: int, insert: str, cut: int) -> str:
    at = position % (len(text) + 1)
    return text[:at] + insert + text[at + cut :]


filter_texts = st.one_of(
    st.text(max_size=120),
    st.builds(
        mutate, valid_filter_texts, st.integers(0, 200), st.text(max_size=6), st.integers(0, 5)
    ),
    st.builds(
        lambda attr, op, value: f"{attr} {op} {value}",
        st.sampled_from(ATTRIBUTES),
        st.sampled_from(["=", "<", ">=", "<>", "LIKE", "IN", "BETWEEN", "IS"]),
        st.one_of(
            huge_integers.map(str),
            st.floats(allow_nan=False, allow_infinity=False).map(repr),
            st.sampled_from(["NaN", "Infinity", "-inf", "1e999", "-1e-999", "0x10", "1_000"]),
            date_strings.map(lambda d: f"DATE('{d}')"),
            datetime_strings.map(lambda d: f"TIMESTAMP('{d}')"),
            any_strings.map(lambda s: "'" + s.replace("'", "''") + "'"),
        ),
    ),
    st.integers(1, 2000).map(lambda n: "(" * n + "price > 1" + ")" * n),
    st.integers(1, 2000).map(lambda n: "NOT " * n + "price > 1"),
)
cql2_json_filters = st.recursive(
    st.one_of(
        st.fixed_dictionaries({"property": st.sampled_from(ATTRIBUTES) | any_strings}),
        json_values,
    ),
    lambda inner: (
        st.fixed_dictionaries(
            {"op": st.sampled_from(OPS) | any_strings, "args": st.lists(inner, max_size=3)}
        )
        | st.lists(inner, max_size=3)
    ),
    max_leaves=10,
)
any_filter = st.one_of(filter_texts, cql2_json_filters, deep_values, json_values)


@PROPERTY_SETTINGS
@given(
    filter_value=any_filter,
    mode=st.sampled_from(["hybrid", "lexical", "semantic"]),
    route=st.sampled_from(["search", "context"]),
)
def test_any_filter_in_a_search_gets_a_result_or_a_contract_error(
    bikes: Api, filter_value: Any, mode: str, route: str
) -> None:
    api = seeded(bikes) if bikes.get("/v1/collections/bikes").json()["documents"] == 0 else bikes
    raw = encode({"query": "brakes tyres", "filter": filter_value, "mode": mode})
    response = send(api, f"/v1/collections/bikes/{route}", raw)
    assert_contract_error_or_success(response, raw)


@PROPERTY_SETTINGS
@given(filter_text=filter_texts.filter(lambda t: all(not 0xD800 <= ord(c) <= 0xDFFF for c in t)))
def test_any_filter_in_a_document_listing_gets_a_result_or_a_contract_error(
    bikes: Api, filter_text: str
) -> None:
    response = bikes.get("/v1/collections/bikes/documents", params={"filter": filter_text})
    assert_contract_error_or_success(response)


@PROPERTY_SETTINGS
@given(
    field=st.sampled_from(
        ["query", "top_k", "depth", "rrf_k", "mode", "query_vector", "time_window"]
    ),
    value=st.one_of(json_values, deep_values),
)
def test_any_value_in_any_search_field_gets_a_result_or_a_contract_error(
    bikes: Api, field: str, value: Any
) -> None:
    raw = encode({"query": "brakes", field: value})
    response = send(bikes, "/v1/collections/bikes/search", raw)
    assert_contract_error_or_success(response, raw)


@settings(PROPERTY_SETTINGS, max_examples=50)
@given(raw=st.binary(max_size=300))
def test_random_bytes_as_a_body_are_malformed_json_or_an_invalid_request(
    bikes: Api, raw: bytes
) -> None:
    before = bikes.get("/v1/collections/bikes").json()
    for path in ("/v1/collections/bikes/documents", "/v1/collections/bikes/search"):
        response = send(bikes, path, raw)
        assert response.status_code in (400, 422), response.text
        assert_contract_error_or_success(response, raw)
    assert bikes.get("/v1/collections/bikes").json() == before


# -- document batches -----------------------------------------------------------------------------

attribute_values = st.one_of(
    st.fixed_dictionaries({"model": any_strings | json_values}),
    st.fixed_dictionaries({"model_year": huge_integers | any_floats | json_values}),
    st.fixed_dictionaries({"price": huge_integers | any_floats | json_values}),
    st.fixed_dictionaries({"effective": date_strings | json_values}),
    st.fixed_dictionaries({"published": datetime_strings | json_values}),
    st.fixed_dictionaries({"tags": st.lists(any_strings | json_values, max_size=3)}),
    st.fixed_dictionaries({"discontinued": json_values}),
    st.dictionaries(any_strings, json_values, max_size=3),
    deep_values,
    json_values,
)
documents = st.one_of(
    st.fixed_dictionaries(
        {
            "id": st.from_regex(r"\A[a-z]{1,8}\Z"),
            "text": st.sampled_from(["Brakes need pads.", "Tyres and chains."])
            | any_strings
            | json_values
            | deep_values,
        },
        optional={
            "title": any_strings | json_values,
            "media_type": st.sampled_from(["text/plain", "text/html", "application/pdf"])
            | json_values,
            "source_url": any_strings | json_values,
            "attributes": attribute_values,
            "access": st.lists(any_strings, max_size=3) | json_values,
            "extra_field": json_values,
        },
    ),
    st.fixed_dictionaries({"id": json_values | any_strings, "text": any_strings}),
    json_values,
    deep_values,
)


EVERY_TYPE_FILTER = (
    "price > 0 OR model_year > 0 OR effective > DATE('2000-01-01') OR "
    "published > TIMESTAMP('2000-01-01T00:00:00Z') OR A_CONTAINS(tags, ('x')) OR "
    "discontinued = true OR model = 'x'"
)


@PROPERTY_SETTINGS
@example(attributes={"price": 10**400})
@example(attributes={"published": "9999-12-31T23:59:59-01:00"})
@example(attributes={"published": "0001-01-01T00:00:00+01:00"})
@example(attributes={"effective": "0001-01-01", "price": -1.7976931348623157e308})
@given(attributes=attribute_values)
def test_any_attribute_value_is_stored_or_rejected_as_an_invalid_document(
    bikes: Api, attributes: Any
) -> None:
    before = store_snapshot(bikes)
    document = {"id": "edge-doc", "text": "Brakes need pads.", "attributes": attributes}
    raw = encode({"documents": [document]})
    response = send(bikes, "/v1/collections/bikes/documents", raw)
    assert_contract_error_or_success(response, raw)
    if response.status_code != 200:
        assert store_snapshot(bikes) == before
        if is_standard_json(raw):
            assert response.json()["error"]["code"] == "invalid_documents"
        return
    # Whatever was accepted can be read back and filtered on by both filter engines.
    assert bikes.get("/v1/collections/bikes/documents/edge-doc").status_code == 200
    search = {"query": "brakes", "filter": EVERY_TYPE_FILTER}
    assert bikes.post("/v1/collections/bikes/search", json=search).status_code == 200
    listing = bikes.get("/v1/collections/bikes/documents", params={"filter": EVERY_TYPE_FILTER})
    assert listing.status_code == 200


@PROPERTY_SETTINGS
@given(batch=st.lists(documents, min_size=0, max_size=5) | json_values)
def test_any_batch_is_written_whole_or_rejected_leaving_the_store_unchanged(
    bikes: Api, batch: Any
) -> None:
    api = seeded(bikes) if bikes.get("/v1/collections/bikes").json()["documents"] == 0 else bikes
    before = store_snapshot(api)
    raw = encode({"documents": batch})
    response = send(api, "/v1/collections/bikes/documents", raw)
    assert_contract_error_or_success(response, raw)
    if response.status_code != 200:
        assert store_snapshot(api) == before
    else:
        written = {r["id"] for r in response.json()["results"]}
        assert written == {d["id"] for d in batch}


@PROPERTY_SETTINGS
@given(
    position=st.integers(min_value=0, max_value=10_000),
    poison=st.sampled_from([b"NaN", b"Infinity", b"-Infinity", b"\xff", b"\xc3", b"\xed\xa0\x80"]),
)
def test_a_valid_batch_with_a_non_json_token_or_bad_utf8_is_malformed_json(
    bikes: Api, position: int, poison: bytes
) -> None:
    api = seeded(bikes) if bikes.get("/v1/collections/bikes").json()["documents"] == 0 else bikes
    before = store_snapshot(api)
    batch = [{"id": "new-doc", "text": "Brakes and pads.", "attributes": {"price": 1.5}}]
    raw = json.dumps({"documents": batch}).encode()
    if poison.isalpha() or poison.startswith(b"-"):
        raw = raw.replace(b"1.5", poison)
    else:
        at = raw.index(b"Brakes") + position % len("Brakes and pads.")
        raw = raw[:at] + poison + raw[at:]
    response = send(api, "/v1/collections/bikes/documents", raw)
    assert response.status_code == 400, response.text
    assert response.json()["error"]["code"] == "malformed_json"
    assert store_snapshot(api) == before


@PROPERTY_SETTINGS
@given(replacement=documents)
def test_a_batch_with_one_invalid_document_writes_none_of_it(bikes: Api, replacement: Any) -> None:
    api = seeded(bikes) if bikes.get("/v1/collections/bikes").json()["documents"] == 0 else bikes
    before = store_snapshot(api)
    good = {"id": "good-doc", "text": "Chains need oil.", "attributes": {"model_year": 2020}}
    bad = {"id": "bad-doc", "text": "Pads.", "attributes": {"model_year": "not a year"}}
    raw = encode({"documents": [good, replacement, bad]})
    response = send(api, "/v1/collections/bikes/documents", raw)
    assert_contract_error_or_success(response, raw)
    assert response.status_code in (400, 422)
    assert store_snapshot(api) == before
