"""Creating, updating, showing and removing collections."""

from __future__ import annotations

import datetime as dt
import re
import uuid
from dataclasses import asdict, dataclass, field, fields
from typing import Any

from sqlalchemy.orm import Session

from service.attributes import (
    ATTRIBUTE_NAME,
    AttributeType,
    AttributeValueError,
    Schema,
    parse_schema,
)
from service.errors import CollectionNotFound, Conflict, InvalidRequest, quoted_names
from service.filters.inference.hints import HINT_KEYS, HintError, parse_attribute_hints
from service.index.graph import BREADTH_RANGE, INDEX_MODES, LINKS_RANGE, VectorIndexSettings
from service.store import job_rows, repository
from service.store.tables import CollectionRow, JobRow
from service.usecases.callers import Caller, Role
from service.usecases.drafts import content_hash
from service.usecases.retrieval_settings import DEFAULT_RETRIEVAL, checked_retrieval
from service.usecases.runtime import Runtime

COLLECTION_NAME = re.compile(r"[a-z][a-z0-9_-]{0,62}")
SPECIAL_TOKEN_ALLOWANCE = 32
DEFAULT_CHUNKING = {"max_tokens": 200, "overlap_tokens": 40}


@dataclass(frozen=True)
class CollectionSpec:
    """What a PUT may say; fields left None keep the collection's current value.

    ``attributes``, when given, is the whole schema: an existing attribute it leaves out is a
    conflict unless ``remove_attributes`` names it, which removes it from the collection and
    from every document.
    """

    description: str | None = None
    attributes: dict[str, Any] | None = None
    remove_attributes: list[str] | None = None
    chunking: dict[str, Any] | None = None
    cite_attributes: list[str] | None = None
    answer_caution: str | None = None
    retrieval: dict[str, Any] | None = None
    vectors: dict[str, Any] | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def from_file(cls, raw: dict[str, Any]) -> CollectionSpec:
        """The spec a schema file's JSON object gives; keys that name no field are ignored."""
        given: dict[str, Any] = {f.name: raw.get(f.name) for f in fields(cls) if f.name != "extra"}
        return cls(**given)


def check_collection_name(name: str) -> None:
    if not COLLECTION_NAME.fullmatch(name):
        raise InvalidRequest(
            "Collection names must match [a-z][a-z0-9_-]{0,62}.", field="collection"
        )


def load_collection(session: Session, caller: Caller, name: str) -> CollectionRow:
    """The named collection, or the same 404 whether it is missing or outside the key's list."""
    caller.require_collection(name)
    row = repository.collection_by_name(session, name)
    if row is None:
        raise CollectionNotFound(f"Collection {name!r} does not exist.")
    return row


def lock_collection(session: Session, caller: Caller, name: str) -> CollectionRow:
    """The named collection under its write lock (see ``repository.lock_collection``), or the
    same 404 as ``load_collection``; a write takes it before it reads anything else."""
    caller.require_collection(name)
    row = repository.lock_collection(session, name)
    if row is None:
        raise CollectionNotFound(f"Collection {name!r} does not exist.")
    return row


def _checked_chunking(raw: dict[str, Any], window: int) -> dict[str, int]:
    limit = window - SPECIAL_TOKEN_ALLOWANCE
    max_tokens = raw.get("max_tokens", DEFAULT_CHUNKING["max_tokens"])
    overlap = raw.get("overlap_tokens", DEFAULT_CHUNKING["overlap_tokens"])
    unknown = set(raw) - {"max_tokens", "overlap_tokens"}
    if unknown:
        name = sorted(unknown)[0]
        raise InvalidRequest(f"chunking has no setting {name!r}.", field=f"chunking.{name}")
    if isinstance(max_tokens, bool) or not isinstance(max_tokens, int) or max_tokens < 16:
        raise InvalidRequest(
            "chunking.max_tokens must be an integer of at least 16.", field="chunking.max_tokens"
        )
    if max_tokens > limit:
        raise InvalidRequest(
            f"chunking.max_tokens must be at most {limit} for this embedder.",
            field="chunking.max_tokens",
        )
    if isinstance(overlap, bool) or not isinstance(overlap, int) or not 0 <= overlap < max_tokens:
        raise InvalidRequest(
            "chunking.overlap_tokens must be an integer from 0 to below max_tokens.",
            field="chunking.overlap_tokens",
        )
    return {"max_tokens": max_tokens, "overlap_tokens": overlap}


def default_vectors() -> dict[str, Any]:
    defaults = VectorIndexSettings()
    return {"index": defaults.index, "graph": asdict(defaults.graph)}


