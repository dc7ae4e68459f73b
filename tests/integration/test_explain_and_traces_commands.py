"""``excerpta explain`` and ``excerpta traces`` on the demo corpus with the bundled model."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

from tests.integration.conftest import DEMO_COLLECTION, CliRun

QUESTION = "What tyre pressure should I run on my Ridgeline?"


def test_explain_names_the_filter_clause_that_kept_a_manual_out(
    run_cli: Callable[[list[str]], CliRun], demo: Any
) -> None:
    data_dir = str(demo.runtime.settings.data_dir)
    common = ["--filter", "model_year = 2022", "--data-dir", data_dir]
    as_json = run_cli(
        [
            "explain",
            DEMO_COLLECTION,
            QUESTION,
            "--document",
            "ridgeline-2023-manual",
            "--json",
            *common,
        ]
    )
    assert as_json.code == 0, as_json.stderr[-2000:]
    body = json.loads(as_json.stdout)
    assert body["document_id"] == "ridgeline-2023-manual" and body["chunks"]
    for chunk in body["chunks"]:
        assert (chunk["stage"], chunk["outcome"]) == ("filter", "clause_false")
        assert chunk["clause"]["values"] == {"model_year": 2023}

    table = run_cli(
        ["explain", DEMO_COLLECTION, QUESTION, "--document", "ridgeline-2022-manual", *common]
    )
    assert table.code == 0, table.stderr[-2000:]
    assert "hybrid mode" in table.stdout and "top_k cut at 10" in table.stdout
    assert "ridgeline-2022-manual#0000" in table.stdout
    searched = run_cli(["search", DEMO_COLLECTION, QUESTION, "--json", *common])
    top = json.loads(searched.stdout)["hits"][0]["chunk_id"]
    assert top.startswith("ridgeline-2022-manual#")
    assert f"{top}  reached: returned" in table.stdout

    hidden = run_cli(
        ["explain", DEMO_COLLECTION, QUESTION, "--document", "no-such-manual", *common]
    )
    assert hidden.code == 1 and "does not exist" in hidden.stderr


def test_traces_lists_the_newest_first_and_filters_by_route(
    run_cli: Callable[[list[str]], CliRun], demo: Any
) -> None:
    data_dir = ["--data-dir", str(demo.runtime.settings.data_dir)]
    searched = run_cli(["search", DEMO_COLLECTION, "brake pads", "--json", *data_dir])
    asked = run_cli(["ask", DEMO_COLLECTION, "How often should I check brake pads?", "--json",
                     *data_dir])  # fmt: skip
    search_id = json.loads(searched.stdout)["trace_id"]
    ask_id = json.loads(asked.stdout)["trace_id"]

    listed = run_cli(["traces", "--limit", "2", "--json", *data_dir])
    assert listed.code == 0, listed.stderr[-2000:]
    page = json.loads(listed.stdout)
    assert [t["trace_id"] for t in page["traces"]] == [ask_id, search_id]
    assert page["traces"][1]["query"] == "brake pads"
    assert page["next_cursor"]

    only_search = json.loads(run_cli(["traces", "--route", "search", "--limit", "1", "--json",
                                      *data_dir]).stdout)  # fmt: skip
    assert [t["trace_id"] for t in only_search["traces"]] == [search_id]

    table = run_cli(["traces", "--limit", "2", *data_dir])
    lines = table.stdout.splitlines()
    assert "trace" in lines[0] and ask_id in lines[1] and search_id in lines[2]
    assert lines[-1].startswith("more: --cursor ")
    bad = run_cli(["traces", "--since", "yesterday", *data_dir])
    assert bad.code == 1 and "since" in bad.stderr
