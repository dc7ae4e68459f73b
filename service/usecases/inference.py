"""``infer_filter`` on search, context and answer: the option, and the filter it infers.

The deterministic engine (``service.filters.inference``) reads a lexicon built once per index
version and kept while that version is in use. With ``"using": "chat-http"`` the configured
chat endpoint proposes the filter instead; its reply passes the same checks as any filter and
the same settling as the engine's clauses, and on anything unusable the deterministic result is
used and the trace says why.
"""

from __future__ import annotations

import datetime as dt
import threading
import time
import weakref
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.attributes import EPOCH_DATE, EPOCH_DATETIME, AttributeType, Schema
from service.errors import GeneratorUnavailable, InvalidFilter, InvalidRequest
from service.filters.check import check_filter
from service.filters.columns import PLAIN, AttributeColumns, KeywordColumn, KeywordListColumn
from service.filters.evaluate import evaluate
from service.filters.inference.engine import (
    Inference,
    InferenceScope,
    infer_clauses,
    proposals_from_filter,
    settle,
)
from service.filters.inference.hints import AttributeHints
from service.filters.inference.lexicon import Lexicon, build_lexicon
from service.filters.parse import parse_filter
from service.filters.render import timestamp_text, to_json, to_text
from service.filters.syntax import Node
from service.generation.filter_proposal import (
    MAX_SAMPLE_VALUES,
    AttributeSummary,
    ChatFilterProposer,
)
from service.index.collection_index import IndexSnapshot

INFER_MODES = ("off", "suggest", "apply")
INFER_USING = ("deterministic", "chat-http")


@dataclass(frozen=True, kw_only=True)
class InferOptions:
    """A request's ``infer_filter``, checked once at the edge."""

    mode: str = "off"
    now: dt.datetime | None = None
    """Anchors relative times; the server's clock when None."""
    using: str = "deterministic"

    @property
    def active(self) -> bool:
        return self.mode != "off"

    def as_request(self) -> str | dict[str, Any]:
        if self.now is None and self.using == "deterministic":
            return self.mode
        shown: dict[str, Any] = {"mode": self.mode, "using": self.using}
        if self.now is not None:
            shown["now"] = timestamp_text(self.now)
        return shown


OFF = InferOptions()


def infer_options(value: object) -> InferOptions:
    """``"off"``, ``"suggest"``, ``"apply"`` or ``{"mode", "now"?, "using"?}``."""
    if value is None:
        return OFF
    if isinstance(value, str):
        if value not in INFER_MODES:
            raise InvalidRequest(
                "infer_filter must be off, suggest, apply or an object with mode, now and using.",
                field="infer_filter",
            )
        return InferOptions(mode=value)
    if not isinstance(value, Mapping):
        raise InvalidRequest("infer_filter must be a string or an object.", field="infer_filter")
    unknown = sorted(set(value) - {"mode", "now", "using"})
    if unknown:
        raise InvalidRequest(
            f"infer_filter has no field {unknown[0]!r}.", field=f"infer_filter.{unknown[0]}"
        )
    mode = value.get("mode")
    if mode not in INFER_MODES:
        raise InvalidRequest(
            "infer_filter.mode must be off, suggest or apply.", field="infer_filter.mode"
        )
    using = value.get("using", "deterministic")
    if using not in INFER_USING:
        raise InvalidRequest(
            "infer_filter.using must be deterministic or chat-http.", field="infer_filter.using"
        )
    return InferOptions(mode=str(mode), now=_instant(value.get("now")), using=str(using))


def _instant(value: object) -> dt.datetime | None:
    if value is None:
        return None
    problem = (
        "infer_filter.now must be an ISO 8601 instant with an offset, such as 2025-03-15T12:00:00Z."
    )
    if not isinstance(value, str):
        raise InvalidRequest(problem, field="infer_filter.now")
    try:
        moment = dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        raise InvalidRequest(problem, field="infer_filter.now") from None
    if moment.tzinfo is None:
        raise InvalidRequest(problem, field="infer_filter.now")
    return moment.astimezone(dt.UTC)


@dataclass(frozen=True)
class InferredFilter:
    """What inference found for one request, and how."""

    inference: Inference
    using: str
    fallback: str | None
    """Why a model's proposal was not used, when it was asked for and failed."""
    milliseconds: float

    @property
    def node(self) -> Node | None:
        return self.inference.node

    def as_json(self) -> dict[str, Any] | None:
        """The response's ``inferred_filter``: null when nothing was found at all."""
        inference = self.inference
        if not inference.clauses and not inference.dropped:
            return None
        node = inference.node
        shown: dict[str, Any] = {
            "cql2_text": None if node is None else to_text(node),
            "cql2_json": None if node is None else to_json(node),
            "clauses": [clause.as_json() for clause in inference.clauses],
            "dropped": [dropped.as_json() for dropped in inference.dropped],
            "using": self.using,
        }
        if self.fallback is not None:
            shown["fallback"] = self.fallback
        return shown

    def trace(self) -> dict[str, Any]:
        """What the trace's filter stage records: the same, with the time it took."""
        return {
            "inferred_filter": self.as_json(),
            "inference_ms": self.milliseconds,
            "inference_using": self.using,
            **({"inference_fallback": self.fallback} if self.fallback else {}),
        }