def _checked_vectors(raw: dict[str, Any], current: dict[str, Any]) -> dict[str, Any]:
    """The stored vector index settings after a PUT: given fields over the current ones."""
    stored = default_vectors()
    if not isinstance(raw, dict) or not isinstance(raw.get("graph", {}), dict):
        raise InvalidRequest("vectors and vectors.graph must be objects.", field="vectors")
    unknown = set(raw) - set(stored)
    if unknown:
        name = sorted(unknown)[0]
        raise InvalidRequest(f"vectors has no setting {name!r}.", field=f"vectors.{name}")
    index = raw.get("index", current.get("index", stored["index"]))
    if index not in INDEX_MODES:
        raise InvalidRequest("vectors.index must be auto, exact or graph.", field="vectors.index")
    graph = {**stored["graph"], **current.get("graph", {}), **(raw.get("graph") or {})}
    for name, value in graph.items():
        if name not in stored["graph"]:
            raise InvalidRequest(
                f"vectors.graph has no setting {name!r}.", field=f"vectors.graph.{name}"
            )
        low, high = LINKS_RANGE if name == "links" else BREADTH_RANGE
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            raise InvalidRequest(
                f"vectors.graph.{name} must be an integer from {low} to {high}.",
                field=f"vectors.graph.{name}",
            )
    if graph["search_breadth"] > graph["max_search_breadth"]:
        raise InvalidRequest(
            "vectors.graph.search_breadth must not exceed max_search_breadth.",
            field="vectors.graph.search_breadth",
        )
    return {"index": index, "graph": graph}


def _checked_hints(
    attributes: dict[str, Any], schema: Schema, current: dict[str, Any]
) -> dict[str, Any]:
    """The stored hints after a PUT: an attribute the PUT names gets exactly the hints it
    gives (none when it gives none); the others keep theirs."""
    hints = {name: given for name, given in current.items() if name in schema}
    for name, spec in attributes.items():
        raw = {key: spec[key] for key in HINT_KEYS if isinstance(spec, dict) and key in spec}
        try:
            shown = parse_attribute_hints(schema[name], raw).as_json()
        except HintError as exc:
            raise InvalidRequest(
                f"attributes.{name}.{exc.field}: {exc}.", field=f"attributes.{name}.{exc.field}"
            ) from None
        if shown:
            hints[name] = shown
        else:
            hints.pop(name, None)
    return hints


def put_collection(
    runtime: Runtime, caller: Caller, name: str, spec: CollectionSpec
) -> tuple[bool, dict[str, Any]]:
    """Create or update a collection; returns (created, view)."""
    caller.require(Role.ADMIN)
    check_collection_name(name)
    caller.require_collection(name)
    if spec.extra:
        unknown = sorted(spec.extra)[0]
        raise InvalidRequest(f"Collections have no field {unknown!r}.", field=unknown)
    try:
        new_schema = parse_schema(spec.attributes or {})
    except AttributeValueError as exc:
        raise InvalidRequest(f"{exc}.", field="attributes") from None
    removals = _checked_removals(spec.remove_attributes or [], new_schema)
    created, view, rechunk_job = runtime.retries.run(
        lambda: _put_collection(runtime, caller, name, spec, new_schema, removals)
    )
    runtime.indexes.expire(name)
    if rechunk_job is not None:
        # The command line and the tests re-chunk on a thread of their own; a server leaves
        # the job to its workers, so its queries never wait on the model.
        if runtime.jobs.runs_here:
            runtime.rebuilds.start(name)
        else:
            runtime.jobs.submitted(rechunk_job)
    return created, view


