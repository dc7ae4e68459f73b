"""Optional per-attribute hints from the collection's schema, read and checked once.

A hint never changes what a filter means; it only tells inference how people speak of an
attribute: what it is (``description``), other names for its values (``aliases``), the phrases
that mean true or false (``phrases``), and whether to infer it at all (``infer``).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from service.attributes import AttributeType

HINT_KEYS = ("description", "aliases", "phrases", "infer")
MAX_DESCRIPTION_CHARS = 1000
MAX_PHRASE_CHARS = 100
MAX_PHRASES = 2000
_KEYWORD_TYPES = (AttributeType.KEYWORD, AttributeType.KEYWORD_LIST)


class HintError(ValueError):
    """A hint that cannot be used; ``field`` is its dotted path below the attribute."""

    def __init__(self, message: str, field: str) -> None:
        super().__init__(message)
        self.field = field


@dataclass(frozen=True)
class AttributeHints:
    description: str | None = None
    aliases: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    phrases: Mapping[bool, tuple[str, ...]] = field(default_factory=dict)
    infer: bool = True

    def as_json(self) -> dict[str, Any]:
        """Only the hints that were given, in the shape a PUT takes."""
        shown: dict[str, Any] = {}
        if self.description is not None:
            shown["description"] = self.description
        if self.aliases:
            shown["aliases"] = {value: list(names) for value, names in self.aliases.items()}
        if self.phrases:
            shown["phrases"] = {
                "true": list(self.phrases.get(True, ())),
                "false": list(self.phrases.get(False, ())),
            }
        if not self.infer:
            shown["infer"] = False
        return shown


NO_HINTS = AttributeHints()
InferenceHints = Mapping[str, AttributeHints]


def parse_attribute_hints(type_: AttributeType, raw: Mapping[str, Any]) -> AttributeHints:
    """The hint keys of one attribute's spec (other keys are ignored); raises ``HintError``."""
    description = raw.get("description")
    if description is not None and (
        not isinstance(description, str) or len(description) > MAX_DESCRIPTION_CHARS
    ):
        raise HintError(
            f"description must be a string of at most {MAX_DESCRIPTION_CHARS} characters",
            "description",
        )
    infer = raw.get("infer", True)
    if not isinstance(infer, bool):
        raise HintError("infer must be true or false", "infer")
    aliases: dict[str, tuple[str, ...]] = {}
    if raw.get("aliases") is not None:
        if type_ not in _KEYWORD_TYPES:
            raise HintError("aliases apply to keyword and keyword[] attributes only", "aliases")
        aliases = _phrase_lists(raw["aliases"], "aliases", None)
    phrases: dict[bool, tuple[str, ...]] = {}
    if raw.get("phrases") is not None:
        if type_ is not AttributeType.BOOLEAN:
            raise HintError("phrases apply to boolean attributes only", "phrases")
        by_name = _phrase_lists(raw["phrases"], "phrases", ("true", "false"))
        phrases = {name == "true": lists for name, lists in by_name.items()}
    return AttributeHints(description=description, aliases=aliases, phrases=phrases, infer=infer)


def _phrase_lists(
    raw: Any, name: str, allowed_keys: tuple[str, ...] | None
) -> dict[str, tuple[str, ...]]:
    if not isinstance(raw, dict):
        raise HintError(f"{name} must be an object of lists of phrases", name)
    lists: dict[str, tuple[str, ...]] = {}
    total = 0
    for key, phrases in raw.items():
        if not isinstance(key, str) or not key:
            raise HintError(f"{name} keys must be non-empty strings", name)
        if allowed_keys is not None and key not in allowed_keys:
            raise HintError(f"{name} takes only the keys {' and '.join(allowed_keys)}", name)
        where = f"{name}.{key}"
        if not isinstance(phrases, list) or not all(
            isinstance(p, str) and p.strip() and len(p) <= MAX_PHRASE_CHARS for p in phrases
        ):
            raise HintError(
                f"{where} must be a list of non-empty phrases of at most"
                f" {MAX_PHRASE_CHARS} characters",
                where,
            )
        total += len(phrases)
        if total > MAX_PHRASES:
            raise HintError(f"{name} may hold at most {MAX_PHRASES} phrases in all", name)
        lists[key] = tuple(dict.fromkeys(p.strip() for p in phrases))
    return lists


def stored_hints(
    schema: Mapping[str, AttributeType], settings: Mapping[str, Any]
) -> InferenceHints:
    """The hints a collection's settings keep (checked when they were written), per attribute."""
    stored = settings.get("inference_hints", {})
    return {
        name: parse_attribute_hints(schema[name], raw)
        for name, raw in stored.items()
        if name in schema
    }
