"""The package as the image installs it (a wheel, not an editable link) carries its migrations
where the store looks for them, and migrates a new store from there."""

from __future__ import annotations

import os
import shutil
import sqlite3
import subprocess
import sys
import zipfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
BUILT_FROM = ("pyproject.toml", "README.md", "service", "migrations")


def test_a_wheel_built_from_the_tree_migrates_a_store_from_its_own_files(tmp_path: Path) -> None:
    source = tmp_path / "source"
    source.mkdir()
    for name in BUILT_FROM:
        if (REPO / name).is_dir():
            shutil.copytree(
                REPO / name, source / name, ignore=shutil.ignore_patterns("__pycache__")
            )
        else:
            shutil.copy(REPO / name, source / name)
    wheels = tmp_path / "wheels"
    built = subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "--no-build-isolation",
            "--quiet",
            "--wheel-dir",
            str(wheels),
            str(source),
        ],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert built.returncode == 0, built.stderr
    (wheel,) = wheels.glob("excerpta-*.whl")
    installed = tmp_path / "installed"
    with zipfile.ZipFile(wheel) as archive:
        names = set(archive.namelist())
        archive.extractall(installed)
    revisions = sorted(p.name for p in (REPO / "migrations" / "versions").glob("*.py"))
    assert revisions
    for name in ("migrations/env.py", "migrations/script.py.mako"):
        assert name in names
    assert {f"migrations/versions/{r}" for r in revisions} <= names

    store = tmp_path / "store.db"
    script = (
        "import service, service.store.db as db;"
        "print(service.__file__);"
        "db.migrate(db.make_engine(" + repr(f"sqlite:///{store}") + "));"
        "print(db.MIGRATIONS_DIR)"
    )
    environment = {**os.environ, "PYTHONPATH": str(installed)}
    ran = subprocess.run(
        [sys.executable, "-c", script],
        cwd=tmp_path,
        env=environment,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert ran.returncode == 0, ran.stderr
    package_file, migrations_dir = ran.stdout.split()
    assert Path(package_file).is_relative_to(installed)
    assert Path(migrations_dir).resolve() == (installed / "migrations").resolve()
    with sqlite3.connect(store) as connection:
        rows = connection.execute("SELECT name FROM sqlite_master WHERE type = 'table'")
        tables = {name for (name,) in rows}
    assert {"alembic_version", "store_identity", "collections", "traces"} <= tables
