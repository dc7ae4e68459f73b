"""Imports point one way and never in a circle; the numeric core knows nothing of HTTP or SQL.

Every import counts: at module level, inside functions and under ``TYPE_CHECKING``, since each
is a dependency a reader must follow and a circle between any of them makes the modules
impossible to understand (or test) apart. Relative imports are resolved, and ``from package
import module`` is read as an import of that module. The checks run over ``service/`` and, to
show that each of them fails when its rule is broken, over small packages built for the purpose.
"""

from __future__ import annotations

import ast
import textwrap
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

SERVICE = Path(__file__).resolve().parents[2] / "service"
PURE_PACKAGES = ("filters", "index", "retrieval", "packing", "evaluation")
LOWER_PACKAGES = (
    "filters",
    "index",
    "retrieval",
    "packing",
    "generation",
    "ingest",
    "embedding",
    "evaluation",
    "store",
    "taskqueue",
)
DATABASE_AND_SERVER = ("sqlalchemy", "alembic", "uvicorn")
WEB_FRAMEWORK = ("fastapi", "starlette")
# Argument parsing belongs to the command line and HTTP clients to the lower layers' adapters.
NOT_IN_USE_CASES = ("argparse", "httpx")


@dataclass(frozen=True)
class Import:
    importer: str  # dotted module name, e.g. "service.usecases.runtime"
    path: Path
    imported: str  # dotted name of what it imports, resolved to a module where it is one


class Modules:
    """The modules of one package tree on disk and every import each of them makes."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.package = root.name
        self.paths = {self._name(path): path for path in sorted(root.rglob("*.py"))}
        self.imports = [i for name, path in self.paths.items() for i in self._imports(name, path)]

    def _name(self, path: Path) -> str:
        parts = [self.package, *path.relative_to(self.root).with_suffix("").parts]
        if parts[-1] == "__init__":
            parts.pop()
        return ".".join(parts)

    def _imports(self, name: str, path: Path) -> Iterator[Import]:
        is_package = path.name == "__init__.py"
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                for alias in node.names:
                    yield Import(name, path, self._known_prefix(alias.name))
            elif isinstance(node, ast.ImportFrom):
                base = self._absolute(name, is_package, node.level, node.module)
                for alias in node.names:
                    submodule = f"{base}.{alias.name}"
                    target = submodule if submodule in self.paths else self._known_prefix(base)
                    yield Import(name, path, target)

    @staticmethod
    def _absolute(name: str, is_package: bool, level: int, module: str | None) -> str:
        if level == 0:
            return module or ""
        parts = name.split(".")
        # A module's own package is its name less its last part; a package's is itself.
        keep = len(parts) - (level - 1) - (0 if is_package else 1)
        return ".".join(parts[:keep] + ([module] if module else []))

    def _known_prefix(self, dotted: str) -> str:
        """The longest prefix of ``dotted`` that is a module of this tree, else ``dotted``."""
        parts = dotted.split(".")
        for end in range(len(parts), 0, -1):
            candidate = ".".join(parts[:end])
            if candidate in self.paths:
                return candidate
        return dotted

    def internal_graph(self) -> dict[str, set[str]]:
        graph: dict[str, set[str]] = {name: set() for name in self.paths}
        for item in self.imports:
            if item.imported in self.paths and item.imported != item.importer:
                graph[item.importer].add(item.imported)
        return graph

    def under(self, subpackage: str) -> Iterator[Import]:
        prefix = f"{self.package}.{subpackage}"
        return (item for item in self.imports if _within(item.importer, (prefix,)))

    def describe(self, item: Import) -> str:
        return f"{item.path.relative_to(self.root)} imports {item.imported}"


def import_cycles(modules: Modules) -> list[list[str]]:
    """One circle (as a closed path of module names) for every strongly connected group."""
    graph = modules.internal_graph()
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    groups: list[set[str]] = []

    def connect(node: str) -> None:  # Tarjan's strongly connected components
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for successor in sorted(graph[node]):
            if successor not in index:
                connect(successor)
                low[node] = min(low[node], low[successor])
            elif successor in on_stack:
                low[node] = min(low[node], index[successor])
        if low[node] == index[node]:
            group = set()
            while True:
                member = stack.pop()
                on_stack.discard(member)
                group.add(member)
                if member == node:
                    break
            if len(group) > 1:
                groups.append(group)

    for node in sorted(graph):
        if node not in index:
            connect(node)
    return [_circle_through(graph, group) for group in groups]


def _circle_through(graph: dict[str, set[str]], group: set[str]) -> list[str]:
    """A shortest circle from the group's first module back to itself, inside the group."""
    start = min(group)
    paths = {start: [start]}
    frontier = [start]
    while frontier:
        following = []
        for node in frontier:
            for successor in sorted(graph[node] & group):
                if successor == start:
                    return [*paths[node], start]
                if successor not in paths:
                    paths[successor] = [*paths[node], successor]
                    following.append(successor)
        frontier = following
    raise AssertionError("a strongly connected group always holds a circle")