def _put_collection(
    runtime: Runtime,
    caller: Caller,
    name: str,
    spec: CollectionSpec,
    new_schema: Schema,
    removals: list[str],
) -> tuple[bool, dict[str, Any], str | None]:
    """One attempt at a PUT, in one write transaction: (created, view, the id of a new
    re-chunking job)."""
    window = runtime.embedder.window
    with runtime.write_transaction() as session:
        row = repository.lock_collection(session, name)
        if row is None:
            # Creations wait for each other, so two PUTs of one new name make it once.
            repository.lock_collection_names(session)
            row = repository.lock_collection(session, name)
        created = row is None
        old_schema = {} if row is None else parse_schema(row.attributes)
        for attr, type_ in new_schema.items():
            if attr in old_schema and old_schema[attr] is not type_:
                raise Conflict(
                    f"Attribute {attr!r} is {old_schema[attr].value}; its type cannot change."
                )
        if spec.attributes is not None:
            _check_nothing_left_out(old_schema, new_schema, removals)
        removed = sorted(set(removals) & set(old_schema))
        schema = {
            attr: type_
            for attr, type_ in {**old_schema, **new_schema}.items()
            if attr not in removed
        }
        chunking = _checked_chunking(
            spec.chunking if spec.chunking is not None else (row.chunking if row else {}), window
        )
        current_settings = dict(row.settings) if row else {}
        retrieval = checked_retrieval(spec.retrieval or {}, current_settings.get("retrieval", {}))
        vectors = _checked_vectors(spec.vectors or {}, current_settings.get("vectors", {}))
        hints = _checked_hints(
            spec.attributes or {}, schema, current_settings.get("inference_hints", {})
        )
        cite = (
            spec.cite_attributes
            if spec.cite_attributes is not None
            else [attr for attr in (row.cite_attributes if row else []) if attr not in removed]
        )
        for attr in cite:
            if attr not in schema:
                raise InvalidRequest(
                    f"cite_attributes names {attr!r}, which is not an attribute.",
                    field="cite_attributes",
                )
        now = repository.utcnow()
        schema_json = {attr: {"type": type_.value} for attr, type_ in sorted(schema.items())}
        if row is None:
            row = CollectionRow(
                name=name,
                description=spec.description or "",
                attributes=schema_json,
                chunking=chunking,
                cite_attributes=list(cite),
                answer_caution=spec.answer_caution,
                settings={"retrieval": retrieval, "vectors": vectors, "inference_hints": hints},
                embedder=runtime.embedder.name,
                chunk_generation=0,
                revision=0,
                created_at=now,
                updated_at=now,
            )
            session.add(row)
            session.flush()
            repository.bump_revision(session, row, [(None, "reset")])
            rebuild_needed = False
        else:
            retrieval_changed = current_settings.get("retrieval") != retrieval or (
                current_settings.get("vectors", default_vectors()) != vectors
            )
            active_or_pending = current_settings.get("pending_chunking") or row.chunking
            rebuild_needed = chunking != active_or_pending
            if spec.description is not None:
                row.description = spec.description
            if spec.answer_caution is not None:
                row.answer_caution = spec.answer_caution or None
            row.attributes = schema_json
            row.cite_attributes = list(cite)
            settings = {
                **current_settings,
                "retrieval": retrieval,
                "vectors": vectors,
                "inference_hints": hints,
            }
            if rebuild_needed:
                open_job = job_rows.lock_open_job(session, name, job_rows.RECHUNK)
                if chunking == row.chunking:
                    settings.pop("pending_chunking", None)
                    row.rebuild_done = None
                    row.rebuild_total = None
                    rebuild_needed = False
                    if open_job is not None:
                        _close_rechunk_job(open_job, now)
                else:
                    settings["pending_chunking"] = chunking
                    repository.drop_generations_except(session, row.id, row.chunk_generation)
                    row.rebuild_done = 0
                    row.rebuild_total = repository.count_documents(session, row.id, None)[0]
                    # A re-chunking under way goes on with the newest chunking.
                    rebuild_needed = open_job is None
                    if open_job is not None:
                        open_job.documents = row.rebuild_total
                        open_job.documents_done = 0
            row.settings = settings
            row.updated_at = now
            if removed:
                _remove_from_documents(session, row.id, removed, now)
            if retrieval_changed or removed or set(new_schema) - set(old_schema):
                repository.bump_revision(session, row, [(None, "reset")])
        view = collection_view(session, row, caller, runtime.embedder.tokenizer_name)
        job = None
        if rebuild_needed:
            job = job_rows.add_job(
                session,
                job_id=str(uuid.uuid4()),
                collection=name,
                kind=job_rows.RECHUNK,
                key_id=caller.key_id,
                key_name=caller.name,
                caller=caller.record(),
                payload={},
                documents=row.rebuild_total or 0,
                batch_documents=runtime.settings.job_batch_documents,
                skip_invalid=False,
                now=now,
            ).id
    return created, view, job


def _close_rechunk_job(job: JobRow, now: dt.datetime) -> None:
    """The chunking was put back before the re-chunking finished: its job ends, cancelled."""
    job.state = "cancelled"
    job.finished_at = now
    job.lease_expires_at = None


