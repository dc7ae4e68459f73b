"""The HTTP bench's client: one keep-alive HTTP/1.1 connection sending requests built in advance.

The one-client latency is the server's time plus the client's own. A general client library
spends a noticeable share of a millisecond of CPU per request parsing and building messages,
which the figures would charge to the server; this client builds each request's bytes once,
before the clock starts, and reads a response with a few buffer searches, as dedicated load
generators do.
"""

from __future__ import annotations

import socket
from dataclasses import dataclass

_RECEIVE_BYTES = 65_536
_HEADER_END = b"\r\n\r\n"


class ProtocolError(Exception):
    """The server's bytes were not an HTTP/1.1 response this client can read."""


@dataclass(frozen=True)
class Response:
    status: int
    headers: dict[str, str]
    body: bytes


def build_request(method: str, path: str, headers: dict[str, str], body: bytes) -> bytes:
    """The bytes of one request, with its Content-Length."""
    lines = [f"{method} {path} HTTP/1.1"]
    lines += [f"{name}: {value}" for name, value in headers.items()]
    lines.append(f"Content-Length: {len(body)}")
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + body


class KeepAliveClient:
    """Sends requests over one connection, reopened after the server closes it or a failure."""

    def __init__(self, host: str, port: int, timeout: float) -> None:
        self.host = host
        self.port = port
        self._timeout = timeout
        self._socket: socket.socket | None = None
        self._buffer = bytearray()
        self.connect()

    def connect(self) -> None:
        self.close()
        connection = socket.create_connection((self.host, self.port), timeout=self._timeout)
        connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self._socket = connection

    def close(self) -> None:
        if self._socket is not None:
            self._socket.close()
            self._socket = None
        self._buffer.clear()

    def send(self, request: bytes) -> Response:
        """One request and its whole response; on any failure the connection is reopened."""
        if self._socket is None:
            self.connect()
        try:
            assert self._socket is not None
            self._socket.sendall(request)
            response = self._read_response()
        except (OSError, ProtocolError):
            self.close()
            raise
        if response.headers.get("connection", "").lower() == "close":
            self.close()
        return response

    def _read_response(self) -> Response:
        while (end := self._buffer.find(_HEADER_END)) < 0:
            self._receive()
        head = self._buffer[:end].decode("latin-1").split("\r\n")
        del self._buffer[: end + len(_HEADER_END)]
        status = _status(head[0])
        headers: dict[str, str] = {}
        for line in head[1:]:
            name, colon, value = line.partition(":")
            if not colon:
                raise ProtocolError(f"a header line without a colon: {line!r}")
            headers[name.strip().lower()] = value.strip()
        if "chunked" in headers.get("transfer-encoding", "").lower():
            return Response(status, headers, self._chunked_body())
        if "content-length" in headers:
            return Response(status, headers, self._take(_length(headers["content-length"])))
        if status in (204, 304) or 100 <= status < 200:
            return Response(status, headers, b"")
        # Neither length nor chunks: the body runs to the end of the connection.
        while self._receive_or_end():
            pass
        body = bytes(self._buffer)
        self._buffer.clear()
        headers["connection"] = "close"
        return Response(status, headers, body)

    def _chunked_body(self) -> bytes:
        body = bytearray()
        while True:
            size_line = self._line()
            size = _length(size_line.split(";", 1)[0].strip(), base=16)
            if size == 0:
                while self._line():  # trailers, up to the empty line
                    pass
                return bytes(body)
            body += self._take(size)
            if self._take(2) != b"\r\n":
                raise ProtocolError("a chunk was not followed by CRLF")

    def _line(self) -> str:
        while (end := self._buffer.find(b"\r\n")) < 0:
            self._receive()
        line = self._buffer[:end].decode("latin-1")
        del self._buffer[: end + 2]
        return line

    def _take(self, count: int) -> bytes:
        while len(self._buffer) < count:
            self._receive()
        taken = bytes(self._buffer[:count])
        del self._buffer[:count]
        return taken

    def _receive(self) -> None:
        if not self._receive_or_end():
            raise ProtocolError("the server closed the connection before the response ended")

    def _receive_or_end(self) -> bool:
        assert self._socket is not None
        data = self._socket.recv(_RECEIVE_BYTES)
        self._buffer += data
        return bool(data)


def _status(line: str) -> int:
    parts = line.split(" ", 2)
    if len(parts) < 2 or not parts[0].startswith("HTTP/1.") or not parts[1].isdigit():
        raise ProtocolError(f"not an HTTP/1.x status line: {line!r}")
    return int(parts[1])


def _length(text: str, base: int = 10) -> int:
    try:
        value = int(text, base)
    except ValueError:
        raise ProtocolError(f"not a length: {text!r}") from None
    if value < 0:
        raise ProtocolError(f"a negative length: {text!r}")
    return value
