"""Reading the operator files of ``deploy/`` as Docker and Compose read them, for the tests.

No image can be built here, so the tests check what the files say: the Dockerfile's
instructions after Docker's own joining of continued lines (comments inside a continued
instruction are dropped, as Docker drops them), and the compose file as YAML.
"""

from __future__ import annotations

import json
import re
import shlex
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"


@dataclass(frozen=True)
class Instruction:
    keyword: str
    arguments: str


def dockerfile_instructions(text: str) -> list[Instruction]:
    found: list[Instruction] = []
    pending = ""
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        keyword, _, arguments = (pending + line).partition(" ")
        found.append(Instruction(keyword.upper(), " ".join(arguments.split())))
        pending = ""
    assert not pending, "the Dockerfile ends inside a continued instruction"
    return found


def exec_form(arguments: str) -> list[str]:
    """The JSON array of an instruction in exec form."""
    value = json.loads(arguments)
    assert isinstance(value, list) and all(isinstance(part, str) for part in value)
    return value


def healthcheck_command(instruction: Instruction) -> list[str]:
    """A HEALTHCHECK's command: what follows its options and the word CMD."""
    options, separator, command = instruction.arguments.partition("CMD ")
    assert separator and all(o.startswith("--") for o in options.split())
    return exec_form(command)


def shell_commands(run: Instruction) -> list[list[str]]:
    """The commands of a shell-form RUN, split at ``&&``."""
    return [shlex.split(part) for part in run.arguments.split("&&")]


def compose_file() -> dict[str, Any]:
    loaded = yaml.safe_load((DEPLOY / "compose.yaml").read_text(encoding="utf-8"))
    assert isinstance(loaded, dict)
    return loaded


def proxy_upstream_servers(text: str) -> list[str]:
    """The ``server host:port`` lines of the proxy's upstream blocks."""
    # A directive ends with ";"; "server {" opens a virtual server's block instead.
    return re.findall(r"^\s*server\s+([^\s;{]+)[^;{]*;", text, flags=re.MULTILINE)


def proxy_listen_ports(text: str) -> list[int]:
    return [int(port) for port in re.findall(r"^\s*listen\s+(\d+)\s*;", text, flags=re.MULTILINE)]
