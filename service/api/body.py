"""Reading a request body ahead of the route, and handing it on as if it were unread."""

from __future__ import annotations

from collections.abc import Iterable

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.api.errors import error_response
from service.errors import PayloadTooLarge


async def read_body(receive: Receive, limit: int) -> tuple[list[Message], bool]:
    """The body's messages, and whether they stayed within ``limit`` bytes."""
    messages: list[Message] = []
    received = 0
    while True:
        message = await receive()
        messages.append(message)
        if message["type"] != "http.request":
            return messages, True
        received += len(message.get("body", b""))
        if received > limit:
            return messages, False
        if not message.get("more_body", False):
            return messages, True


def declares_more_than(headers: Iterable[tuple[bytes, bytes]], limit: int) -> bool:
    """Whether a Content-Length header announces a body over ``limit`` bytes."""
    return any(
        name == b"content-length" and value.isdigit() and int(value) > limit
        for name, value in headers
    )


def replay(messages: list[Message], receive: Receive) -> Receive:
    """A ``receive`` that gives the messages already read, then whatever comes after them."""
    pending = list(messages)

    async def replayed() -> Message:
        return pending.pop(0) if pending else await receive()

    return replayed


class BodySizeLimit:
    """Refuses bodies over the limit with 413, whether or not Content-Length is declared."""

    def __init__(self, app: ASGIApp, limit: int) -> None:
        self.app = app
        self.limit = limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        too_large = PayloadTooLarge(f"The request body may hold at most {self.limit} bytes.")
        if declares_more_than(scope.get("headers", []), self.limit):
            await error_response(too_large)(scope, receive, send)
            return
        messages, within_limit = await read_body(receive, self.limit)
        if not within_limit:
            await error_response(too_large)(scope, receive, send)
            return
        await self.app(scope, replay(messages, receive), send)
