"""``excerpta keys create / list / revoke`` on a scratch data dir, checked against the API."""

from __future__ import annotations

import json
import re
from collections.abc import Callable, Iterator
from importlib.metadata import version
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.cli import main
from service.store.tables import ApiKeyRow
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, put_collection
from service.usecases.runtime import Runtime

KEY_SHAPE = re.compile(r"xk_[0-9a-f]{16}_[A-Za-z0-9_-]{43}")


@pytest.fixture
def data_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    for name in ("EXCERPTA_DATA_DIR", "EXCERPTA_DATABASE_URL"):
        monkeypatch.delenv(name, raising=False)
    return tmp_path / "data"


@pytest.fixture
def client(make_runtime: Callable[..., Runtime], data_dir: Path) -> Iterator[TestClient]:
    main(["migrate", "--data-dir", str(data_dir)])
    with TestClient(create_app(make_runtime(data_dir=data_dir))) as test_client:
        yield test_client


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def create(capsys: pytest.CaptureFixture[str], data_dir: Path, *options: str) -> str:
    code, out, err = run(capsys, "keys", "create", "--data-dir", str(data_dir), *options)
    assert code == 0, err
    [key] = out.split()
    assert KEY_SHAPE.fullmatch(key)
    assert key not in err
    return key


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def make_collection(client: TestClient, name: str) -> None:
    runtime: Runtime = client.app.state.runtime  # type: ignore[attr-defined]
    put_collection(runtime, LOCAL_ADMIN, name, CollectionSpec())


def test_a_created_key_is_printed_once_and_works_in_the_api(
    client: TestClient, data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    key = create(capsys, data_dir, "--role", "reader", "--name", "shop-app")
    assert client.get("/v1/collections", headers=bearer(key)).status_code == 200
    assert client.put("/v1/collections/bikes", headers=bearer(key), json={}).status_code == 403


def test_listing_shows_the_key_details_but_never_the_key(
    client: TestClient, data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    make_collection(client, "bikes")
    key = create(
        capsys,
        data_dir,
        "--role",
        "writer",
        "--groups",
        "staff,editors",
        "--collections",
        "bikes",
        "--name",
        "editor-app",
    )
    client.get("/v1/collections", headers=bearer(key))
    code, table, _ = run(capsys, "keys", "list", "--data-dir", str(data_dir))
    assert code == 0
    assert "editor-app" in table and "writer" in table and "editors,staff" in table
    code, listing, _ = run(capsys, "keys", "list", "--data-dir", str(data_dir), "--json")
    assert code == 0
    [entry] = json.loads(listing)
    assert entry["name"] == "editor-app"
    assert entry["groups"] == ["editors", "staff"]
    assert entry["collections"] == ["bikes"]
    assert entry["last_used_at"] is not None
    assert entry["revoked"] is False
    secret = key.split("_", 2)[2]
    lookup = key.split("_", 2)[1]
    for output in (table, listing):
        assert key not in output and secret not in output and lookup not in output


def test_only_a_salted_hash_of_the_secret_is_stored(
    client: TestClient, data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    key = create(capsys, data_dir, "--role", "admin", "--name", "ops")
    runtime: Runtime = client.app.state.runtime  # type: ignore[attr-defined]
    secret = key.split("_", 2)[2]
    with runtime.transaction() as session:
        row = session.query(ApiKeyRow).filter_by(name="ops").one()
        stored = [row.secret_hash, row.salt, row.lookup.encode()]
    assert all(secret.encode() not in value for value in stored)
    assert len(row.salt) >= 16
    database = (data_dir / "excerpta.db").read_bytes()
    assert secret.encode() not in database


def test_revoking_a_key_makes_it_401(
    client: TestClient, data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    key = create(capsys, data_dir, "--role", "reader", "--name", "leaving")
    other = create(capsys, data_dir, "--role", "reader", "--name", "staying")
    assert client.get("/v1/collections", headers=bearer(key)).status_code == 200
    code, out, _ = run(capsys, "keys", "revoke", "--data-dir", str(data_dir), "leaving")
    assert code == 0 and "leaving" in out
    response = client.get("/v1/collections", headers=bearer(key))
    assert response.status_code == 401
    assert response.json()["error"]["code"] == "unauthenticated"
    assert client.get("/v1/collections", headers=bearer(other)).status_code == 200
    _, listing, _ = run(capsys, "keys", "list", "--data-dir", str(data_dir), "--json")
    states = {entry["name"]: entry["revoked"] for entry in json.loads(listing)}
    assert states == {"leaving": True, "staying": False}


def test_revoking_an_unknown_key_fails_with_exit_status_1(
    data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, _, err = run(capsys, "keys", "revoke", "--data-dir", str(data_dir), "nobody")
    assert code == 1
    assert "nobody" in err


def test_a_taken_name_fails_with_exit_status_1(
    data_dir: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    create(capsys, data_dir, "--role", "reader", "--name", "twice")
    code, out, err = run(
        capsys, "keys", "create", "--data-dir", str(data_dir), "--role", "reader", "--name", "twice"
    )
    assert code == 1
    assert out == "" and "twice" in err


def test_a_bad_role_is_bad_usage(data_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["keys", "create", "--data-dir", str(data_dir), "--role", "owner"])
    assert exit_info.value.code == 2


@pytest.mark.parametrize(
    ("collections", "message"),
    [
        (
            "bikes,bikez",
            "Collection 'bikez' does not exist; create it before giving a key access to it.",
        ),
        (
            "parts,archive",
            "Collections 'archive' and 'parts' do not exist; create them before giving a key "
            "access to them.",
        ),
    ],
)
def test_a_key_for_a_collection_that_does_not_exist_is_refused(
    client: TestClient,
    data_dir: Path,
    capsys: pytest.CaptureFixture[str],
    collections: str,
    message: str,
) -> None:
    make_collection(client, "bikes")
    code, out, err = run(
        capsys,
        "keys",
        "create",
        "--data-dir",
        str(data_dir),
        "--role",
        "reader",
        "--collections",
        collections,
    )
    assert (code, out, err) == (1, "", f"error: {message}\n")
    _, listing, _ = run(capsys, "keys", "list", "--data-dir", str(data_dir), "--json")
    assert json.loads(listing) == []


def test_version_prints_the_installed_packages_version(
    capsys: pytest.CaptureFixture[str],
) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["--version"])
    assert exit_info.value.code == 0
    assert capsys.readouterr().out == f"excerpta {version('excerpta')}\n"
