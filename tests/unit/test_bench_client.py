"""The bench's keep-alive client against the standard library's HTTP/1.1 server.

The reference peer is ``http.server`` (Python's standard library) in HTTP/1.1 mode on
127.0.0.1; the response framings it sends (Content-Length, chunked transfer coding, a body
ended by closing the connection) are those of RFC 9112, sections 6 and 7.
"""

from __future__ import annotations

import json
import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import ClassVar

import pytest

from service.bench.client import KeepAliveClient, ProtocolError, build_request


class _Handler(BaseHTTPRequestHandler):
    protocol_version = "HTTP/1.1"
    connections: ClassVar[set[tuple[str, int]]] = set()

    def log_message(self, format: str, *args: object) -> None:
        pass

    def do_POST(self) -> None:
        _Handler.connections.add(self.client_address)
        length = int(self.headers.get("Content-Length", "0"))
        received = self.rfile.read(length)
        echo = json.dumps(
            {
                "path": self.path,
                "body": received.decode(),
                "authorization": self.headers.get("Authorization"),
            }
        ).encode()
        if self.path == "/chunked":
            self.send_response(200)
            self.send_header("Transfer-Encoding", "chunked")
            self.end_headers()
            for start in range(0, len(echo), 7):
                piece = echo[start : start + 7]
                self.wfile.write(f"{len(piece):x};note=1\r\n".encode() + piece + b"\r\n")
            self.wfile.write(b"0\r\nX-Trailer: yes\r\n\r\n")
        elif self.path == "/until-close":
            self.send_response(200)
            self.send_header("Connection", "close")
            self.end_headers()
            self.wfile.write(echo)
            self.close_connection = True
        elif self.path == "/garbage":
            self.wfile.write(b"SPDY/9 nonsense\r\n\r\n")
            self.close_connection = True
        else:
            self.send_response(404 if self.path == "/missing" else 200)
            self.send_header("Content-Type", "application/json")
            self.send_header("Content-Length", str(len(echo)))
            self.end_headers()
            self.wfile.write(echo)


@pytest.fixture
def server() -> Iterator[ThreadingHTTPServer]:
    _Handler.connections = set()
    httpd = ThreadingHTTPServer(("127.0.0.1", 0), _Handler)
    thread = threading.Thread(target=httpd.serve_forever, daemon=True)
    thread.start()
    try:
        yield httpd
    finally:
        httpd.shutdown()
        httpd.server_close()


@pytest.fixture
def client(server: ThreadingHTTPServer) -> Iterator[KeepAliveClient]:
    connection = KeepAliveClient("127.0.0.1", server.server_address[1], timeout=5.0)
    try:
        yield connection
    finally:
        connection.close()


def _request(path: str, body: bytes) -> bytes:
    return build_request("POST", path, {"Host": "x", "Authorization": "Bearer k"}, body)


def test_responses_with_a_length_come_back_whole_over_one_connection(
    client: KeepAliveClient,
) -> None:
    bodies = [b'{"n": %d}' % n + b" " * (n * 5000) for n in range(6)]
    for body in bodies:
        response = client.send(_request("/search", body))
        assert response.status == 200
        assert response.headers["content-type"] == "application/json"
        echo = json.loads(response.body)
        assert echo == {"path": "/search", "body": body.decode(), "authorization": "Bearer k"}
    assert len(_Handler.connections) == 1


def test_a_chunked_response_is_joined_and_its_trailers_skipped(
    client: KeepAliveClient,
) -> None:
    for _ in range(2):
        response = client.send(_request("/chunked", b"[1, 2, 3]"))
        assert json.loads(response.body)["body"] == "[1, 2, 3]"
    assert client.send(_request("/after", b"{}")).status == 200


def test_a_body_ended_by_closing_is_read_and_the_next_request_reconnects(
    client: KeepAliveClient,
) -> None:
    response = client.send(_request("/until-close", b"{}"))
    assert response.status == 200
    assert json.loads(response.body)["path"] == "/until-close"
    assert client.send(_request("/again", b"{}")).status == 200
    assert len(_Handler.connections) == 2


def test_an_error_status_is_a_response_not_a_failure(client: KeepAliveClient) -> None:
    assert client.send(_request("/missing", b"{}")).status == 404


def test_bytes_that_are_not_http_raise_a_protocol_error_and_the_client_recovers(
    client: KeepAliveClient,
) -> None:
    with pytest.raises(ProtocolError):
        client.send(_request("/garbage", b"{}"))
    assert client.send(_request("/fine", b"{}")).status == 200


def test_a_refused_connection_raises_at_once() -> None:
    httpd = ThreadingHTTPServer(("127.0.0.1", 0), _Handler)
    port = httpd.server_address[1]
    httpd.server_close()
    with pytest.raises(ConnectionRefusedError):
        KeepAliveClient("127.0.0.1", port, timeout=5.0)
