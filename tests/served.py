"""The service on a real loopback port: in a thread of the test process, or in a process of its own.

Tests of races, faults and stopping need real connections, and some need a second process on the
same store; both kinds of server use the test-only hashing embedder, so nothing loads the model.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import uvicorn

from service.api.app import create_app
from service.usecases.runtime import Runtime

REPO = Path(__file__).resolve().parents[1]
START_SECONDS = 60.0


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@contextmanager
def server_in_thread(runtime: Runtime) -> Iterator[str]:
    """Serve ``runtime`` on a free port from a thread; yields the base URL."""
    port = free_port()
    config = uvicorn.Config(
        create_app(runtime), host="127.0.0.1", port=port, log_config=None, access_log=False
    )
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + START_SECONDS
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("the server did not start")
        time.sleep(0.02)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=60)


class ServerProcess:
    """``python -m tests.server_process``: the service in a process of its own."""

    def __init__(self, data_dir: Path, database_url: str, **settings: str) -> None:
        self.data_dir = data_dir
        self.port = free_port()
        self.base_url = f"http://127.0.0.1:{self.port}"
        self.log_path = data_dir / f"server-{self.port}.log"
        self.environment = {
            **os.environ,
            "EXCERPTA_DATA_DIR": str(data_dir),
            "EXCERPTA_DATABASE_URL": database_url,
            "EXCERPTA_HOST": "127.0.0.1",
            "EXCERPTA_PORT": str(self.port),
            **{f"EXCERPTA_{name.upper()}": value for name, value in settings.items()},
        }
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> ServerProcess:
        self.launch()
        return self.wait_started()

    def launch(self) -> None:
        self.data_dir.mkdir(parents=True, exist_ok=True)
        with open(self.log_path, "ab") as log:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "tests.server_process"],
                cwd=REPO,
                env=self.environment,
                stdout=log,
                stderr=subprocess.STDOUT,
            )

    def wait_started(self) -> ServerProcess:
        assert self.process is not None
        deadline = time.monotonic() + START_SECONDS
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"the server exited early:\n{self.log()}")
            try:
                if httpx.get(f"{self.base_url}/healthz", timeout=2.0).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        raise RuntimeError(f"the server did not start:\n{self.log()}")

    def log(self) -> str:
        try:
            return self.log_path.read_text(encoding="utf-8", errors="replace")
        except OSError:
            return ""

    def terminate(self, timeout: float = 60.0) -> int:
        """SIGTERM, then the exit status once the process has ended."""
        assert self.process is not None
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
        return self.process.wait(timeout=timeout)

    def stop(self) -> None:
        if self.process is None or self.process.poll() is not None:
            return
        try:
            self.terminate(timeout=30)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait(timeout=30)


@contextmanager
def server_processes(
    count: int, data_dir: Path, database_url: str, **settings: str
) -> Iterator[list[ServerProcess]]:
    servers = [ServerProcess(data_dir, database_url, **settings) for _ in range(count)]
    try:
        # Started side by side: each spends a few seconds importing before it listens.
        for server in servers:
            server.launch()
        for server in servers:
            server.wait_started()
        yield servers
    finally:
        for server in servers:
            server.stop()
