"""The image's HEALTHCHECK command, run as the container would run it, against a server on a
loopback port: it passes when the server is ready and fails when it is not, or not there."""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Callable

import pytest

from service.usecases.runtime import Runtime
from tests.deploy_files import DEPLOY, dockerfile_instructions, healthcheck_command
from tests.served import free_port, server_in_thread


def run_health_check(port: int) -> int:
    instructions = dockerfile_instructions((DEPLOY / "Dockerfile").read_text(encoding="utf-8"))
    command = healthcheck_command(next(i for i in instructions if i.keyword == "HEALTHCHECK"))
    assert command[0] == "python"
    environment = {**os.environ, "EXCERPTA_PORT": str(port)}
    finished = subprocess.run(
        [sys.executable, *command[1:]], env=environment, capture_output=True, timeout=30
    )
    return finished.returncode


def test_the_health_check_passes_on_a_ready_server_and_fails_otherwise(
    make_runtime: Callable[..., Runtime], monkeypatch: pytest.MonkeyPatch
) -> None:
    runtime = make_runtime()
    with server_in_thread(runtime) as base_url:
        port = int(base_url.rsplit(":", 1)[1])
        assert run_health_check(port) == 0
        # Alive but not ready (GET /readyz answers 503): the container is unhealthy.
        monkeypatch.setattr(
            "service.api.routes.health.readiness", lambda _: "The store is unavailable."
        )
        assert run_health_check(port) != 0
    assert run_health_check(free_port()) != 0
