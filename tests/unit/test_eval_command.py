"""``excerpta eval`` refusals that need neither a store nor a server: bad options and a server
that cannot be reached."""

from __future__ import annotations

import socket
from pathlib import Path

import pytest

from service.cli import main


@pytest.fixture
def labeled(tmp_path: Path) -> list[str]:
    queries = tmp_path / "queries.tsv"
    queries.write_text("q1\tbrake pads\n", encoding="utf-8")
    qrels = tmp_path / "qrels.txt"
    qrels.write_text("q1 0 ridge-manual 1\n", encoding="utf-8")
    return ["--queries", str(queries), "--qrels", str(qrels), "--no-progress"]


def closed_port() -> int:
    """A loopback port nothing listens on (bound, then released)."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def test_bm25_settings_through_a_server_are_bad_usage(
    labeled: list[str], capsys: pytest.CaptureFixture[str]
) -> None:
    code = main(["eval", "bikes", *labeled, "--set", "k1=0.9,1.2", "--url", "http://x.invalid"])
    assert code == 2
    assert capsys.readouterr().err == (
        "error: --set of settings other than rrf_k works only on the store, not with --url\n"
    )


def test_a_server_that_cannot_be_reached_ends_the_run_with_its_address(
    labeled: list[str], capsys: pytest.CaptureFixture[str]
) -> None:
    url = f"http://127.0.0.1:{closed_port()}"
    code = main(["eval", "bikes", *labeled, "--url", url, "--key", "xk_test", "--modes", "lexical"])
    assert code == 1
    assert capsys.readouterr().err.startswith(f"error: cannot reach {url}: ")
