"""API keys: made and revoked by the CLI, stored as salted hashes, checked in constant time."""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import re
import secrets
from dataclasses import dataclass

from sqlalchemy.orm import Session

from service.errors import (
    CollectionNotFound,
    Conflict,
    InvalidRequest,
    NotFound,
    Unauthenticated,
    quoted_names,
)
from service.store import repository
from service.store.tables import ApiKeyRow
from service.usecases.callers import Caller, Role

KEY_PREFIX = "xk"
_KEY_SHAPE = re.compile(r"xk_([0-9a-f]{16})_([A-Za-z0-9_-]{43})")
_NAME = re.compile(r"[A-Za-z0-9._:-]{1,128}")
_GROUP = re.compile(r"[A-Za-z0-9._:-]{1,128}")
LAST_USED_RESOLUTION = dt.timedelta(seconds=60)


def _digest(salt: bytes, secret: str) -> bytes:
    # Keys are 256-bit random secrets, not passwords, so one keyed hash suffices; the salt keeps
    # equal secrets (there are none in practice) from sharing a stored value.
    return hmac.new(salt, secret.encode("ascii"), hashlib.sha256).digest()


@dataclass(frozen=True)
class KeyInfo:
    name: str
    role: str
    groups: list[str]
    collections: list[str] | None
    created_at: dt.datetime
    last_used_at: dt.datetime | None
    revoked: bool


def _info(row: ApiKeyRow) -> KeyInfo:
    return KeyInfo(
        name=row.name,
        role=row.role,
        groups=list(row.groups),
        collections=None if row.collections is None else list(row.collections),
        created_at=row.created_at,
        last_used_at=row.last_used_at,
        revoked=row.revoked_at is not None,
    )


def _names(values: list[str], what: str) -> list[str]:
    for value in values:
        if not _GROUP.fullmatch(value):
            raise InvalidRequest(f"{what} name {value!r} is not valid.", field=what)
    return sorted(set(values))


def create_key(
    session: Session,
    *,
    role: str,
    groups: list[str],
    collections: list[str] | None,
    name: str | None,
) -> tuple[str, KeyInfo]:
    """Store a new key and return it in clear text: the only time it is ever shown.

    ``collections`` limits the key to collections that exist now: a misspelt name would give
    a key that can reach nothing, and nothing would say why.
    """
    try:
        parsed_role = Role.parse(role)
    except KeyError:
        raise InvalidRequest("role must be reader, writer or admin.", field="role") from None
    lookup = secrets.token_hex(8)
    secret = secrets.token_urlsafe(32)
    key_name = name or f"key-{lookup[:8]}"
    if not _NAME.fullmatch(key_name):
        raise InvalidRequest(f"key name {key_name!r} is not valid.", field="name")
    if repository.key_by_name(session, key_name) is not None:
        raise Conflict(f"A key named {key_name!r} already exists.")
    allowed = None if collections is None else _names(collections, "collection")
    if allowed is not None:
        _check_collections_exist(session, allowed)
    salt = secrets.token_bytes(16)
    row = ApiKeyRow(
        name=key_name,
        lookup=lookup,
        salt=salt,
        secret_hash=_digest(salt, secret),
        role=parsed_role.name.lower(),
        groups=_names(groups, "group"),
        collections=allowed,
        created_at=repository.utcnow(),
    )
    session.add(row)
    session.flush()
    return f"{KEY_PREFIX}_{lookup}_{secret}", _info(row)


def _check_collections_exist(session: Session, names: list[str]) -> None:
    missing = [name for name in names if repository.collection_by_name(session, name) is None]
    if len(missing) == 1:
        raise CollectionNotFound(
            f"Collection {missing[0]!r} does not exist; create it before giving a key access to it."
        )
    if missing:
        raise CollectionNotFound(
            f"Collections {quoted_names(missing)} do not exist; create them before giving a "
            "key access to them."
        )


def revoke_key(session: Session, name: str) -> None:
    row = repository.key_by_name(session, name)
    if row is None:
        raise NotFound(f"No key is named {name!r}.")
    if row.revoked_at is None:
        row.revoked_at = repository.utcnow()


def caller_named(session: Session, name: str) -> Caller | None:
    """The caller a key's name stands for, revoked or not (explain asks as a named key)."""
    if not _NAME.fullmatch(name):
        return None
    row = repository.key_by_name(session, name)
    if row is None:
        return None
    return Caller(
        key_id=row.id,
        name=row.name,
        role=Role.parse(row.role),
        groups=frozenset(row.groups),
        collections=None if row.collections is None else frozenset(row.collections),
    )


def list_keys(session: Session) -> list[KeyInfo]:
    return [_info(row) for row in repository.all_keys(session)]


def authenticate(reader: repository.KeyReader, presented: str | None) -> Caller:
    """The caller behind a bearer key; every failure looks the same to the client."""
    failure = Unauthenticated("A valid API key is required in the Authorization header.")
    if not presented:
        raise failure
    match = _KEY_SHAPE.fullmatch(presented)
    if match is None:
        raise failure
    row = reader.by_lookup(match.group(1))
    if row is None or row.revoked_at is not None:
        raise failure
    if not hmac.compare_digest(_digest(row.salt, match.group(2)), row.secret_hash):
        raise failure
    now = repository.utcnow()
    if row.last_used_at is None or now - row.last_used_at > LAST_USED_RESOLUTION:
        reader.mark_used(row.id, now)
    return Caller(
        key_id=row.id,
        name=row.name,
        role=Role.parse(row.role),
        groups=frozenset(row.groups),
        collections=None if row.collections is None else frozenset(row.collections),
    )
