"""Who is asking: the role, groups and collections of a key, and the checks they imply."""

from __future__ import annotations

from dataclasses import dataclass
from enum import IntEnum
from typing import Any

from service.errors import CollectionNotFound, Forbidden


class Role(IntEnum):
    READER = 1
    WRITER = 2
    ADMIN = 3

    @classmethod
    def parse(cls, name: str) -> Role:
        return cls[name.upper()]


@dataclass(frozen=True, slots=True)
class Caller:
    key_id: int | None
    name: str
    role: Role
    groups: frozenset[str]
    collections: frozenset[str] | None

    @property
    def is_admin(self) -> bool:
        return self.role is Role.ADMIN

    @property
    def visible_groups(self) -> frozenset[str] | None:
        """Groups the caller reads with; None means it sees every document (an admin)."""
        return None if self.is_admin else self.groups

    def require(self, role: Role) -> None:
        if self.role < role:
            raise Forbidden(
                f"This key's role ({self.role.name.lower()}) does not allow this route."
            )

    def require_collection(self, name: str) -> None:
        """A collection outside the key's list is reported exactly like a missing one."""
        if self.collections is not None and name not in self.collections:
            raise CollectionNotFound(f"Collection {name!r} does not exist.")

    def may_see(self, access: list[str] | tuple[str, ...]) -> bool:
        return self.is_admin or not access or not self.groups.isdisjoint(access)

    def record(self) -> dict[str, Any]:
        """What a job keeps of its sender, so its worker acts with the sender's rights."""
        return {
            "role": self.role.name.lower(),
            "groups": sorted(self.groups),
            "collections": None if self.collections is None else sorted(self.collections),
        }

    @classmethod
    def from_record(cls, key_id: int | None, name: str, record: dict[str, Any]) -> Caller:
        return cls(
            key_id=key_id,
            name=name,
            role=Role.parse(record["role"]),
            groups=frozenset(record["groups"]),
            collections=None if record["collections"] is None else frozenset(record["collections"]),
        )


LOCAL_ADMIN = Caller(
    key_id=None, name="local", role=Role.ADMIN, groups=frozenset(), collections=None
)
