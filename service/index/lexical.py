"""BM25 over sparse postings, with statistics that always count live rows only.

Scoring follows Robertson and Zaragoza, "The Probabilistic Relevance Framework: BM25 and Beyond"
(2009): a term t of the query adds

    idf(t) * tf * (k1 + 1) / (tf + k1 * (1 - b + b * len / avglen))

to each row that contains it, where ``tf`` is the term's count in the row, ``len`` the row's
token count, and N, df(t) and avglen are taken over live (not tombstoned) rows. Two idf forms:

- ``smoothed`` (default): ln(1 + (N - df + 0.5) / (df + 0.5)), always positive;
- ``okapi``: the Robertson-Spärck Jones ln((N - df + 0.5) / (df + 0.5)), where a term whose idf
  is negative (df above N / 2) gets ``epsilon`` times the mean idf of all terms present in live
  rows instead.

Repeated query terms count once per occurrence: a term written twice in the query adds its
contribution twice. Scores always use the statistics of the version being read. The
length-saturated count of each posting,
``tf * (k1 + 1) / (tf + k1 * (1 - b + b * len / avglen))``, is precomputed per index version
(avglen changes with every write, so each version computes its own, once, before it is
published); idf is applied per query from the version's document frequencies.

Postings are column-major (CSC, rows x terms, ``float32`` counts, ``int32`` row indices) in a
few segments of contiguous rows. An append adds a segment and merges neighbours of similar size,
so segments grow geometrically and stay few; a query reads one column slice per term and
segment. A row-major copy of the term ids (without counts) is kept so that tombstoning a row can
lower the document frequencies of exactly its terms. An index value never changes once built:
``append``, ``tombstone`` and ``compact`` return a new one that shares the unchanged arrays.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.sparse as sp

from service.index.buffers import concatenated_ranges, write_rows

Bm25Variant = Literal["smoothed", "okapi"]
BM25_VARIANTS: tuple[Bm25Variant, ...] = ("smoothed", "okapi")
DEFAULT_K1 = 1.2
DEFAULT_B = 0.75
DEFAULT_EPSILON = 0.25


@dataclass(frozen=True, kw_only=True)
class LexicalScoring:
    """BM25's parameters: the collection's settings, or an evaluation's override."""

    k1: float = DEFAULT_K1
    b: float = DEFAULT_B
    variant: Bm25Variant = "smoothed"
    epsilon: float = DEFAULT_EPSILON


@dataclass(frozen=True)
class LexicalParts:
    """What a ``LexicalIndex`` is made of, as plain values and arrays, for saving it to files
    and reading it back (``LexicalIndex.parts`` and ``LexicalIndex.from_parts``).

    ``segments`` holds ``(first_row, rows, columns)`` per segment; ``segment_arrays`` each
    segment's CSC ``(data, indices, indptr)``. ``live_length`` is kept as summed, so scores
    read back are those of the saved index to the last bit.
    """

    terms: list[str]
    segments: list[tuple[int, int, int]]
    segment_arrays: list[tuple[np.ndarray, np.ndarray, np.ndarray]]
    row_indptr: np.ndarray
    row_terms: np.ndarray
    row_counts: np.ndarray
    lengths: np.ndarray
    live: np.ndarray
    document_frequency: np.ndarray
    live_length: float


# A new segment is merged into the one before it while that one holds fewer than this many times
# its rows, which keeps about log_4(rows) segments.
_SEGMENT_RATIO = 4


@dataclass(frozen=True)
class _Segment:
    """Postings of rows ``first_row .. first_row + csc.shape[0] - 1``."""

    first_row: int
    csc: sp.csc_array

    @property
    def rows(self) -> int:
        return int(self.csc.shape[0])


@dataclass(frozen=True)
class LexicalMatch:
    """Scores of every row (``float32``) and which rows contain at least one query term."""

    scores: np.ndarray
    present: np.ndarray


