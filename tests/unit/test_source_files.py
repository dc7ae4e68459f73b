from __future__ import annotations

import json
from pathlib import Path

import pytest

from service.errors import InvalidRequest
from service.ingest.source_files import SourceItem, read_source


def write(folder: Path, name: str, content: str | bytes) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8")
    return path


def by_origin(items: list[SourceItem]) -> dict[str, SourceItem]:
    return {item.origin: item for item in items}


def test_markdown_front_matter_becomes_the_document_fields(tmp_path: Path) -> None:
    write(
        tmp_path,
        "ridge-2023.md",
        "---\nid: ridge-2023-manual\ntitle: Ridge 2023 owner's manual\n"
        "attributes:\n  model: Ridge\n  model_year: 2023\n  tags: [brakes, gears]\n"
        "access: [staff]\nsource_url: https://docs.example/ridge-2023\n---\n# Brakes\n\nSqueeze.\n",
    )

    [item] = read_source(tmp_path)

    assert item == SourceItem(
        "ridge-2023.md",
        {
            "id": "ridge-2023-manual",
            "title": "Ridge 2023 owner's manual",
            "attributes": {"model": "Ridge", "model_year": 2023, "tags": ["brakes", "gears"]},
            "access": ["staff"],
            "source_url": "https://docs.example/ridge-2023",
            "text": "# Brakes\n\nSqueeze.\n",
            "media_type": "text/markdown",
        },
        None,
    )


def test_yaml_dates_and_datetimes_come_back_as_iso_strings(tmp_path: Path) -> None:
    write(
        tmp_path,
        "bulletin.md",
        "---\nattributes:\n  effective: 2024-03-01\n  published: 2024-03-01T09:30:00+02:00\n"
        "  utc: 2024-03-01T09:30:00Z\n  naive: 2024-03-01 09:30:00\n"
        "  quoted: '2024-03-01'\n  dates: [2020-01-31]\n---\nText.\n",
    )

    [item] = read_source(tmp_path)

    assert item.document is not None
    assert item.document["attributes"] == {
        "effective": "2024-03-01",
        "published": "2024-03-01T09:30:00+02:00",
        "utc": "2024-03-01T09:30:00+00:00",
        "naive": "2024-03-01T09:30:00",
        "quoted": "2024-03-01",
        "dates": ["2020-01-31"],
    }


def test_id_defaults_to_the_file_name_and_title_to_the_first_heading(tmp_path: Path) -> None:
    write(tmp_path, "pads.md", "Intro.\n\n## Brake pads\n\n# Later\n")
    write(tmp_path, "shop.html", "<html><head><title>Ignored</title></head><h2>Opening hours</h2>")
    write(tmp_path, "notes.txt", "# not a heading in plain text\n")

    items = by_origin(list(read_source(tmp_path)))

    documents = {origin: item.document for origin, item in items.items()}
    assert documents["pads.md"] == {
        "id": "pads",
        "title": "Brake pads",
        "text": "Intro.\n\n## Brake pads\n\n# Later\n",
        "media_type": "text/markdown",
    }
    assert documents["shop.html"] is not None
    assert documents["shop.html"]["title"] == "Opening hours"
    assert documents["shop.html"]["media_type"] == "text/html"
    assert documents["notes.txt"] is not None
    assert documents["notes.txt"]["title"] == "notes"
    assert documents["notes.txt"]["media_type"] == "text/plain"


def test_folders_are_read_recursively_in_sorted_order_skipping_other_files(
    tmp_path: Path,
) -> None:
    names = ["b.md", "a/z.txt", "a/b.htm", "C.markdown", "schema.json", ".hidden/x.md", ".d.md"]
    for name in names:
        write(tmp_path, name, "Text.")

    origins = [item.origin for item in read_source(tmp_path)]

    assert origins == ["C.markdown", "a/b.htm", "a/z.txt", "b.md"]


def test_a_bom_and_windows_line_ends_do_not_hide_the_front_matter(tmp_path: Path) -> None:
    write(tmp_path, "w.md", "\ufeff---\r\ntitle: Windows\r\n---\r\nBody.\r\n".encode())

    [item] = read_source(tmp_path)

    assert item.document is not None
    assert item.document["title"] == "Windows"
    assert item.document["text"] == "Body.\n"


def test_empty_front_matter_is_allowed(tmp_path: Path) -> None:
    write(tmp_path, "e.md", "---\n---\nBody.")

    [item] = read_source(tmp_path)

    assert item.document == {
        "id": "e",
        "title": "e",
        "text": "Body.",
        "media_type": "text/markdown",
    }


@pytest.mark.parametrize(
    ("content", "reason"),
    [
        ("---\ntitle: [unclosed\n---\nBody.", "The front matter is not valid YAML at line "),
        ("---\n- a\n- b\n---\nBody.", "The front matter is not a mapping of keys to values."),
        ("---\ntitle: x\nBody.", "The front matter opened with '---' is never closed."),
        ("---\natributes: {}\n---\nBody.", "The front matter has unknown key 'atributes'"),
        (b"caf\xe9", "The file is not valid UTF-8 text."),
    ],
)
def test_bad_files_are_reported_by_name_while_the_others_are_read(
    tmp_path: Path, content: str | bytes, reason: str
) -> None:
    write(tmp_path, "bad.md", content)
    write(tmp_path, "good.md", "Fine.")

    items = by_origin(list(read_source(tmp_path)))

    assert items["bad.md"].document is None
    assert items["bad.md"].error is not None
    assert items["bad.md"].error.startswith(reason)
    assert items["good.md"].error is None


def test_jsonl_lines_are_documents_with_line_numbered_origins(tmp_path: Path) -> None:
    good = {"id": "1", "title": "Wing", "text": "lift", "attributes": {"year": 1960}}
    lines = [json.dumps(good), "", "{not json", "[1, 2]", json.dumps({"id": "2", "text": ""})]
    write(tmp_path, "docs.jsonl", "\n".join(lines) + "\n")

    items = list(read_source(tmp_path / "docs.jsonl"))

    assert items == [
        SourceItem("docs.jsonl:1", good, None),
        SourceItem(
            "docs.jsonl:3",
            None,
            "The line is not valid JSON: Expecting property name enclosed in double quotes.",
        ),
        SourceItem("docs.jsonl:4", None, "The line is not a JSON object."),
        SourceItem("docs.jsonl:5", {"id": "2", "text": ""}, None),
    ]


def test_a_jsonl_line_that_is_not_utf8_is_reported_and_the_rest_read(tmp_path: Path) -> None:
    write(tmp_path, "docs.jsonl", b'{"id": "caf\xe9"}\n{"id": "ok"}\n')

    items = list(read_source(tmp_path / "docs.jsonl"))

    assert items == [
        SourceItem("docs.jsonl:1", None, "The line is not valid UTF-8 text."),
        SourceItem("docs.jsonl:2", {"id": "ok"}, None),
    ]


def test_a_single_document_file_can_be_given(tmp_path: Path) -> None:
    path = write(tmp_path, "one.txt", "Text.")

    assert [item.origin for item in read_source(path)] == ["one.txt"]


def test_a_missing_path_or_an_unsupported_file_is_a_usage_error(tmp_path: Path) -> None:
    with pytest.raises(InvalidRequest, match="does not exist"):
        list(read_source(tmp_path / "missing"))
    with pytest.raises(InvalidRequest, match="neither a folder"):
        list(read_source(write(tmp_path, "schema.json", "{}")))
