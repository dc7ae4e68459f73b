"""One document's attributes as ``attribute_values`` rows (see ``AttributeValueRow``)."""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from typing import Any

from service.attributes import (
    AttributeType,
    AttributeValue,
    Schema,
    epoch_days,
    epoch_micros,
)
from service.filters.text_forms import TextMode, text_form

_EMPTY: dict[str, Any] = {
    "int_value": None,
    "real_value": None,
    "bool_value": None,
    "text_value": None,
    "text_folded": None,
    "text_unaccented": None,
    "text_folded_unaccented": None,
}


def _text_columns(value: str) -> dict[str, Any]:
    return {
        "text_value": value,
        "text_folded": text_form(value, TextMode(True, False)),
        "text_unaccented": text_form(value, TextMode(False, True)),
        "text_folded_unaccented": text_form(value, TextMode(True, True)),
    }


def attribute_value_rows(
    schema: Schema, attributes: Mapping[str, AttributeValue]
) -> list[dict[str, Any]]:
    """Column values (all but ``document_id``) for the normalised ``attributes``.

    Attributes outside ``schema`` and missing ones produce no rows: both are NULL to filters.
    """
    rows: list[dict[str, Any]] = []
    for name, type_ in schema.items():
        if name not in attributes or attributes[name] is None:
            continue
        value = attributes[name]

        def row(position: int, **columns: Any) -> dict[str, Any]:
            return {"name": name, "position": position, **_EMPTY, **columns}  # noqa: B023

        if type_ is AttributeType.KEYWORD_LIST:
            assert isinstance(value, list)
            rows.extend(row(i, **_text_columns(v)) for i, v in enumerate(value))
            if not value:
                rows.append(row(-1))
        elif type_ is AttributeType.KEYWORD:
            assert isinstance(value, str)
            rows.append(row(0, **_text_columns(value)))
        elif type_ is AttributeType.INTEGER:
            assert isinstance(value, int) and not isinstance(value, bool)
            rows.append(row(0, int_value=value, real_value=float(value)))
        elif type_ is AttributeType.NUMBER:
            assert isinstance(value, int | float)
            rows.append(row(0, real_value=float(value)))
        elif type_ is AttributeType.BOOLEAN:
            rows.append(row(0, bool_value=bool(value)))
        elif type_ is AttributeType.DATE:
            assert isinstance(value, dt.date)
            rows.append(row(0, int_value=epoch_days(value)))
        else:
            assert isinstance(value, dt.datetime)
            rows.append(row(0, int_value=epoch_micros(value)))
    return rows