def _root(dotted: str) -> str:
    return dotted.split(".")[0]


def _within(dotted: str, packages: tuple[str, ...]) -> bool:
    """Whether ``dotted`` is one of ``packages`` or inside one of them."""
    return any(dotted == p or dotted.startswith(p + ".") for p in packages)


def pure_package_offences(modules: Modules, package: str) -> list[str]:
    inside = modules.package
    return [
        modules.describe(item)
        for item in modules.under(package)
        if _root(item.imported) in DATABASE_AND_SERVER + WEB_FRAMEWORK
        or _within(item.imported, (f"{inside}.api", f"{inside}.store"))
    ]


def web_framework_offences(modules: Modules) -> list[str]:
    """The web framework belongs to the API (and to the bench's server and the CLI's serve)."""
    allowed = tuple(f"{modules.package}.{part}" for part in ("api", "bench", "cli"))
    return [
        modules.describe(item)
        for item in modules.imports
        if _root(item.imported) in WEB_FRAMEWORK and not _within(item.importer, allowed)
    ]


def upward_offences(modules: Modules) -> list[str]:
    """Lower layers never reach up to the use cases or the edges; use cases never reach up to
    the edges."""
    inside = modules.package
    edges = (f"{inside}.api", f"{inside}.cli")
    offences = []
    for package in LOWER_PACKAGES:
        offences += [
            modules.describe(item)
            for item in modules.under(package)
            if _within(item.imported, (f"{inside}.usecases", *edges))
        ]
    offences += [
        modules.describe(item)
        for item in modules.under("usecases")
        if _within(item.imported, edges)
    ]
    return offences


def use_case_library_offences(modules: Modules) -> list[str]:
    return [
        modules.describe(item)
        for item in modules.under("usecases")
        if _root(item.imported) in NOT_IN_USE_CASES
    ]


def facade_offences(modules: Modules) -> list[str]:
    """A package's ``__init__`` imports nothing: an import names the module that defines it."""
    return [
        modules.describe(item)
        for item in modules.imports
        if modules.paths[item.importer].name == "__init__.py" and item.imported != "__future__"
    ]


# the rules, over the service ---------------------------------------------------------------------


@pytest.fixture(scope="module")
def service() -> Modules:
    return Modules(SERVICE)


def test_no_module_of_the_service_imports_itself_through_a_circle(service: Modules) -> None:
    assert import_cycles(service) == []


@pytest.mark.parametrize("package", PURE_PACKAGES)
def test_pure_packages_import_neither_the_web_framework_nor_the_database_layer(
    service: Modules, package: str
) -> None:
    assert pure_package_offences(service, package) == []


def test_only_the_edges_import_the_web_framework(service: Modules) -> None:
    assert web_framework_offences(service) == []


def test_lower_layers_never_import_the_use_cases_or_the_edges(service: Modules) -> None:
    assert upward_offences(service) == []


def test_use_cases_import_neither_argument_parsing_nor_an_http_client(service: Modules) -> None:
    assert use_case_library_offences(service) == []


def test_packages_re_export_nothing(service: Modules) -> None:
    assert facade_offences(service) == []


def test_the_checks_see_the_whole_service(service: Modules) -> None:
    """A walk that found nothing would pass every rule above."""
    assert "service.usecases.runtime" in service.paths
    assert "service.store.repository" in service.internal_graph()["service.usecases.runtime"]


# each check fails when its rule is broken ------------------------------------------------------


def build_package(root: Path, files: dict[str, str]) -> Modules:
    """A package tree named ``pkg`` under ``root``, every package with its ``__init__``."""
    package = root / "pkg"
    for relative, source in files.items():
        path = package / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(source), encoding="utf-8")
    for directory in [package, *[p for p in package.rglob("*") if p.is_dir()]]:
        (directory / "__init__.py").touch()
    return Modules(package)


