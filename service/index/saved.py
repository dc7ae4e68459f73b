"""A collection's index saved to a directory and read back at the next start.

Under the index directory each collection has a folder (its name) holding ``manifest.json``
and one folder per saved version. A version's files are written into a temporary folder, each
flushed to disk, and the folder is then renamed into place; the manifest, written to a
temporary file, flushed and renamed over the old one, is what makes a version current. A crash
at any point leaves the old manifest with its complete version, or the new ones: never a
manifest naming a half-written version. The version before the current one is kept a while,
for a reader that read the old manifest just before it was replaced.

The files are ``.npy`` arrays, read with ``allow_pickle=False``; one JSON file of strings and
attribute values; and the graph's links as faiss writes them, without the vectors (the graph
reads the saved vectors in place). Nothing read can run code. The manifest records the format,
what the index was built from (``SavedIdentity``: the store, the collection and its chunking
generation, the embedder, how rows were made), the store revision the index reflects, and each
file's size and SHA-256, and carries a checksum of its own. Reading checks all of that before
it parses an array; faiss reads the graph only once its checksum holds.

Everything a snapshot holds is saved as it is, tombstoned rows too, so an index read back is
the one saved: the same rows in the same order, the same statistics, the same graph.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import shutil
import sys
import time
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any, Literal

import numpy as np

from service.attributes import AttributeValue, Schema, normalize_value, to_json_value
from service.filters.columns import (
    PLAIN,
    AttributeColumns,
    Column,
    KeywordColumn,
    KeywordListColumn,
    ValueColumn,
)
from service.index.collection_index import (
    NUMERIC_FIELDS,
    AccessGroups,
    CollectionIndex,
    IndexedDocument,
    IndexSnapshot,
    RowPrefix,
)
from service.index.graph import GraphSettings, VectorGraph, VectorIndexSettings
from service.index.lexical import LexicalIndex, LexicalParts
from service.index.vectors import VectorMatrix

FORMAT = 1
MANIFEST = "manifest.json"
STRINGS = "rows.json"
GRAPH = "graph.faiss"
# A temporary file or folder left this long was left by a save that died: no writer uses it.
KEEP_OLD_SECONDS = 600.0

RejectionKind = Literal["missing", "corrupt", "format", "foreign", "outdated"]


class SavedIndexRejected(Exception):
    """A saved index that cannot be used, and why, in one sentence.

    ``kind``: ``missing`` (none saved), ``corrupt`` (a file or the manifest does not match its
    checksum, or is unreadable), ``format`` (written by another format), ``foreign`` (another
    store, embedder or collection), ``outdated`` (the collection was chunked or analysed
    differently since, or the manifest does not say when its collection was made).
    """

    def __init__(self, kind: RejectionKind, reason: str) -> None:
        super().__init__(reason)
        self.kind: RejectionKind = kind
        self.reason = reason


@dataclass(frozen=True)
class SavedIdentity:
    """What an index was built from; a saved index is used only where all of it matches.

    ``rows_made_by`` names how the rows were made from the store (the schema and the text
    analysis), as a fingerprint the registry computes. ``collection_created`` (ISO 8601) tells a
    collection from one made again under its name, which SQLite may give the same id; a
    manifest written before it was recorded has none, so its index is built afresh once.
    """

    store_id: str
    collection_id: int
    generation: int
    embedder: str
    dimension: int
    metric: str
    rows_made_by: str
    collection_created: str = ""


@dataclass(frozen=True)
class SavedIndexInfo:
    """What a manifest says of its version."""

    identity: SavedIdentity
    revision: int
    rows: int
    live_rows: int
    graph_rows: int | None
    bytes: int
    saved_at: str
    version: str


@dataclass(frozen=True)
class LoadedIndex:
    index: CollectionIndex
    info: SavedIndexInfo


class IndexDirectory:
    """The saved indexes of one process (replicas each keep their own directory)."""

    def __init__(self, root: Path) -> None:
        self.root = root

    def folder(self, name: str) -> Path:
        return self.root / name

    # saving --------------------------------------------------------------------------------

    def save(self, name: str, snapshot: IndexSnapshot, identity: SavedIdentity) -> SavedIndexInfo:
        """Write ``snapshot`` as the collection's current saved index; see the module
        docstring for how a crash never leaves a half index behind."""
        folder = self.folder(name)
        folder.mkdir(parents=True, exist_ok=True)
        version = f"r{snapshot.revision:012d}-{uuid.uuid4().hex[:8]}"
        temporary = folder / f".tmp-{version}"
        temporary.mkdir()
        try:
            body = _write_files(temporary, snapshot)
            for path in temporary.iterdir():
                _flush(path)
            _flush(temporary)
            os.rename(temporary, folder / version)
        except BaseException:
            shutil.rmtree(temporary, ignore_errors=True)
            raise
        _flush(folder)
        files = body.pop("files")
        manifest = {
            "format": FORMAT,
            "identity": asdict(identity),
            "revision": snapshot.revision,
            "rows": snapshot.n_rows,
            "live_rows": snapshot.live_rows,
            "saved_at": dt.datetime.now(dt.UTC).isoformat(),
            "version": version,
            "files": files,
            **body,
        }
        text = json.dumps({"body": manifest, "sha256": _body_checksum(manifest)}, indent=1)
        staged = folder / f".manifest-{uuid.uuid4().hex[:8]}"
        staged.write_text(text, encoding="utf-8")
        _flush(staged)
        os.replace(staged, folder / MANIFEST)
        _flush(folder)
        _remove_old_versions(folder, keep=version)
        return _info(manifest)

    def remove(self, name: str) -> None:
        """Remove the collection's saved index (it was deleted): the manifest first, so a
        removal cut short leaves nothing that reads as an index."""
        folder = self.folder(name)
        (folder / MANIFEST).unlink(missing_ok=True)
        shutil.rmtree(folder, ignore_errors=True)

    # reading -------------------------------------------------------------------------------

    def describe(self, name: str) -> SavedIndexInfo:
        """The current version's manifest, checked against its own checksum (not the files)."""
        return _info(self._manifest(name))

    def load(
        self,
        name: str,
        identity: SavedIdentity,
        *,
        schema: Schema | None,
        vectors: VectorIndexSettings,
        bm25_k1: float,
        bm25_b: float,
    ) -> LoadedIndex:
        """The saved index, verified; raises ``SavedIndexRejected`` saying why it cannot be
        used."""
        manifest = self._manifest(name)
        info = _info(manifest)
        _check_identity(info.identity, identity)
        version = self.folder(name) / info.version
        _verify_files(version, manifest["files"])
        try:
            snapshot = _read_snapshot(version, manifest, schema, vectors)
        except OSError as exc:
            raise SavedIndexRejected(
                "corrupt", f"its files cannot be read ({exc.strerror or exc})."
            ) from exc
        except (ValueError, KeyError, TypeError, IndexError, RuntimeError) as exc:
            raise SavedIndexRejected("corrupt", f"its files do not fit together ({exc}).") from exc
        index = CollectionIndex.restored(snapshot, schema=schema, bm25_k1=bm25_k1, bm25_b=bm25_b)
        return LoadedIndex(index, info)

    def check(self, name: str, identity: SavedIdentity, *, files: bool) -> SavedIndexInfo:
        """What the saved index says of itself, once its manifest and identity (and, with
        ``files``, every file's checksum) are checked; raises ``SavedIndexRejected``."""
        manifest = self._manifest(name)
        info = _info(manifest)
        _check_identity(info.identity, identity)
        if files:
            _verify_files(self.folder(name) / info.version, manifest["files"])
        return info

    def _manifest(self, name: str) -> dict[str, Any]:
        path = self.folder(name) / MANIFEST
        try:
            stored = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise SavedIndexRejected("missing", "no index of it was saved.") from None
        except (OSError, ValueError) as exc:
            raise SavedIndexRejected("corrupt", "its manifest cannot be read.") from exc
        body = stored.get("body") if isinstance(stored, dict) else None
        if not isinstance(body, dict) or stored.get("sha256") != _body_checksum(body):
            raise SavedIndexRejected("corrupt", "its manifest does not match its checksum.")
        if body.get("format") != FORMAT:
            raise SavedIndexRejected(
                "format", f"it was saved in format {body.get('format')!r}, not {FORMAT}."
            )
        return body