class LexicalIndex:
    """Immutable BM25 index; see the module docstring for the layout and the formula."""

    def __init__(
        self,
        *,
        terms: dict[str, int],
        vocabulary_size: int,
        segments: tuple[_Segment, ...],
        row_indptr: np.ndarray,
        row_terms: np.ndarray,
        row_counts: np.ndarray,
        lengths: np.ndarray,
        n_rows: int,
        live: np.ndarray,
        document_frequency: np.ndarray,
        live_rows: int,
        live_length: float,
    ) -> None:
        # ``terms`` only grows and is shared with later versions; a term id at or beyond
        # ``vocabulary_size`` was added after this version and does not occur in it.
        self._terms = terms
        self._vocabulary_size = vocabulary_size
        self._segments = segments
        self._row_indptr = row_indptr
        self._row_terms = row_terms
        self._row_counts = row_counts
        self._lengths = lengths
        self._n_rows = n_rows
        self._live = live
        self._df = document_frequency
        self._live_rows = live_rows
        self._live_length = live_length
        self._saturated: dict[tuple[float, float], tuple[np.ndarray, ...]] = {}
        self._okapi_mean_idf: float | None = None
        self._term_names: list[str] | None = None

    @classmethod
    def empty(cls) -> LexicalIndex:
        return cls(
            terms={},
            vocabulary_size=0,
            segments=(),
            row_indptr=np.zeros(16, dtype=np.int64),
            row_terms=np.zeros(16, dtype=np.int32),
            row_counts=np.zeros(16, dtype=np.float32),
            lengths=np.zeros(16, dtype=np.float32),
            n_rows=0,
            live=np.zeros(0, dtype=bool),
            document_frequency=np.zeros(0, dtype=np.int64),
            live_rows=0,
            live_length=0.0,
        )

    @classmethod
    def build(cls, token_lists: Sequence[Sequence[str]]) -> LexicalIndex:
        return cls.empty().append(token_lists)

    # -- statistics ------------------------------------------------------------------------

    @property
    def n_rows(self) -> int:
        """Rows ever appended since the last compaction, tombstoned ones included."""
        return self._n_rows

    @property
    def live(self) -> np.ndarray:
        """Read-only boolean mask over ``n_rows``."""
        view = self._live.view()
        view.flags.writeable = False
        return view

    @property
    def live_rows(self) -> int:
        return self._live_rows

    @property
    def average_length(self) -> float:
        return self._live_length / self._live_rows if self._live_rows else 0.0

    @property
    def lengths(self) -> np.ndarray:
        return self._lengths[: self._n_rows]

    def document_frequency(self, term: str) -> int:
        term_id = self._term_id(term)
        return 0 if term_id is None else int(self._df[term_id])

    @property
    def segment_count(self) -> int:
        return len(self._segments)

    @property
    def nbytes(self) -> int:
        """Bytes of the postings, their precomputed weights and the per-row arrays."""
        postings = sum(
            s.csc.data.nbytes + s.csc.indices.nbytes + s.csc.indptr.nbytes for s in self._segments
        )
        weights = sum(w.nbytes for parts in self._saturated.values() for w in parts)
        rows = (
            self._row_indptr[: self._n_rows + 1].nbytes
            + self._row_terms[: self._nnz].nbytes
            + self._row_counts[: self._nnz].nbytes
        )
        per_row = self.lengths.nbytes + self._live.nbytes + self._df.nbytes
        return postings + weights + rows + per_row

    @property
    def _nnz(self) -> int:
        return int(self._row_indptr[self._n_rows])

    def _term_id(self, term: str) -> int | None:
        term_id = self._terms.get(term)
        if term_id is None or term_id >= self._vocabulary_size:
            return None
        return term_id

    # -- saving ----------------------------------------------------------------------------

    def parts(self) -> LexicalParts:
        # ``terms`` may have grown past this version; its first ids are this version's.
        terms = list(self._terms)[: self._vocabulary_size]
        return LexicalParts(
            terms=terms,
            segments=[(s.first_row, s.rows, int(s.csc.shape[1])) for s in self._segments],
            segment_arrays=[(s.csc.data, s.csc.indices, s.csc.indptr) for s in self._segments],
            row_indptr=self._row_indptr[: self._n_rows + 1],
            row_terms=self._row_terms[: self._nnz],
            row_counts=self._row_counts[: self._nnz],
            lengths=self.lengths,
            live=self._live,
            document_frequency=self._df[: self._vocabulary_size],
            live_length=self._live_length,
        )

    @classmethod
    def from_parts(cls, parts: LexicalParts) -> LexicalIndex:
        """The index ``parts`` describe; raises ``ValueError`` when they do not fit together."""
        n_rows = len(parts.lengths)
        vocabulary_size = len(parts.terms)
        terms = {term: term_id for term_id, term in enumerate(parts.terms)}
        if len(terms) != vocabulary_size:
            raise ValueError("a term appears twice")
        if parts.row_indptr.shape != (n_rows + 1,) or parts.live.shape != (n_rows,):
            raise ValueError("the per-row arrays disagree on the number of rows")
        if parts.document_frequency.shape != (vocabulary_size,):
            raise ValueError("the document frequencies do not cover the terms")
        if int(parts.row_indptr[-1]) != len(parts.row_terms) or len(parts.row_counts) != len(
            parts.row_terms
        ):
            raise ValueError("the row-major term ids do not fit their offsets")
        segments = []
        expected_first = 0
        for (first_row, rows, columns), (data, indices, indptr) in zip(
            parts.segments, parts.segment_arrays, strict=True
        ):
            if first_row != expected_first or columns > vocabulary_size:
                raise ValueError("the postings' segments do not follow each other")
            csc = sp.csc_array((data, indices, indptr), shape=(rows, columns))
            csc.check_format(full_check=True)
            segments.append(_Segment(first_row, _as_csc(csc)))
            expected_first += rows
        if expected_first != n_rows:
            raise ValueError("the postings' segments do not cover every row")
        return cls(
            terms=terms,
            vocabulary_size=vocabulary_size,
            segments=tuple(segments),
            row_indptr=parts.row_indptr.astype(np.int64, copy=False),
            row_terms=parts.row_terms.astype(np.int32, copy=False),
            row_counts=parts.row_counts.astype(np.float32, copy=False),
            lengths=parts.lengths.astype(np.float32, copy=False),
            n_rows=n_rows,
            live=parts.live.astype(bool, copy=False),
            document_frequency=parts.document_frequency.astype(np.int64, copy=False),
            live_rows=int(np.count_nonzero(parts.live)),
            live_length=float(parts.live_length),
        )

    # -- writes ----------------------------------------------------------------------------

    def append(self, token_lists: Sequence[Sequence[str]]) -> LexicalIndex:
        """A new version with one row per token list appended after the existing rows."""
        added = len(token_lists)
        if added == 0:
            return self
        terms = self._terms
        flat = [token for tokens in token_lists for token in tokens]
        for token in dict.fromkeys(flat):
            if token not in terms:
                terms[token] = len(terms)
        vocabulary_size = len(terms)
        token_ids = np.fromiter(map(terms.__getitem__, flat), dtype=np.int32, count=len(flat))
        row_lengths = np.fromiter(map(len, token_lists), dtype=np.int64, count=added)
        row_of_token = np.repeat(np.arange(added, dtype=np.int32), row_lengths)
        counts = sp.coo_array(
            (np.ones(len(flat), dtype=np.float32), (row_of_token, token_ids)),
            shape=(added, vocabulary_size),
        ).tocsr()
        counts.sum_duplicates()
        counts.sort_indices()

        nnz = self._nnz
        row_indptr = write_rows(
            self._row_indptr, self._n_rows + 1, nnz + counts.indptr[1:].astype(np.int64)
        )
        row_terms = write_rows(self._row_terms, nnz, counts.indices.astype(np.int32))
        row_counts = write_rows(self._row_counts, nnz, counts.data.astype(np.float32))
        lengths = write_rows(self._lengths, self._n_rows, row_lengths.astype(np.float32))
        df = np.zeros(vocabulary_size, dtype=np.int64)
        df[: len(self._df)] = self._df
        df += np.bincount(counts.indices, minlength=vocabulary_size)
        live = np.concatenate([self._live, np.ones(added, dtype=bool)])

        segment = _Segment(self._n_rows, _as_csc(counts.tocsc()))
        segments = list(self._segments)
        while segments and segments[-1].rows < _SEGMENT_RATIO * segment.rows:
            segment = _merge(segments.pop(), segment)
        segments.append(segment)

        return LexicalIndex(
            terms=terms,
            vocabulary_size=vocabulary_size,
            segments=tuple(segments),
            row_indptr=row_indptr,
            row_terms=row_terms,
            row_counts=row_counts,
            lengths=lengths,
            n_rows=self._n_rows + added,
            live=live,
            document_frequency=df,
            live_rows=self._live_rows + added,
            live_length=self._live_length + float(row_lengths.sum()),
        )

    def tombstone(self, rows: np.ndarray) -> LexicalIndex:
        """A new version in which ``rows`` no longer count or match; dead rows are ignored."""
        rows = np.unique(np.asarray(rows, dtype=np.int64))
        rows = rows[self._live[rows]]
        if len(rows) == 0:
            return self
        live = self._live.copy()
        live[rows] = False
        positions = concatenated_ranges(self._row_indptr[rows], self._row_indptr[rows + 1])
        df = self._df - np.bincount(self._row_terms[positions], minlength=len(self._df))
        return LexicalIndex(
            terms=self._terms,
            vocabulary_size=self._vocabulary_size,
            segments=self._segments,
            row_indptr=self._row_indptr,
            row_terms=self._row_terms,
            row_counts=self._row_counts,
            lengths=self._lengths,
            n_rows=self._n_rows,
            live=live,
            document_frequency=df,
            live_rows=self._live_rows - len(rows),
            live_length=self._live_length - float(self._lengths[rows].sum()),
        )

    def compact(self) -> tuple[LexicalIndex, np.ndarray]:
        """Drop tombstoned rows; returns the new version and ``old row -> new row`` (-1: gone)."""
        keep = np.flatnonzero(self._live)
        remap = np.full(self._n_rows, -1, dtype=np.int64)
        remap[keep] = np.arange(len(keep))
        segments: tuple[_Segment, ...] = ()
        if self._segments:
            merged = self._segments[0]
            for segment in self._segments[1:]:
                merged = _merge(merged, segment)
            segments = (_Segment(0, _keep_rows(merged.csc, self._live[: merged.rows], remap)),)
        positions = concatenated_ranges(self._row_indptr[keep], self._row_indptr[keep + 1])
        terms_per_row = self._row_indptr[keep + 1] - self._row_indptr[keep]
        row_indptr = np.concatenate([[0], np.cumsum(terms_per_row)]).astype(np.int64)
        compacted = LexicalIndex(
            terms=self._terms,
            vocabulary_size=self._vocabulary_size,
            segments=segments,
            row_indptr=row_indptr,
            row_terms=self._row_terms[positions],
            row_counts=self._row_counts[positions],
            lengths=self._lengths[keep],
            n_rows=len(keep),
            live=np.ones(len(keep), dtype=bool),
            document_frequency=self._df,
            live_rows=self._live_rows,
            live_length=self._live_length,
        )
        return compacted, remap

    # -- scoring ---------------------------------------------------------------------------

    def idf(self, term: str, *, variant: Bm25Variant, epsilon: float = DEFAULT_EPSILON) -> float:
        """The term's idf under the current statistics (0 for a term in no live row)."""
        term_id = self._term_id(term)
        if term_id is None or self._df[term_id] == 0:
            return 0.0
        return float(self._idf(np.array([term_id]), variant, epsilon)[0])

    def _idf(self, term_ids: np.ndarray, variant: Bm25Variant, epsilon: float) -> np.ndarray:
        n = float(self._live_rows)
        df = self._df[term_ids].astype(np.float64)
        if variant == "smoothed":
            return np.log1p((n - df + 0.5) / (df + 0.5))
        idf = np.log((n - df + 0.5) / (df + 0.5))
        return np.where(idf < 0, epsilon * self._mean_okapi_idf(), idf)

    def _mean_okapi_idf(self) -> float:
        if self._okapi_mean_idf is None:
            df = self._df[self._df > 0].astype(np.float64)
            n = float(self._live_rows)
            idf = np.log((n - df + 0.5) / (df + 0.5))
            self._okapi_mean_idf = float(idf.mean()) if len(idf) else 0.0
        return self._okapi_mean_idf

    def _saturated_counts(self, k1: float, b: float) -> tuple[np.ndarray, ...]:
        """``tf * (k1 + 1) / (tf + k1 * (1 - b + b * len / avglen))`` per posting, per segment.

        Computed once per version and parameter pair (``warm`` does it before a version is
        published), so a query only multiplies by idf and adds.
        """
        key = (k1, b)
        saturated = self._saturated.get(key)
        if saturated is None:
            relative = self.lengths.astype(np.float64) / max(self.average_length, 1e-30)
            norm = (k1 * (1.0 - b + b * relative)).astype(np.float32)
            parts = []
            for segment in self._segments:
                tf = segment.csc.data
                row_norm = norm[segment.csc.indices + segment.first_row]
                parts.append((tf * np.float32(k1 + 1.0) / (tf + row_norm)).astype(np.float32))
            saturated = tuple(parts)
            self._saturated[key] = saturated
        return saturated

    def warm(self, *, k1: float = DEFAULT_K1, b: float = DEFAULT_B) -> LexicalIndex:
        """Precompute the weights for ``k1`` and ``b`` now rather than at the first query."""
        self._saturated_counts(k1, b)
        return self

    def match(
        self,
        query_tokens: Sequence[str],
        *,
        k1: float = DEFAULT_K1,
        b: float = DEFAULT_B,
        variant: Bm25Variant = "smoothed",
        epsilon: float = DEFAULT_EPSILON,
    ) -> LexicalMatch:
        """BM25 of every row for the query; rows with no query term are not ``present``.

        Tombstoned rows are never present. Scores are only meaningful where ``present``.
        """
        term_ids, repeats = self.term_ids_of(query_tokens)
        return self.match_weighted(term_ids, repeats, k1=k1, b=b, variant=variant, epsilon=epsilon)

    def match_weighted(
        self,
        term_ids: np.ndarray,
        query_weights: np.ndarray,
        *,
        k1: float = DEFAULT_K1,
        b: float = DEFAULT_B,
        variant: Bm25Variant = "smoothed",
        epsilon: float = DEFAULT_EPSILON,
    ) -> LexicalMatch:
        """BM25 with a weight per query term (a repeated term is one of weight 2; an expanded
        query's terms carry their relevance-model weights). ``term_ids`` are distinct ids of
        this version (``term_ids_of``)."""
        if variant not in BM25_VARIANTS:
            raise ValueError(f"unknown BM25 variant {variant!r}")
        if not (k1 >= 0 and 0 <= b <= 1):
            raise ValueError("BM25 needs k1 >= 0 and 0 <= b <= 1")
        scores = np.zeros(self._n_rows, dtype=np.float32)
        if len(term_ids) == 0:
            return LexicalMatch(scores, np.zeros(self._n_rows, dtype=bool))
        weights = (self._idf(term_ids, variant, epsilon) * query_weights).astype(np.float32)
        # With every weight positive a row is present exactly when its score is positive;
        # otherwise presence is recorded per posting.
        present: np.ndarray | None = None if bool((weights > 0).all()) else scores.astype(bool)
        saturated = self._saturated_counts(k1, b)
        for term_id, weight in zip(term_ids.tolist(), weights, strict=True):
            for segment, segment_saturated in zip(self._segments, saturated, strict=True):
                csc = segment.csc
                if term_id >= csc.shape[1]:
                    continue
                start, end = csc.indptr[term_id], csc.indptr[term_id + 1]
                if start == end:
                    continue
                rows = csc.indices[start:end]
                if segment.first_row:
                    rows = rows + segment.first_row
                np.add.at(scores, rows, weight * segment_saturated[start:end])
                if present is not None:
                    present[rows] = True
        if present is None:
            present = scores > 0
        present &= self._live
        return LexicalMatch(scores, present)

    def term_ids_of(self, query_tokens: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """Distinct ids of the query's terms found in live rows, and how often each occurs."""
        occurrences: Counter[int] = Counter()
        for token in query_tokens:
            term_id = self._term_id(token)
            if term_id is not None and self._df[term_id] > 0:
                occurrences[term_id] += 1
        term_ids = np.fromiter(occurrences.keys(), dtype=np.int64, count=len(occurrences))
        counts = np.fromiter(occurrences.values(), dtype=np.float64, count=len(occurrences))
        return term_ids, counts

    def relevance_model(
        self, rows: np.ndarray, row_weights: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """``sum over rows of row_weight * tf(t, row) / len(row)`` for every term of ``rows``:
        the relevance model of Lavrenko and Croft (2001) over feedback rows, as term ids and
        their weights, in term id order."""
        rows = np.asarray(rows, dtype=np.int64)
        if len(rows) == 0:
            return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.float64)
        starts, ends = self._row_indptr[rows], self._row_indptr[rows + 1]
        positions = concatenated_ranges(starts, ends)
        per_row = (ends - starts).astype(np.int64)
        lengths = np.maximum(self._lengths[rows].astype(np.float64), 1.0)
        share = np.repeat(np.asarray(row_weights, dtype=np.float64) / lengths, per_row)
        term_ids, inverse = np.unique(self._row_terms[positions], return_inverse=True)
        weights = np.zeros(len(term_ids), dtype=np.float64)
        np.add.at(weights, inverse, share * self._row_counts[positions])
        return term_ids.astype(np.int64), weights

    def in_at_most(self, term_ids: np.ndarray, share: float) -> np.ndarray:
        """Whether each term is in at most ``share`` of the live rows."""
        return self._df[term_ids] <= share * self._live_rows

    def term_names(self, term_ids: Sequence[int]) -> list[str]:
        """The terms of ``term_ids`` as text (for traces)."""
        if self._term_names is None or len(self._term_names) < self._vocabulary_size:
            names = [""] * len(self._terms)
            for term, term_id in list(self._terms.items()):
                if term_id < len(names):
                    names[term_id] = term
            self._term_names = names
        return [self._term_names[term_id] for term_id in term_ids]


def _as_csc(matrix: sp.csc_array) -> sp.csc_array:
    matrix.indices = matrix.indices.astype(np.int32, copy=False)
    matrix.data = matrix.data.astype(np.float32, copy=False)
    return matrix


def _merge(first: _Segment, second: _Segment) -> _Segment:
    """One segment holding ``first``'s rows followed by ``second``'s (they are adjacent)."""
    columns = max(first.csc.shape[1], second.csc.shape[1])
    a_indptr = _padded_indptr(first.csc.indptr, columns)
    b_indptr = _padded_indptr(second.csc.indptr, columns)
    a_counts = np.diff(a_indptr)
    b_counts = np.diff(b_indptr)
    indptr = a_indptr + b_indptr
    total = int(indptr[-1])
    indices = np.empty(total, dtype=np.int32)
    data = np.empty(total, dtype=np.float32)
    column_of_a = np.repeat(np.arange(columns), a_counts)
    a_target = indptr[column_of_a] + (np.arange(len(column_of_a)) - a_indptr[column_of_a])
    column_of_b = np.repeat(np.arange(columns), b_counts)
    b_target = (
        indptr[column_of_b]
        + a_counts[column_of_b]
        + (np.arange(len(column_of_b)) - b_indptr[column_of_b])
    )
    indices[a_target] = first.csc.indices
    data[a_target] = first.csc.data
    indices[b_target] = second.csc.indices + first.rows
    data[b_target] = second.csc.data
    shape = (first.rows + second.rows, columns)
    return _Segment(first.first_row, _as_csc(sp.csc_array((data, indices, indptr), shape=shape)))


def _padded_indptr(indptr: np.ndarray, columns: int) -> np.ndarray:
    padded = np.empty(columns + 1, dtype=np.int64)
    padded[: len(indptr)] = indptr
    padded[len(indptr) :] = indptr[-1]
    return padded


def _keep_rows(csc: sp.csc_array, keep: np.ndarray, remap: np.ndarray) -> sp.csc_array:
    """The postings of the rows where ``keep`` is true, renumbered by ``remap``."""
    kept = keep[csc.indices]
    columns = csc.shape[1]
    column_of_entry = np.repeat(np.arange(columns), np.diff(csc.indptr))
    counts = np.bincount(column_of_entry[kept], minlength=columns)
    indptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    indices = remap[csc.indices[kept]].astype(np.int32)
    shape = (int(keep.sum()), columns)
    return _as_csc(sp.csc_array((csc.data[kept], indices, indptr), shape=shape))