@pytest.mark.parametrize(
    ("runtime_source", "worker_source"),
    [
        pytest.param("import pkg.usecases.worker\n", "import pkg.usecases.runtime\n", id="module"),
        pytest.param(
            "from pkg.usecases.worker import Worker\n",
            "def build():\n    from pkg.usecases.runtime import Runtime\n",
            id="inside-a-function",
        ),
        pytest.param(
            "from pkg.usecases import worker\n",
            "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
            "    from pkg.usecases.runtime import Runtime\n",
            id="type-checking",
        ),
        pytest.param("from . import worker\n", "from .runtime import Runtime\n", id="relative"),
        pytest.param(
            "from .worker import Worker\n", "from ..usecases import runtime\n", id="parent-package"
        ),
    ],
)
def test_a_circle_of_imports_is_found_however_it_is_written(
    tmp_path: Path, runtime_source: str, worker_source: str
) -> None:
    modules = build_package(
        tmp_path,
        {"usecases/runtime.py": runtime_source, "usecases/worker.py": worker_source},
    )
    assert import_cycles(modules) == [
        ["pkg.usecases.runtime", "pkg.usecases.worker", "pkg.usecases.runtime"]
    ]


def test_a_longer_circle_is_named_module_by_module(tmp_path: Path) -> None:
    modules = build_package(
        tmp_path,
        {
            "a.py": "from pkg import b\n",
            "b.py": "import pkg.c\n",
            "c.py": "from pkg.a import thing\n",
            "d.py": "import pkg.a\n",
        },
    )
    assert import_cycles(modules) == [["pkg.a", "pkg.b", "pkg.c", "pkg.a"]]


def test_imports_that_point_one_way_make_no_circle(tmp_path: Path) -> None:
    modules = build_package(
        tmp_path,
        {
            "usecases/runtime.py": "from pkg.usecases.worker import Worker\nimport os\n",
            "usecases/worker.py": "from pkg.store import repository\nfrom pkg import store\n",
            "store/repository.py": "import sqlalchemy\n",
        },
    )
    assert import_cycles(modules) == []


def test_a_pure_package_importing_the_database_layer_is_found(tmp_path: Path) -> None:
    modules = build_package(
        tmp_path,
        {
            "index/postings.py": "def load():\n    from sqlalchemy import select\n",
            "retrieval/ranking.py": "from ..store import repository\n",
            "store/repository.py": "",
        },
    )
    assert pure_package_offences(modules, "index") == ["index/postings.py imports sqlalchemy"]
    assert pure_package_offences(modules, "retrieval") == [
        "retrieval/ranking.py imports pkg.store.repository"
    ]


def test_the_web_framework_outside_the_edges_is_found(tmp_path: Path) -> None:
    modules = build_package(
        tmp_path,
        {
            "api/app.py": "import fastapi\n",
            "cli.py": "import starlette\n",
            "usecases/search.py": "from fastapi import HTTPException\n",
        },
    )
    assert web_framework_offences(modules) == ["usecases/search.py imports fastapi"]


def test_a_lower_layer_reaching_up_is_found(tmp_path: Path) -> None:
    modules = build_package(
        tmp_path,
        {
            "retrieval/query.py": "from pkg.usecases.search import SearchOptions\n",
            "store/repository.py": "from typing import TYPE_CHECKING\n"
            "if TYPE_CHECKING:\n    from ..api import deps\n",
            "usecases/search.py": "from pkg import cli\n",
            "api/deps.py": "",
            "cli.py": "",
        },
    )
    assert upward_offences(modules) == [
        "retrieval/query.py imports pkg.usecases.search",
        "store/repository.py imports pkg.api.deps",
        "usecases/search.py imports pkg.cli",
    ]


def test_argument_parsing_or_an_http_client_in_a_use_case_is_found(tmp_path: Path) -> None:
    modules = build_package(
        tmp_path,
        {
            "usecases/evaluate.py": "import argparse\n",
            "usecases/remote.py": "def fetch():\n    from httpx import Client\n",
            "evaluation/http_backend.py": "import httpx\n",
            "cli.py": "import argparse\n",
        },
    )
    assert use_case_library_offences(modules) == [
        "usecases/evaluate.py imports argparse",
        "usecases/remote.py imports httpx",
    ]


def test_a_package_that_re_exports_its_modules_is_found(tmp_path: Path) -> None:
    modules = build_package(
        tmp_path,
        {
            "packing/__init__.py": '"""Packing."""\nfrom pkg.packing.packer import pack\n',
            "packing/packer.py": "def pack():\n    pass\n",
            "index/__init__.py": '"""Index."""\n',
        },
    )
    assert facade_offences(modules) == ["packing/__init__.py imports pkg.packing.packer"]