# writing ---------------------------------------------------------------------------------------


def _write_files(folder: Path, snapshot: IndexSnapshot) -> dict[str, Any]:
    """Every file of a version; returns the manifest's parts that describe them."""
    n = snapshot.n_rows
    arrays: dict[str, np.ndarray] = {
        "vectors": snapshot.vectors.padded_rows,
        "squared_norms": snapshot.vectors.squared_norms,
        **{name: getattr(snapshot, name)[:n] for name, _, _ in NUMERIC_FIELDS},
        "sort_keys": snapshot.sort_keys[:n],
    }
    runs, run_of_row = _runs(snapshot)
    arrays["run_of_row"] = run_of_row
    sections, arrays["section_codes"] = _coded(list(snapshot.sections))
    gaps, arrays["gap_codes"] = _coded(list(snapshot.gaps))

    lexical = snapshot.lexical.parts()
    arrays.update(
        {
            "lexical.row_indptr": lexical.row_indptr,
            "lexical.row_terms": lexical.row_terms,
            "lexical.row_counts": lexical.row_counts,
            "lexical.lengths": lexical.lengths,
            "lexical.live": lexical.live,
            "lexical.df": lexical.document_frequency,
        }
    )
    for number, (data, indices, indptr) in enumerate(lexical.segment_arrays):
        arrays[f"lexical.segment{number}.data"] = data
        arrays[f"lexical.segment{number}.indices"] = indices
        arrays[f"lexical.segment{number}.indptr"] = indptr

    access = snapshot.access
    arrays["access.entry_rows"] = access.entry_rows[: access.entries]
    arrays["access.entry_codes"] = access.entry_codes[: access.entries]
    arrays["access.public"] = access.public[: access.n_rows]

    document_ids = list(snapshot.documents)
    document_rows = [snapshot.documents[d].rows for d in document_ids]
    arrays["documents.rows"] = (
        np.concatenate(document_rows).astype(np.int64) if document_rows else np.zeros(0, np.int64)
    )
    arrays["documents.counts"] = np.array([len(r) for r in document_rows], dtype=np.int64)

    columns = _column_arrays(snapshot.columns, arrays)

    strings = {
        "chunk_ids": list(snapshot.chunk_ids),
        "texts": list(snapshot.texts),
        "sections": sections,
        "gaps": gaps,
        "runs": runs,
        "terms": lexical.terms,
        "access_groups": sorted(access.codes, key=access.codes.__getitem__),
        "documents": {
            "ids": document_ids,
            "source_urls": [snapshot.documents[d].source_url for d in document_ids],
        },
    }
    files: dict[str, dict[str, Any]] = {}
    for name, array in arrays.items():
        path = folder / f"{name}.npy"
        np.save(path, np.ascontiguousarray(array), allow_pickle=False)
        files[path.name] = _file_facts(path)
    path = folder / STRINGS
    path.write_text(json.dumps(strings, ensure_ascii=False), encoding="utf-8")
    files[path.name] = _file_facts(path)
    graph = snapshot.graph
    if graph is not None:
        path = folder / GRAPH
        graph.write(path)
        files[path.name] = _file_facts(path)
    return {
        "files": files,
        "metric": snapshot.vectors.metric,
        "dimension": snapshot.vectors.dimension,
        "live_length": lexical.live_length,
        "segments": lexical.segments,
        "columns": columns,
        "graph": None
        if graph is None
        else {"rows": graph.rows, "settings": asdict(graph.settings)},
    }


