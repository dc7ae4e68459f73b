"""In-memory attribute columns aligned with the index's chunk rows 0..n-1.

Keywords are dictionary-coded against sorted dictionaries, so comparing codes orders strings
by code point like the store's binary collation; each CASEI/ACCENTI form has its own sorted
dictionary and row codes computed once at build time. Keyword lists use a CSR layout. Dates
are int64 epoch days, datetimes int64 epoch microseconds, numbers (integers too) float64,
which is exact for integers up to 2^53 - 1. Every column carries a null mask (``present``).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from service.attributes import AttributeType, AttributeValue, Schema, epoch_days, epoch_micros
from service.filters.text_forms import ALL_MODES, TextMode, text_form

PLAIN = TextMode()


def _string_array(values: Sequence[str]) -> np.ndarray:
    return np.array(values, dtype=str) if values else np.array([], dtype="<U1")


def _mode_tables(
    dictionary: np.ndarray,
) -> tuple[dict[TextMode, np.ndarray], dict[TextMode, np.ndarray]]:
    """Per mode, the sorted dictionary of forms and the map from plain code to form code."""
    forms: dict[TextMode, np.ndarray] = {}
    maps: dict[TextMode, np.ndarray] = {}
    for mode in ALL_MODES:
        if mode == PLAIN:
            forms[mode] = dictionary
            maps[mode] = np.arange(len(dictionary), dtype=np.int32)
            continue
        transformed = _string_array([text_form(str(s), mode) for s in dictionary])
        unique, inverse = np.unique(transformed, return_inverse=True)
        forms[mode] = unique
        maps[mode] = inverse.astype(np.int32).reshape(-1)
    return forms, maps


@dataclass(frozen=True)
class KeywordColumn:
    """``codes[mode]`` is -1 on a null row, else an index into ``forms[mode]``."""

    forms: dict[TextMode, np.ndarray]
    codes: dict[TextMode, np.ndarray]
    present: np.ndarray

    @classmethod
    def from_plain(cls, dictionary: np.ndarray, plain_codes: np.ndarray) -> KeywordColumn:
        forms, maps = _mode_tables(dictionary)
        present = plain_codes >= 0
        codes = {}
        for mode in ALL_MODES:
            # Index -1 would wrap around; nulls stay -1 through np.where.
            codes[mode] = (
                np.where(present, maps[mode][np.maximum(plain_codes, 0)], -1).astype(np.int32)
                if len(dictionary)
                else plain_codes.astype(np.int32)
            )
        return cls(forms, codes, present)

    @classmethod
    def build(cls, values: Sequence[str | None]) -> KeywordColumn:
        strings = [v for v in values if v is not None]
        dictionary, inverse = np.unique(_string_array(strings), return_inverse=True)
        plain = np.full(len(values), -1, dtype=np.int32)
        plain[[i for i, v in enumerate(values) if v is not None]] = inverse.reshape(-1)
        return cls.from_plain(dictionary, plain)

    def take(self, rows: np.ndarray) -> KeywordColumn:
        return KeywordColumn(
            self.forms, {m: c[rows] for m, c in self.codes.items()}, self.present[rows]
        )

    @staticmethod
    def concat(parts: Sequence[KeywordColumn]) -> KeywordColumn:
        dictionary = np.unique(np.concatenate([p.forms[PLAIN] for p in parts]))
        plain_parts = []
        for part in parts:
            remap = np.searchsorted(dictionary, part.forms[PLAIN]).astype(np.int32)
            codes = part.codes[PLAIN]
            remapped = remap[np.maximum(codes, 0)] if len(remap) else codes
            plain_parts.append(np.where(codes >= 0, remapped, -1).astype(np.int32))
        return KeywordColumn.from_plain(dictionary, np.concatenate(plain_parts))


@dataclass(frozen=True)
class KeywordListColumn:
    """CSR: row r holds ``element_codes[offsets[r]:offsets[r + 1]]``; a null row holds none."""

    dictionary: np.ndarray
    offsets: np.ndarray
    element_codes: np.ndarray
    element_rows: np.ndarray
    present: np.ndarray

    @classmethod
    def build(cls, values: Sequence[list[str] | None]) -> KeywordListColumn:
        flat = [s for v in values if v is not None for s in v]
        dictionary, inverse = np.unique(_string_array(flat), return_inverse=True)
        lengths = np.array([len(v) if v is not None else 0 for v in values], dtype=np.int64)
        return cls._from_parts(
            dictionary,
            lengths,
            inverse.astype(np.int32).reshape(-1),
            np.array([v is not None for v in values], dtype=bool),
        )

    @classmethod
    def _from_parts(
        cls, dictionary: np.ndarray, lengths: np.ndarray, codes: np.ndarray, present: np.ndarray
    ) -> KeywordListColumn:
        offsets = np.zeros(len(lengths) + 1, dtype=np.int64)
        np.cumsum(lengths, out=offsets[1:])
        rows = np.repeat(np.arange(len(lengths), dtype=np.int64), lengths)
        return cls(dictionary, offsets, codes, rows, present)

    def take(self, rows: np.ndarray) -> KeywordListColumn:
        starts, ends = self.offsets[rows], self.offsets[rows + 1]
        lengths = ends - starts
        # Element positions of the kept rows, in the new row order.
        within = np.arange(lengths.sum()) - np.repeat(np.cumsum(lengths) - lengths, lengths)
        positions = np.repeat(starts, lengths) + within
        return KeywordListColumn._from_parts(
            self.dictionary, lengths, self.element_codes[positions], self.present[rows]
        )

    @staticmethod
    def concat(parts: Sequence[KeywordListColumn]) -> KeywordListColumn:
        dictionary = np.unique(np.concatenate([p.dictionary for p in parts]))
        codes = [
            np.searchsorted(dictionary, p.dictionary).astype(np.int32)[p.element_codes]
            if len(p.element_codes)
            else p.element_codes
            for p in parts
        ]
        return KeywordListColumn._from_parts(
            dictionary,
            np.concatenate([np.diff(p.offsets) for p in parts]),
            np.concatenate(codes).astype(np.int32),
            np.concatenate([p.present for p in parts]),
        )


@dataclass(frozen=True)
class ValueColumn:
    """Numbers (float64), booleans (bool), dates and datetimes (int64 epoch units)."""

    values: np.ndarray
    present: np.ndarray

    def take(self, rows: np.ndarray) -> ValueColumn:
        return ValueColumn(self.values[rows], self.present[rows])

    @staticmethod
    def concat(parts: Sequence[ValueColumn]) -> ValueColumn:
        return ValueColumn(
            np.concatenate([p.values for p in parts]), np.concatenate([p.present for p in parts])
        )


Column = KeywordColumn | KeywordListColumn | ValueColumn

_DTYPES = {
    AttributeType.INTEGER: np.float64,
    AttributeType.NUMBER: np.float64,
    AttributeType.BOOLEAN: np.bool_,
    AttributeType.DATE: np.int64,
    AttributeType.DATETIME: np.int64,
}


def _encode(type_: AttributeType, value: AttributeValue) -> float | bool | int:
    if type_ is AttributeType.DATETIME:
        assert isinstance(value, dt.datetime)
        return epoch_micros(value)
    if type_ is AttributeType.DATE:
        assert isinstance(value, dt.date)
        return epoch_days(value)
    if type_ is AttributeType.BOOLEAN:
        return bool(value)
    assert isinstance(value, int | float)
    return float(value)


def _build_column(type_: AttributeType, values: list[AttributeValue | None]) -> Column:
    if type_ is AttributeType.KEYWORD:
        return KeywordColumn.build([v if isinstance(v, str) else None for v in values])
    if type_ is AttributeType.KEYWORD_LIST:
        return KeywordListColumn.build([v if isinstance(v, list) else None for v in values])
    present = np.array([v is not None for v in values], dtype=bool)
    dtype = _DTYPES[type_]
    encoded: np.ndarray = np.zeros(len(values), dtype=dtype)
    for row, value in enumerate(values):
        if value is not None:
            encoded[row] = _encode(type_, value)
    return ValueColumn(encoded, present)


@dataclass(frozen=True)
class AttributeColumns:
    schema: Schema
    length: int
    columns: Mapping[str, Column]

    @classmethod
    def build(
        cls, schema: Schema, rows: Sequence[Mapping[str, AttributeValue]]
    ) -> AttributeColumns:
        """``rows`` hold normalised values; a missing key is NULL."""
        columns = {
            name: _build_column(type_, [row.get(name) for row in rows])
            for name, type_ in schema.items()
        }
        return cls(dict(schema), len(rows), columns)

    def __len__(self) -> int:
        return self.length

    def take(self, rows: np.ndarray) -> AttributeColumns:
        """The given rows, in the given order (compaction drops tombstoned rows this way)."""
        rows = np.asarray(rows, dtype=np.int64)
        return AttributeColumns(
            self.schema, len(rows), {n: c.take(rows) for n, c in self.columns.items()}
        )

    @staticmethod
    def concat(parts: Sequence[AttributeColumns]) -> AttributeColumns:
        """Rows of ``parts`` one after another; an attribute a part lacks is NULL there."""
        schema: Schema = {}
        for part in parts:
            for name, type_ in part.schema.items():
                if schema.setdefault(name, type_) is not type_:
                    raise ValueError(f"attribute {name!r} has two types among the parts")
        filled = [
            part
            if set(part.schema) == set(schema)
            else AttributeColumns(
                schema,
                part.length,
                {
                    name: part.columns[name]
                    if name in part.columns
                    else _build_column(type_, [None] * part.length)
                    for name, type_ in schema.items()
                },
            )
            for part in parts
        ]
        columns: dict[str, Column] = {}
        for name in schema:
            pieces = [part.columns[name] for part in filled]
            first = pieces[0]
            if isinstance(first, KeywordColumn):
                columns[name] = KeywordColumn.concat(pieces)  # type: ignore[arg-type]
            elif isinstance(first, KeywordListColumn):
                columns[name] = KeywordListColumn.concat(pieces)  # type: ignore[arg-type]
            else:
                columns[name] = ValueColumn.concat(pieces)  # type: ignore[arg-type]
        return AttributeColumns(schema, sum(p.length for p in parts), columns)
