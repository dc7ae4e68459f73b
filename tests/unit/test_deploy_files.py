"""The operator files say what they must: a non-root image with the package installed (not
editable) and a health check on readiness; a compose file with two replicas on PostgreSQL
behind a reverse proxy whose configuration is in ``deploy/``.

The instructions' meanings are Docker's (the Dockerfile reference) and Compose's (the Compose
specification), from memory of those documents.
"""

from __future__ import annotations

from typing import Any

import pytest

from tests.deploy_files import (
    DEPLOY,
    Instruction,
    compose_file,
    dockerfile_instructions,
    exec_form,
    healthcheck_command,
    proxy_listen_ports,
    proxy_upstream_servers,
    shell_commands,
)

ROOT_USERS = {"root", "0", "0:0", "root:root"}


@pytest.fixture(scope="module")
def instructions() -> list[Instruction]:
    return dockerfile_instructions((DEPLOY / "Dockerfile").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def services() -> dict[str, Any]:
    found: dict[str, Any] = compose_file()["services"]
    return found


def _env(instructions: list[Instruction]) -> dict[str, str]:
    values: dict[str, str] = {}
    for instruction in instructions:
        if instruction.keyword == "ENV":
            for pair in instruction.arguments.split():
                name, _, value = pair.partition("=")
                values[name] = value
    return values


def _pip_installs(instructions: list[Instruction]) -> list[tuple[int, list[str]]]:
    return [
        (position, command)
        for position, instruction in enumerate(instructions)
        if instruction.keyword == "RUN"
        for command in shell_commands(instruction)
        if command[:2] == ["pip", "install"]
    ]


def test_the_dockerfile_parser_joins_continued_lines_and_drops_comments() -> None:
    text = "FROM base\n# a note\nRUN a \\\n    # inside\n    && b\nUSER someone\n"
    assert dockerfile_instructions(text) == [
        Instruction("FROM", "base"),
        Instruction("RUN", "a && b"),
        Instruction("USER", "someone"),
    ]


def test_the_image_installs_the_package_itself_not_an_editable_link(
    instructions: list[Instruction],
) -> None:
    installs = _pip_installs(instructions)
    assert installs, "no pip install in the Dockerfile"
    for _, command in installs:
        assert "-e" not in command and "--editable" not in command
        assert not any(part.startswith("--editable=") for part in command)
    assert any("." in command[2:] for _, command in installs)


def test_the_image_runs_as_a_user_it_creates_and_that_user_is_not_root(
    instructions: list[Instruction],
) -> None:
    users = [
        (i, found.arguments) for i, found in enumerate(instructions) if found.keyword == "USER"
    ]
    assert users, "the image never leaves root"
    position, user = users[-1]
    assert user not in ROOT_USERS
    assert all(position > where for where, _ in _pip_installs(instructions))
    created = [
        command
        for instruction in instructions[:position]
        if instruction.keyword == "RUN"
        for command in shell_commands(instruction)
        if command[0] == "useradd"
    ]
    assert created and created[-1][-1] == user.partition(":")[0]
    data_dir = _env(instructions)["EXCERPTA_DATA_DIR"]
    owned = [
        command
        for instruction in instructions[:position]
        if instruction.keyword == "RUN"
        for command in shell_commands(instruction)
        if command[0] == "chown"
    ]
    assert any(data_dir in command and command[1].startswith(user) for command in owned)
    cmd = [i for i in instructions if i.keyword == "CMD"]
    assert exec_form(cmd[-1].arguments) == ["excerpta", "serve"]
    assert instructions.index(cmd[-1]) > position


def test_the_health_check_asks_the_readiness_route_on_the_served_port(
    instructions: list[Instruction],
) -> None:
    checks = [i for i in instructions if i.keyword == "HEALTHCHECK"]
    assert len(checks) == 1
    command = healthcheck_command(checks[0])
    assert "/readyz" in " ".join(command)
    env = _env(instructions)
    assert env["EXCERPTA_HOST"] == "0.0.0.0"
    exposed = [i.arguments for i in instructions if i.keyword == "EXPOSE"]
    assert exposed == [env["EXCERPTA_PORT"]]


def test_compose_runs_two_replicas_on_postgresql(services: dict[str, Any]) -> None:
    postgres = services["postgres"]
    assert postgres["image"].startswith("postgres:")
    assert "healthcheck" in postgres
    excerpta = services["excerpta"]
    assert excerpta["deploy"]["replicas"] == 2
    build = excerpta["build"]
    assert (DEPLOY / build["context"] / build["dockerfile"]).resolve() == DEPLOY / "Dockerfile"
    url = excerpta["environment"]["EXCERPTA_DATABASE_URL"]
    assert url.startswith("postgresql+psycopg://")
    assert url.partition("@")[2].startswith("postgres:5432/")
    assert excerpta["depends_on"]["postgres"]["condition"] == "service_healthy"
    # Two replicas cannot publish one host port; they are reached through the proxy.
    assert "ports" not in excerpta


def test_compose_puts_a_reverse_proxy_configured_in_deploy_in_front_of_the_replicas(
    services: dict[str, Any], instructions: list[Instruction]
) -> None:
    proxy = services["proxy"]
    mounted = [volume.split(":") for volume in proxy["volumes"]]
    sources = [DEPLOY / source for source, _, *_ in mounted if source.startswith("./")]
    assert len(sources) == 1 and sources[0].is_file()
    config = sources[0].read_text(encoding="utf-8")
    port = next(i.arguments for i in instructions if i.keyword == "EXPOSE")
    assert proxy_upstream_servers(config) == [f"excerpta:{port}"]
    published = [str(mapping).rsplit(":", 1)[1] for mapping in proxy["ports"]]
    assert [int(p) for p in published] == proxy_listen_ports(config)
    # The proxy sends traffic only to replicas the image's health check calls ready.
    assert proxy["depends_on"]["excerpta"]["condition"] == "service_healthy"


def test_the_build_context_leaves_out_the_local_environment_and_data() -> None:
    ignored = (DEPLOY / "Dockerfile.dockerignore").read_text(encoding="utf-8").split()
    assert {".venv", "data", ".git", "**/__pycache__"} <= set(ignored)
