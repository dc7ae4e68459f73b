"""What the log records of one request share: the name of its key and its trace, once known.

The access log opens one ``RequestFacts`` per request in a context variable; the caller
dependency notes the key, the trace recorder the trace. Work handed to a thread runs in a copy
of the context, which holds the same object, so what a worker notes is seen by the access log.
"""

from __future__ import annotations

from contextvars import ContextVar, Token
from dataclasses import dataclass


@dataclass
class RequestFacts:
    key_name: str | None = None
    trace_id: str | None = None


_current: ContextVar[RequestFacts | None] = ContextVar("excerpta_request", default=None)


def open_request() -> Token[RequestFacts | None]:
    return _current.set(RequestFacts())


def close_request(token: Token[RequestFacts | None]) -> None:
    _current.reset(token)


def current_request() -> RequestFacts | None:
    """The facts of the request being served, or None outside one (a CLI command, a worker)."""
    return _current.get()


def note_key(name: str) -> None:
    facts = _current.get()
    if facts is not None:
        facts.key_name = name


def note_trace(trace_id: str) -> None:
    facts = _current.get()
    if facts is not None:
        facts.trace_id = trace_id