def _runs(snapshot: IndexSnapshot) -> tuple[dict[str, list[Any]], np.ndarray]:
    """Rows grouped into runs of one document version (consecutive rows with one document,
    title, access list and attributes), so each run's values are saved once."""
    runs: dict[str, list[Any]] = {"document_ids": [], "titles": [], "access": [], "attributes": []}
    run_of_row = np.zeros(snapshot.n_rows, dtype=np.int64)
    previous: tuple[str, str, tuple[str, ...], dict[str, AttributeValue]] | None = None
    for row, key in enumerate(
        zip(
            snapshot.document_ids,
            snapshot.titles,
            snapshot.access_lists,
            snapshot.attributes,
            strict=True,
        )
    ):
        if previous is None or not _same_run(previous, key):
            runs["document_ids"].append(key[0])
            runs["titles"].append(key[1])
            runs["access"].append(list(key[2]))
            runs["attributes"].append({n: to_json_value(v) for n, v in key[3].items()})
            previous = key
        run_of_row[row] = len(runs["document_ids"]) - 1
    return runs, run_of_row


def _same_run(
    a: tuple[str, str, tuple[str, ...], dict[str, AttributeValue]],
    b: tuple[str, str, tuple[str, ...], dict[str, AttributeValue]],
) -> bool:
    return a[0] == b[0] and a[1] == b[1] and a[2] == b[2] and (a[3] is b[3] or a[3] == b[3])


