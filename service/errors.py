"""Errors a caller can cause, one class per contract error code.

Every layer raises these; only the HTTP layer (``service.api.errors``) turns them into status
codes, and the CLI turns them into an exit status. Anything else that escapes is a bug and stays
a 500.

    ServiceError
    ├── MalformedJson                 body is not JSON
    ├── InvalidRequest                a field missing, of the wrong type or value (``field``)
    ├── InvalidFilter                 a filter the caller wrote is unusable
    │   ├── FilterSyntaxError         ``position`` and a caret excerpt
    │   ├── FilterUnknownAttribute    names the known attributes
    │   ├── FilterTypeError           operator, function or literal does not fit the type
    │   └── FilterTooLarge            text, nesting or IN-list size past the limits
    ├── Unauthenticated               no, unknown or revoked key
    ├── Forbidden                     the key's role does not allow the route
    ├── NotFound                      missing, or hidden from the caller
    │   ├── CollectionNotFound
    │   ├── DocumentNotFound
    │   ├── TraceNotFound
    │   └── JobNotFound
    ├── Conflict                      an attribute's type changed or left out, a name taken
    ├── PayloadTooLarge               the body exceeds the size limit
    ├── UnsupportedMediaType          a body sent as something other than JSON
    ├── InvalidDocuments              a batch with invalid documents (``documents``)
    ├── LimitExceeded                 a configured limit (``limit``)
    ├── RateLimited                   the key's rate limit (``retry_after`` seconds)
    ├── GeneratorUnavailable          the generator failed (``context`` attached)
    ├── Busy                          a write lost every retry against other writers
    │                                 (``retry_after`` seconds)
    └── StorageUnavailable            the store is gone, replaced, full, read-only or failing
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any


def quoted_names(names: Sequence[str]) -> str:
    """Names as a message lists them: ``'a'``, ``'a' and 'b'``, ``'a', 'b' and 'c'``."""
    quoted = [repr(name) for name in names]
    if len(quoted) <= 1:
        return "".join(quoted)
    return f"{', '.join(quoted[:-1])} and {quoted[-1]}"


class ServiceError(Exception):
    """Base of every error a caller can cause; ``code`` is the contract's snake_case code."""

    code = "service_error"

    def __init__(self, message: str, **extra: Any) -> None:
        super().__init__(message)
        self.message = message
        self.extra = extra

    def body(self) -> dict[str, Any]:
        return {"error": {"code": self.code, "message": self.message, **self.extra}}


class MalformedJson(ServiceError):
    code = "malformed_json"


class InvalidRequest(ServiceError):
    """Raised with ``field`` naming the offending field (dotted path)."""

    code = "invalid_request"

    def __init__(self, message: str, *, field: str, **extra: Any) -> None:
        super().__init__(message, field=field, **extra)


class InvalidFilter(ServiceError):
    code = "filter_invalid"


class FilterSyntaxError(InvalidFilter):
    """``position`` is the 0-based character offset in the filter text."""

    code = "filter_syntax"

    def __init__(self, message: str, *, position: int, excerpt: str = "", **extra: Any) -> None:
        super().__init__(message, position=position, excerpt=excerpt, **extra)


class FilterUnknownAttribute(InvalidFilter):
    code = "filter_unknown_attribute"

    def __init__(self, message: str, *, known: list[str], **extra: Any) -> None:
        super().__init__(message, known=known, **extra)


class FilterTypeError(InvalidFilter):
    code = "filter_type"


class FilterTooLarge(InvalidFilter):
    code = "filter_too_large"


class Unauthenticated(ServiceError):
    code = "unauthenticated"


class Forbidden(ServiceError):
    code = "forbidden"


class NotFound(ServiceError):
    code = "not_found"


class CollectionNotFound(NotFound):
    code = "collection_not_found"


class DocumentNotFound(NotFound):
    code = "document_not_found"


class TraceNotFound(NotFound):
    code = "trace_not_found"


class JobNotFound(NotFound):
    code = "job_not_found"


class Conflict(ServiceError):
    code = "conflict"


class PayloadTooLarge(ServiceError):
    code = "payload_too_large"


class UnsupportedMediaType(ServiceError):
    code = "unsupported_media_type"


class InvalidDocuments(ServiceError):
    """``documents`` lists ``{"id", "index", "reason"}`` for every rejected document."""

    code = "invalid_documents"

    def __init__(self, message: str, *, documents: list[dict[str, Any]]) -> None:
        super().__init__(message, documents=documents)


class LimitExceeded(ServiceError):
    code = "limit_exceeded"

    def __init__(self, message: str, *, limit: str, **extra: Any) -> None:
        super().__init__(message, limit=limit, **extra)


class RateLimited(ServiceError):
    code = "rate_limited"

    def __init__(self, message: str, *, retry_after: int) -> None:
        super().__init__(message)
        self.retry_after = retry_after


class GeneratorUnavailable(ServiceError):
    code = "generator_unavailable"

    def __init__(self, message: str, *, context: object | None = None) -> None:
        super().__init__(message)
        # The packed context the caller can still use; the API renders it into the body.
        self.context = context


class Busy(ServiceError):
    """A write lost a bounded number of retries against other writers; try again shortly."""

    code = "busy"

    def __init__(self, message: str, *, retry_after: int = 1) -> None:
        super().__init__(message)
        self.retry_after = retry_after


class StorageUnavailable(ServiceError):
    """The store cannot serve: it vanished, was replaced, is full, read-only or failing.

    The message says which, in words a caller can act on; the log names the path or URL.
    """

    code = "storage_unavailable"


def error_from_body(body: Mapping[str, Any]) -> ServiceError:
    """The error an error body describes, raised again where the sender of a job waits for it:
    the job ran in another process, which recorded the error's body on the job."""
    classes: dict[str, type[ServiceError]] = {}
    pending: list[type[ServiceError]] = [ServiceError]
    while pending:
        kind = pending.pop()
        classes.setdefault(kind.code, kind)
        pending.extend(kind.__subclasses__())
    kind = classes.get(str(body.get("code")), ServiceError)
    error = kind.__new__(kind)
    extra = {name: value for name, value in body.items() if name not in ("code", "message")}
    ServiceError.__init__(error, str(body.get("message", "")), **extra)
    if isinstance(error, Busy | RateLimited):
        error.retry_after = 1
    if isinstance(error, GeneratorUnavailable):
        error.context = None
    return error