def _checked_removals(names: list[str], new_schema: Schema) -> list[str]:
    for attr in names:
        if not isinstance(attr, str) or not ATTRIBUTE_NAME.fullmatch(attr):
            raise InvalidRequest(
                f"remove_attributes names {attr!r}, which is not an attribute name.",
                field="remove_attributes",
            )
        if attr in new_schema:
            raise InvalidRequest(
                f"Attribute {attr!r} is both declared in attributes and listed in "
                "remove_attributes.",
                field="remove_attributes",
            )
    return sorted(set(names))


def _check_nothing_left_out(old_schema: Schema, new_schema: Schema, removals: list[str]) -> None:
    """A schema sent whole that leaves out an attribute would otherwise drop it silently."""
    left_out = sorted(set(old_schema) - set(new_schema) - set(removals))
    if len(left_out) == 1:
        raise Conflict(
            f"Attribute {left_out[0]!r} is missing from attributes; send it again to keep it, "
            "or list it in remove_attributes to remove it from the collection and its documents.",
            attributes=left_out,
        )
    if left_out:
        raise Conflict(
            f"Attributes {quoted_names(left_out)} are missing from attributes; send them again "
            "to keep them, or list them in remove_attributes to remove them from the collection "
            "and its documents.",
            attributes=left_out,
        )


def _remove_from_documents(
    session: Session, collection_id: int, removed: list[str], now: dt.datetime
) -> None:
    """Drop the attributes' values from every document, as if each had been sent without them
    (so re-sending it so is a no-op)."""
    documents = repository.documents_with_attributes(session, collection_id, removed)
    for document in documents:
        kept = {k: v for k, v in document.attributes.items() if k not in removed}
        document.attributes = kept
        document.content_hash = content_hash(
            title=document.title,
            text=document.source_text,
            media_type=document.media_type,
            source_url=document.source_url,
            attributes_json=kept,
            access=document.access,
        )
        document.updated_at = now
    repository.delete_attribute_values(session, [d.id for d in documents], removed)


def collection_view(
    session: Session, row: CollectionRow, caller: Caller, tokenizer: str
) -> dict[str, Any]:
    documents, chunks = repository.count_documents(session, row.id, caller.visible_groups)
    pending = row.settings.get("pending_chunking")
    view: dict[str, Any] = {
        "name": row.name,
        "description": row.description,
        "attributes": _attributes_with_hints(row),
        "chunking": pending or row.chunking,
        "cite_attributes": row.cite_attributes,
        "answer_caution": row.answer_caution,
        "retrieval": {**DEFAULT_RETRIEVAL, **row.settings.get("retrieval", {})},
        "vectors": row.settings.get("vectors", default_vectors()),
        "tokenizer": tokenizer,
        "embedder": row.embedder,
        "documents": documents,
        "chunks": chunks,
        "revision": row.revision,
        "created_at": row.created_at,
        "updated_at": row.updated_at,
    }
    # Progress counts every document, hidden ones included, so only an admin sees it.
    if pending is not None and caller.visible_groups is None:
        view["rebuild"] = {"done": row.rebuild_done or 0, "total": row.rebuild_total or 0}
    return view


def _attributes_with_hints(row: CollectionRow) -> dict[str, Any]:
    hints = row.settings.get("inference_hints", {})
    return {name: {**spec, **hints.get(name, {})} for name, spec in row.attributes.items()}


def get_collection(runtime: Runtime, caller: Caller, name: str) -> dict[str, Any]:
    caller.require(Role.READER)
    with runtime.transaction() as session:
        row = load_collection(session, caller, name)
        return collection_view(session, row, caller, runtime.embedder.tokenizer_name)


def list_collections(runtime: Runtime, caller: Caller) -> list[dict[str, Any]]:
    caller.require(Role.READER)
    with runtime.transaction() as session:
        return [
            collection_view(session, row, caller, runtime.embedder.tokenizer_name)
            for row in repository.all_collections(session)
            if caller.collections is None or row.name in caller.collections
        ]


def delete_collection(runtime: Runtime, caller: Caller, name: str) -> None:
    caller.require(Role.ADMIN)
    runtime.retries.run(lambda: _delete_collection(runtime, caller, name))
    runtime.indexes.forget(name)


def _delete_collection(runtime: Runtime, caller: Caller, name: str) -> None:
    with runtime.write_transaction() as session:
        row = lock_collection(session, caller, name)
        document_pks = [
            pk
            for pk, _ in repository.matching_document_ids(
                session, row.id, groups=None, condition=None
            )
        ]
        repository.delete_documents(session, document_pks)
        session.delete(row)


def attribute_schema(row: CollectionRow) -> dict[str, AttributeType]:
    return parse_schema(row.attributes)