def _coded(values: Sequence[str]) -> tuple[list[str], np.ndarray]:
    """The distinct values in first-seen order, and each value's position among them."""
    codes: dict[str, int] = {}
    positions = np.fromiter(
        (codes.setdefault(v, len(codes)) for v in values), dtype=np.int64, count=len(values)
    )
    return list(codes), positions


def _column_arrays(
    columns: AttributeColumns | None, arrays: dict[str, np.ndarray]
) -> list[dict[str, str]] | None:
    if columns is None:
        return None
    described = []
    for number, (name, column) in enumerate(columns.columns.items()):
        prefix = f"column{number}"
        if isinstance(column, KeywordColumn):
            kind = "keyword"
            arrays[f"{prefix}.dictionary"] = column.forms[PLAIN]
            arrays[f"{prefix}.codes"] = column.codes[PLAIN]
        elif isinstance(column, KeywordListColumn):
            kind = "keyword[]"
            arrays[f"{prefix}.dictionary"] = column.dictionary
            arrays[f"{prefix}.offsets"] = column.offsets
            arrays[f"{prefix}.codes"] = column.element_codes
            arrays[f"{prefix}.present"] = column.present
        else:
            kind = "values"
            arrays[f"{prefix}.values"] = column.values
            arrays[f"{prefix}.present"] = column.present
        described.append({"name": name, "kind": kind, "type": columns.schema[name].value})
    return described


def _file_facts(path: Path) -> dict[str, Any]:
    with path.open("rb") as stream:
        digest = hashlib.file_digest(stream, "sha256").hexdigest()
    return {"bytes": path.stat().st_size, "sha256": digest}