class _Lexicons:
    """One lexicon per index version (snapshot), dropped with the snapshot."""

    def __init__(self) -> None:
        self._built: weakref.WeakKeyDictionary[
            IndexSnapshot, tuple[Mapping[str, AttributeHints], Schema, Lexicon]
        ] = weakref.WeakKeyDictionary()
        self._lock = threading.Lock()

    def of(
        self, snapshot: IndexSnapshot, schema: Schema, hints: Mapping[str, AttributeHints]
    ) -> Lexicon:
        with self._lock:
            found = self._built.get(snapshot)
        if found is not None and found[0] == hints and found[1] == schema:
            return found[2]
        lexicon = build_lexicon(schema, hints, snapshot.columns)
        with self._lock:
            self._built[snapshot] = (hints, schema, lexicon)
        return lexicon


_LEXICONS = _Lexicons()


def lexicon_for(
    snapshot: IndexSnapshot, schema: Schema, hints: Mapping[str, AttributeHints]
) -> Lexicon:
    return _LEXICONS.of(snapshot, schema, hints)


def infer_for_request(
    question: str,
    options: InferOptions,
    *,
    snapshot: IndexSnapshot,
    schema: Schema,
    hints: Mapping[str, AttributeHints],
    groups: frozenset[str] | None,
    explicit: Node | None,
    explicit_attributes: frozenset[str],
    proposer: ChatFilterProposer | None = None,
) -> InferredFilter:
    """The filter inferred for one request (see the module docstring)."""
    started = time.perf_counter()
    lexicon = lexicon_for(snapshot, schema, hints)
    visible = snapshot.live.copy()
    if groups is not None:
        visible &= snapshot.access.visible(groups)
    allowed = visible
    if explicit is not None and snapshot.columns is not None:
        allowed = visible & evaluate(explicit, snapshot.columns)
    elif explicit is not None:
        allowed = np.zeros_like(visible)
    scope = InferenceScope(
        columns=snapshot.columns,
        visible=visible,
        allowed=allowed,
        explicit=explicit_attributes,
        now=options.now or dt.datetime.now(dt.UTC),
    )
    fallback = None
    if options.using == "chat-http":
        assert proposer is not None, "the chat-http proposer is resolved before inference"
        try:
            proposed = proposer.propose(
                question, attribute_summaries(lexicon, snapshot.columns), scope.now
            )
            inference = _settled_proposal(proposed, lexicon, scope)
            return InferredFilter(inference, "chat-http", None, _since(started))
        except GeneratorUnavailable as exc:
            fallback = f"the chat endpoint failed ({exc.message})"
        except (InvalidFilter, ValueError) as exc:
            fallback = f"its reply was not a usable filter ({exc})"
        fallback = f"{fallback}; the deterministic inference was used instead"
    inference = infer_clauses(question, lexicon, scope)
    return InferredFilter(inference, "deterministic", fallback, _since(started))


def _since(started: float) -> float:
    return (time.perf_counter() - started) * 1000.0


def _settled_proposal(proposed: Any, lexicon: Lexicon, scope: InferenceScope) -> Inference:
    """A model's reply, checked like any filter and settled like the engine's clauses."""
    if proposed is None:
        return Inference((), ())
    if not isinstance(proposed, dict):
        raise ValueError("the reply is not a cql2-json object")
    node = check_filter(parse_filter(proposed), lexicon.schema)
    return settle(proposals_from_filter(node, "chat-http"), lexicon, scope)


def attribute_summaries(
    lexicon: Lexicon, columns: AttributeColumns | None
) -> list[AttributeSummary]:
    """What the chat endpoint is told of each attribute inference may use."""
    summaries = []
    for name, facts in lexicon.attributes.items():
        hints = lexicon.hints_of(name)
        column = None if columns is None else columns.columns.get(name)
        values: list[str] = []
        if isinstance(column, KeywordColumn):
            values = [str(v) for v in column.forms[PLAIN][:MAX_SAMPLE_VALUES].tolist()]
        elif isinstance(column, KeywordListColumn):
            values = [str(v) for v in column.dictionary[:MAX_SAMPLE_VALUES].tolist()]
        low = high = None
        if facts.low is not None and facts.high is not None:
            low, high = _bound(facts.type, facts.low), _bound(facts.type, facts.high)
        summaries.append(
            AttributeSummary(
                name=name,
                type=facts.type.value,
                description=hints.description,
                values=tuple(values),
                low=low,
                high=high,
            )
        )
    return summaries


def _bound(type_: AttributeType, value: float) -> str:
    if type_ is AttributeType.DATE:
        return (EPOCH_DATE + dt.timedelta(days=int(value))).isoformat()
    if type_ is AttributeType.DATETIME:
        return timestamp_text(EPOCH_DATETIME + dt.timedelta(microseconds=int(value)))
    return str(int(value)) if type_ is AttributeType.INTEGER else repr(value)
