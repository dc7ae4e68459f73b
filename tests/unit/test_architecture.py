"""Imports point one way: the numeric core and filters know nothing of HTTP or SQL."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

SERVICE = Path(__file__).resolve().parents[2] / "service"
PURE_PACKAGES = ("filters", "index", "retrieval", "packing", "evaluation")
FRAMEWORKS = ("fastapi", "starlette", "sqlalchemy", "alembic", "uvicorn")


def imported_modules(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


@pytest.mark.parametrize("package", PURE_PACKAGES)
def test_pure_packages_import_neither_the_web_framework_nor_the_database_layer(
    package: str,
) -> None:
    offenders = []
    for path in sorted((SERVICE / package).rglob("*.py")):
        for module in imported_modules(path):
            root = module.split(".")[0]
            if root in FRAMEWORKS or module.startswith(("service.api", "service.store")):
                offenders.append(f"{path.relative_to(SERVICE)} imports {module}")
    assert offenders == []


def test_only_the_api_package_imports_the_web_framework() -> None:
    offenders = []
    for path in sorted(SERVICE.rglob("*.py")):
        relative = path.relative_to(SERVICE)
        if relative.parts[0] in ("api", "bench") or relative.name == "cli.py":
            continue
        for module in imported_modules(path):
            if module.split(".")[0] in ("fastapi", "starlette"):
                offenders.append(f"{relative} imports {module}")
    assert offenders == []


def test_lower_layers_never_import_the_use_cases_or_the_api() -> None:
    lower = (
        "filters",
        "index",
        "retrieval",
        "packing",
        "generation",
        "ingest",
        "embedding",
        "evaluation",
        "store",
    )
    offenders = []
    for package in lower:
        for path in sorted((SERVICE / package).rglob("*.py")):
            for module in imported_modules(path):
                if module.startswith(("service.usecases", "service.api", "service.cli")):
                    offenders.append(f"{path.relative_to(SERVICE)} imports {module}")
    assert offenders == []
