"""``--infer-filter`` on the command line: the request field's values, anything else bad usage."""

from __future__ import annotations

import datetime as dt

import pytest

from service.cli import build_parser
from service.usecases.inference import InferOptions


@pytest.mark.parametrize("command", ["search", "ask"])
def test_the_option_takes_a_mode_or_the_object_form(command: str) -> None:
    parser = build_parser()
    assert parser.parse_args([command, "bikes", "q"]).infer_filter == InferOptions()
    assert parser.parse_args([command, "bikes", "q", "--infer-filter", "apply"]).infer_filter == (
        InferOptions(mode="apply")
    )
    parsed = parser.parse_args(
        [
            command,
            "bikes",
            "q",
            "--infer-filter",
            '{"mode": "suggest", "now": "2025-03-15T12:00:00Z"}',
        ]
    )
    assert parsed.infer_filter == InferOptions(
        mode="suggest", now=dt.datetime(2025, 3, 15, 12, tzinfo=dt.UTC)
    )


@pytest.mark.parametrize("value", ["always", "{not json", '{"mode": "apply", "now": "noon"}'])
def test_a_bad_value_is_bad_usage(value: str, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exited:
        build_parser().parse_args(["search", "bikes", "q", "--infer-filter", value])
    assert exited.value.code == 2
    assert "--infer-filter" in capsys.readouterr().err
