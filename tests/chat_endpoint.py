"""A scripted chat-completions endpoint on 127.0.0.1 for the tests of the chat-http clients."""

from __future__ import annotations

import json
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any


@dataclass
class Step:
    """One scripted reply: wait ``delay`` seconds, then answer with ``status`` and ``body``."""

    status: int = 200
    content: str | None = "The frame is covered for five years [1]."
    delay: float = 0.0
    headers: dict[str, str] = field(default_factory=dict)


def completion(content: str | None) -> dict[str, Any]:
    return {"choices": [{"index": 0, "message": {"role": "assistant", "content": content}}]}


class FakeEndpoint:
    def __init__(self) -> None:
        self.script: deque[Step] = deque()
        self.requests: list[tuple[dict[str, str], dict[str, Any]]] = []
        endpoint = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                length = int(self.headers.get("Content-Length", "0"))
                body = json.loads(self.rfile.read(length))
                endpoint.requests.append((dict(self.headers.items()), body))
                step = endpoint.script.popleft() if endpoint.script else Step(status=500)
                time.sleep(step.delay)
                payload = json.dumps(completion(step.content)).encode()
                try:
                    self.send_response(step.status)
                    self.send_header("Content-Type", "application/json")
                    self.send_header("Content-Length", str(len(payload)))
                    for name, value in step.headers.items():
                        self.send_header(name, value)
                    self.end_headers()
                    self.wfile.write(payload)
                except (BrokenPipeError, ConnectionResetError):
                    pass  # the client gave up waiting, which is what a timeout test wants

            def log_message(self, format: str, *args: Any) -> None:
                return

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.server.block_on_close = False
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/v1/chat/completions"
        self.thread = threading.Thread(
            target=self.server.serve_forever, kwargs={"poll_interval": 0.02}, daemon=True
        )

    def __enter__(self) -> FakeEndpoint:
        self.thread.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.server.shutdown()
        self.server.server_close()