def _flush(path: Path) -> None:
    """Flush a file's or a folder's contents to disk (a folder: the names it holds)."""
    descriptor = os.open(path, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def _remove_old_versions(folder: Path, *, keep: str) -> None:
    """Remove every version but ``keep`` and the one before it (a reader may have read the old
    manifest just before it was replaced), and temporary files a crash left behind."""
    now = time.time()
    older = sorted(
        (p for p in folder.iterdir() if p.is_dir() and p.name.startswith("r") and p.name != keep),
        key=lambda p: p.stat().st_mtime,
    )
    for path in older[:-1]:
        shutil.rmtree(path, ignore_errors=True)
    for path in folder.iterdir():
        left = path.name.startswith((".tmp-", ".manifest-"))
        if left and now - path.stat().st_mtime > KEEP_OLD_SECONDS:
            if path.is_dir():
                shutil.rmtree(path, ignore_errors=True)
            else:
                path.unlink(missing_ok=True)


def _body_checksum(body: Mapping[str, Any]) -> str:
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


# reading ---------------------------------------------------------------------------------------


def _info(manifest: Mapping[str, Any]) -> SavedIndexInfo:
    try:
        graph = manifest["graph"]
        return SavedIndexInfo(
            identity=SavedIdentity(**manifest["identity"]),
            revision=int(manifest["revision"]),
            rows=int(manifest["rows"]),
            live_rows=int(manifest["live_rows"]),
            graph_rows=None if graph is None else int(graph["rows"]),
            bytes=sum(int(f["bytes"]) for f in manifest["files"].values()),
            saved_at=str(manifest["saved_at"]),
            version=str(manifest["version"]),
        )
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise SavedIndexRejected("corrupt", "its manifest lacks what it must say.") from exc


def _check_identity(saved: SavedIdentity, wanted: SavedIdentity) -> None:
    if saved.store_id != wanted.store_id:
        raise SavedIndexRejected(
            "foreign", f"it was saved from store {saved.store_id}, not {wanted.store_id}."
        )
    if (saved.embedder, saved.dimension) != (wanted.embedder, wanted.dimension):
        raise SavedIndexRejected(
            "foreign",
            f"it was saved with the embedder {saved.embedder} ({saved.dimension} dimensions), "
            f"not {wanted.embedder} ({wanted.dimension}).",
        )
    if saved.collection_id != wanted.collection_id or (
        saved.collection_created and saved.collection_created != wanted.collection_created
    ):
        raise SavedIndexRejected("foreign", "it was saved from an earlier collection of the name.")
    if saved.collection_created != wanted.collection_created:
        raise SavedIndexRejected(
            "outdated", "it was saved before saved indexes recorded when their collection was made."
        )
    if saved.generation != wanted.generation:
        raise SavedIndexRejected("outdated", "the collection was chunked again since it was saved.")
    if (saved.metric, saved.rows_made_by) != (wanted.metric, wanted.rows_made_by):
        raise SavedIndexRejected(
            "outdated", "the collection's schema or retrieval settings changed since it was saved."
        )


def _verify_files(version: Path, files: Mapping[str, Mapping[str, Any]]) -> None:
    for name, facts in files.items():
        path = version / name
        if path.parent != version:
            raise SavedIndexRejected("corrupt", f"its manifest names a file outside it ({name}).")
        try:
            if path.stat().st_size != facts["bytes"] or _file_facts(path) != dict(facts):
                raise SavedIndexRejected("corrupt", f"its file {name} does not match its checksum.")
        except FileNotFoundError:
            raise SavedIndexRejected("corrupt", f"its file {name} is missing.") from None
        except OSError as exc:
            raise SavedIndexRejected(
                "corrupt", f"its file {name} cannot be read ({exc.strerror or exc})."
            ) from exc


def _read_snapshot(
    version: Path,
    manifest: Mapping[str, Any],
    schema: Schema | None,
    settings: VectorIndexSettings,
) -> IndexSnapshot:
    def array(name: str, mapped: bool = False) -> np.ndarray:
        loaded = np.load(
            version / f"{name}.npy", allow_pickle=False, mmap_mode="c" if mapped else None
        )
        # A plain array over the mapped pages: results computed from it are plain arrays too.
        return loaded.view(np.ndarray) if mapped else loaded

    strings = json.loads((version / STRINGS).read_text(encoding="utf-8"))
    n = int(manifest["rows"])
    # The vectors stay in the file's pages (copy-on-write: rows appended later go to memory).
    vectors = VectorMatrix.restored(
        array("vectors", mapped=True),
        array("squared_norms"),
        metric=manifest["metric"],
        dimension=int(manifest["dimension"]),
    )
    lexical = LexicalIndex.from_parts(
        LexicalParts(
            terms=strings["terms"],
            segments=[(int(a), int(b), int(c)) for a, b, c in manifest["segments"]],
            segment_arrays=[
                (
                    array(f"lexical.segment{i}.data"),
                    array(f"lexical.segment{i}.indices"),
                    array(f"lexical.segment{i}.indptr"),
                )
                for i in range(len(manifest["segments"]))
            ],
            row_indptr=array("lexical.row_indptr"),
            row_terms=array("lexical.row_terms"),
            row_counts=array("lexical.row_counts"),
            lengths=array("lexical.lengths"),
            live=array("lexical.live"),
            document_frequency=array("lexical.df"),
            live_length=float(manifest["live_length"]),
        )
    )
    if vectors.n_rows != n or lexical.n_rows != n:
        raise ValueError("the vectors and postings disagree on the number of rows")

    runs = strings["runs"]
    run_of_row = array("run_of_row").tolist()
    run_attributes = [_attributes(schema, stored) for stored in runs["attributes"]]
    run_access = [tuple(groups) for groups in runs["access"]]
    sections = strings["sections"]
    gaps = [sys.intern(gap) for gap in strings["gaps"]]
    lists: dict[str, list[Any]] = {
        "chunk_ids": strings["chunk_ids"],
        "document_ids": [runs["document_ids"][r] for r in run_of_row],
        "titles": [runs["titles"][r] for r in run_of_row],
        "sections": [sections[c] for c in array("section_codes").tolist()],
        "texts": strings["texts"],
        "attributes": [run_attributes[r] for r in run_of_row],
        "access_lists": [run_access[r] for r in run_of_row],
        "gaps": [gaps[c] for c in array("gap_codes").tolist()],
    }
    if any(len(items) != n for items in lists.values()):
        raise ValueError("the per-row lists disagree on the number of rows")
    numeric: dict[str, Any] = {name: array(name) for name, _, _ in NUMERIC_FIELDS}
    sort_keys = array("sort_keys")
    if any(len(values) != n for values in (*numeric.values(), sort_keys)):
        raise ValueError("the per-row arrays disagree on the number of rows")
    order = np.argsort(sort_keys, kind="stable")
    chunk_ids = lists["chunk_ids"]

    groups = strings["access_groups"]
    public = array("access.public")
    entry_rows = array("access.entry_rows")
    access = AccessGroups(
        codes={group: code for code, group in enumerate(groups)},
        entry_rows=entry_rows,
        entry_codes=array("access.entry_codes"),
        entries=len(entry_rows),
        public=public,
        n_rows=len(public),
    )

    document_ids = strings["documents"]["ids"]
    source_urls = strings["documents"]["source_urls"]
    counts = array("documents.counts")
    all_rows = array("documents.rows")
    if len(counts) != len(document_ids) or int(counts.sum()) != len(all_rows):
        raise ValueError("the documents' rows do not fit their counts")
    starts = np.concatenate([[0], np.cumsum(counts)]).tolist()
    documents = {
        document_id: IndexedDocument(all_rows[starts[i] : starts[i + 1]], source_urls[i])
        for i, document_id in enumerate(document_ids)
    }

    prefixes: dict[str, Any] = {name: RowPrefix(items, n) for name, items in lists.items()}
    snapshot = IndexSnapshot(
        revision=int(manifest["revision"]),
        n_rows=n,
        **prefixes,
        **numeric,
        sort_keys=sort_keys,
        lexical=lexical,
        vectors=vectors,
        columns=_read_columns(manifest["columns"], schema, n, array),
        access=access,
        documents=documents,
        sorted_chunk_ids=[chunk_ids[row] for row in order.tolist()],
        numeric_buffers=numeric,
    )
    graph = manifest["graph"]
    if graph is not None:
        saved_settings = VectorIndexSettings(
            index=settings.index, graph=GraphSettings(**graph["settings"])
        )
        read = VectorGraph.read(
            version / GRAPH, vectors, saved_settings, rows=int(graph["rows"]), layout=0
        )
        snapshot = replace(snapshot, graph=read)
    return snapshot


def _attributes(schema: Schema | None, stored: Mapping[str, Any]) -> dict[str, AttributeValue]:
    if schema is None:
        return {}
    return {
        name: normalize_value(name, schema[name], value)
        for name, value in stored.items()
        if name in schema and value is not None
    }


def _read_columns(
    described: list[dict[str, str]] | None,
    schema: Schema | None,
    n: int,
    array: Callable[[str], np.ndarray],
) -> AttributeColumns | None:
    if described is None or schema is None:
        if (described is None) != (schema is None):
            raise ValueError("the attribute columns do not fit the schema")
        return None
    if [d["name"] for d in described] != list(schema) or any(
        d["type"] != schema[d["name"]].value for d in described
    ):
        raise ValueError("the attribute columns do not fit the schema")
    columns: dict[str, Column] = {}
    for number, item in enumerate(described):
        prefix = f"column{number}"
        column: Column
        if item["kind"] == "keyword":
            column = KeywordColumn.from_plain(
                array(f"{prefix}.dictionary"), array(f"{prefix}.codes")
            )
            length = len(column.present)
        elif item["kind"] == "keyword[]":
            offsets = array(f"{prefix}.offsets")
            lengths = np.diff(offsets)
            column = KeywordListColumn(
                array(f"{prefix}.dictionary"),
                offsets,
                array(f"{prefix}.codes"),
                np.repeat(np.arange(len(lengths), dtype=np.int64), lengths),
                array(f"{prefix}.present"),
            )
            length = len(column.present)
        else:
            column = ValueColumn(array(f"{prefix}.values"), array(f"{prefix}.present"))
            length = len(column.values)
        if length != n:
            raise ValueError(f"the column of {item['name']!r} does not cover every row")
        columns[item["name"]] = column
    return AttributeColumns(dict(schema), n, columns)
