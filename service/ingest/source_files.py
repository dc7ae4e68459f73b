"""Read what `excerpta ingest PATH` is given: a folder of text files, or a .jsonl of documents.

Each item names where it came from, so the command can report every bad file by name while the
good ones go in. Nothing here judges attributes or ids; the ingest use case validates the batch
as the API does, so the command line and the API reject the same documents for the same reasons.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from service.errors import InvalidRequest
from service.ingest.parsing import parse_document

MEDIA_TYPE_BY_SUFFIX = {
    ".md": "text/markdown",
    ".markdown": "text/markdown",
    ".txt": "text/plain",
    ".html": "text/html",
    ".htm": "text/html",
}
FRONT_MATTER_KEYS = ("id", "title", "attributes", "access", "source_url")
_FENCE = "---"
_FENCE_ENDS = ("---", "...")


@dataclass(frozen=True, slots=True)
class SourceItem:
    """One document read from ``origin``, or the one-sentence reason it could not be read."""

    origin: str
    document: dict[str, Any] | None
    error: str | None


def read_source(path: Path) -> Iterator[SourceItem]:
    """Documents in a folder (by relative path), in a .jsonl file (by line), or in one file."""
    if path.is_dir():
        for file in _document_files(path):
            yield _read_text_file(file, file.relative_to(path).as_posix())
    elif path.is_file() and path.suffix.lower() == ".jsonl":
        yield from _read_jsonl(path)
    elif path.is_file() and path.suffix.lower() in MEDIA_TYPE_BY_SUFFIX:
        yield _read_text_file(path, path.name)
    elif path.exists():
        raise InvalidRequest(
            f"{path} is neither a folder, a .jsonl file nor a document file "
            f"({', '.join(MEDIA_TYPE_BY_SUFFIX)}).",
            field="path",
        )
    else:
        raise InvalidRequest(f"{path} does not exist.", field="path")


def _document_files(folder: Path) -> list[Path]:
    """Files with a document suffix, hidden files and folders skipped, in code-point order."""
    found = [
        file
        for file in folder.rglob("*")
        if file.is_file()
        and file.suffix.lower() in MEDIA_TYPE_BY_SUFFIX
        and not any(part.startswith(".") for part in file.relative_to(folder).parts)
    ]
    return sorted(found, key=lambda file: file.relative_to(folder).as_posix())


def _read_text_file(file: Path, origin: str) -> SourceItem:
    try:
        content = file.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        return SourceItem(origin, None, "The file is not valid UTF-8 text.")
    except OSError as error:
        return SourceItem(origin, None, f"The file cannot be read: {error.strerror}.")
    try:
        metadata, body = _split_front_matter(content)
    except ValueError as error:
        return SourceItem(origin, None, str(error))
    unknown = sorted(set(metadata) - set(FRONT_MATTER_KEYS))
    if unknown:
        return SourceItem(
            origin,
            None,
            f"The front matter has unknown key {unknown[0]!r}; "
            f"the known keys are {', '.join(FRONT_MATTER_KEYS)}.",
        )
    media_type = MEDIA_TYPE_BY_SUFFIX[file.suffix.lower()]
    document: dict[str, Any] = {
        "id": file.stem,
        **metadata,
        "text": body,
        "media_type": media_type,
    }
    if "title" not in metadata:
        document["title"] = _first_heading(body, media_type) or file.stem
    return SourceItem(origin, document, None)


def _split_front_matter(content: str) -> tuple[dict[str, Any], str]:
    """The YAML mapping between the opening and closing fences, and the text after them."""
    lines = content.splitlines(keepends=True)
    if not lines or lines[0].rstrip() != _FENCE:
        return {}, content
    for index, line in enumerate(lines[1:], start=1):
        if line.rstrip() in _FENCE_ENDS:
            block = "".join(lines[1:index])
            body = "".join(lines[index + 1 :])
            break
    else:
        raise ValueError("The front matter opened with '---' is never closed.")
    try:
        loaded = yaml.safe_load(block)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" at line {mark.line + 2}" if mark is not None else ""
        problem = getattr(error, "problem", None) or "it cannot be parsed"
        raise ValueError(f"The front matter is not valid YAML{where}: {problem}.") from error
    if loaded is None:
        return {}, body
    if not isinstance(loaded, dict):
        raise ValueError("The front matter is not a mapping of keys to values.")
    return {str(key): _iso_dates(value) for key, value in loaded.items()}, body


def _iso_dates(value: Any) -> Any:
    """YAML turns unquoted dates into objects; give them back as the ISO strings JSON would carry.

    A naive datetime keeps its missing offset, so validation rejects it as it would over the API.
    """
    if isinstance(value, dt.datetime | dt.date):
        return value.isoformat()
    if isinstance(value, dict):
        return {key: _iso_dates(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_iso_dates(item) for item in value]
    return value


def _first_heading(body: str, media_type: str) -> str | None:
    for section in parse_document(body, media_type).sections:
        if section.path:
            return section.path[0]
    return None


def _read_jsonl(path: Path) -> Iterator[SourceItem]:
    try:
        raw_lines = path.read_bytes().splitlines()
    except OSError as error:
        yield SourceItem(path.name, None, f"The file cannot be read: {error.strerror}.")
        return
    for line_number, raw in enumerate(raw_lines, start=1):
        origin = f"{path.name}:{line_number}"
        try:
            line = raw.decode("utf-8-sig" if line_number == 1 else "utf-8")
        except UnicodeDecodeError:
            yield SourceItem(origin, None, "The line is not valid UTF-8 text.")
            continue
        if not line.strip():
            continue
        try:
            document = json.loads(line)
        except json.JSONDecodeError as error:
            yield SourceItem(origin, None, f"The line is not valid JSON: {error.msg}.")
            continue
        if not isinstance(document, dict):
            yield SourceItem(origin, None, "The line is not a JSON object.")
            continue
        yield SourceItem(origin, document, None)
