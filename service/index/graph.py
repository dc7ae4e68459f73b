"""A navigable graph over the first rows of a vector matrix, searched inside a candidate mask.

The graph is HNSW (Malkov and Yashunin, "Efficient and robust approximate nearest neighbor
search using Hierarchical Navigable Small World graphs", 2018) as faiss implements it
(``IndexHNSWFlat``). The candidate mask enters the search as a bitmap that faiss reads in native
code while it walks the graph (``IDSelectorBitmap`` in ``SearchParametersHNSW``): rows outside
the mask are still walked through, so the graph stays connected, but never returned. A filter
that keeps a share ``s`` of the rows leaves about ``s`` of each visited neighbourhood eligible,
so the search breadth is raised with ``1 / s`` (``breadth_for``) up to a bound; the planner
(``service.retrieval.semantic_plan``) decides whether that costs less than exact search.

One copy of the vectors: faiss copies the rows into its own storage while it builds the
graph; once built, that storage is replaced by a view of the matrix's own buffer
(``MaybeOwnedVector.create_view``), which the graph keeps alive by holding the rows. The rows a
graph covers never change (the matrix only appends past a snapshot's rows, see ``buffers``), so
the view stays valid for the graph's life. For the same reason faiss cannot append to a graph
whose storage is a view: rows added after a graph was built are scored exactly (the planner's
"tail") until the next graph is built in the background.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import faiss
import numpy as np

from service.index.vectors import VectorMatrix

# Settings a collection may give (``"vectors": {"graph": {...}}``) and their bounds.
DEFAULT_LINKS = 32
DEFAULT_BUILD_BREADTH = 100
DEFAULT_SEARCH_BREADTH = 128
DEFAULT_MAX_SEARCH_BREADTH = 4096
LINKS_RANGE = (4, 128)
BREADTH_RANGE = (16, 65536)

# The search breadth is at least this many times the results wanted.
BREADTH_PER_RESULT = 2

IndexMode = Literal["auto", "exact", "graph"]
INDEX_MODES: tuple[IndexMode, ...] = ("auto", "exact", "graph")
# ``auto`` builds a graph from this many live rows on. The planner's weights put the graph
# below a scan of every row from about 27,000 rows (breadth 128 times 32 links against 0.15 a
# row) and never below a gather of a narrow filter; the margin pays for building the graph.
AUTO_GRAPH_FROM_ROWS = 50_000
# A graph is rebuilt once the rows added since it was built (scored exactly) pass this share
# of its rows, or this many rows, whichever is more.
REBUILD_AFTER_TAIL_FRACTION = 0.05
REBUILD_AFTER_TAIL_ROWS = 1_000


@dataclass(frozen=True, kw_only=True)
class GraphSettings:
    """``links``: neighbours per node (HNSW's M; level 0 keeps twice as many).
    ``build_breadth``: candidates kept while linking a new node (efConstruction).
    ``search_breadth``: candidates kept while searching without a filter (efSearch), raised
    with 1 / selectivity up to ``max_search_breadth``, the bound on a search's work."""

    links: int = DEFAULT_LINKS
    build_breadth: int = DEFAULT_BUILD_BREADTH
    search_breadth: int = DEFAULT_SEARCH_BREADTH
    max_search_breadth: int = DEFAULT_MAX_SEARCH_BREADTH

    def __post_init__(self) -> None:
        if not LINKS_RANGE[0] <= self.links <= LINKS_RANGE[1]:
            raise ValueError("links is out of range")
        for value in (self.build_breadth, self.search_breadth, self.max_search_breadth):
            if not BREADTH_RANGE[0] <= value <= BREADTH_RANGE[1]:
                raise ValueError("a breadth is out of range")
        if self.search_breadth > self.max_search_breadth:
            raise ValueError("search_breadth must not exceed max_search_breadth")

    def breadth_for(self, depth: int, candidates: int, rows: int) -> int:
        """Search breadth for ``depth`` results when ``candidates`` of ``rows`` are eligible:
        at least ``BREADTH_PER_RESULT`` times the depth, since a search kept to about as many
        candidates as it returns loses its last ones (at 1,000,000 rows, breadth 128 found
        0.95 of the exact first 100)."""
        base = max(self.search_breadth, BREADTH_PER_RESULT * depth)
        if candidates <= 0 or rows <= 0:
            return base
        return max(base, math.ceil(base * rows / candidates))

    def expected_work(self, breadth: int) -> int:
        """Distances a search of ``breadth`` computes, about: each kept candidate's level-0
        neighbours (``2 * links``), about half of them not seen before."""
        return breadth * self.links


@dataclass(frozen=True, kw_only=True)
class VectorIndexSettings:
    """A collection's choice of vector index: ``exact`` never builds a graph; ``graph`` builds
    one at any size and searches it wherever its breadth stays within bounds; ``auto`` builds
    one from ``AUTO_GRAPH_FROM_ROWS`` live rows and lets the planner weigh it per query."""

    index: IndexMode = "auto"
    graph: GraphSettings = field(default_factory=GraphSettings)

    def wants_graph(self, live_rows: int) -> bool:
        if self.index == "auto":
            return live_rows >= AUTO_GRAPH_FROM_ROWS
        return self.index == "graph"

    def graph_is_stale(self, graph: VectorGraph | None, rows: int) -> bool:
        """Whether ``graph`` (for an index of ``rows`` rows) should be built anew."""
        if graph is None or graph.settings != self.graph:
            return True
        tail = rows - graph.rows
        return tail > max(REBUILD_AFTER_TAIL_ROWS, REBUILD_AFTER_TAIL_FRACTION * graph.rows)


@dataclass(frozen=True)
class GraphHits:
    """Rows found (best first, inside the mask) and the distances the search computed."""

    rows: np.ndarray
    work: int


class VectorGraph:
    """An HNSW graph over rows ``0 .. rows - 1`` of a matrix, immutable once built.

    ``layout`` names the row numbering it was built for (see ``CollectionIndex``), so a graph
    is never attached to rows numbered otherwise.
    """

    def __init__(
        self,
        index: faiss.IndexHNSWFlat,
        rows: np.ndarray,
        settings: GraphSettings,
        *,
        layout: int,
        always: bool,
        storage: faiss.IndexFlat | None = None,
    ) -> None:
        self._index = index
        # A storage given here is the graph's, kept alive by it (faiss does not own it).
        self._storage = storage
        self._rows = rows
        self.settings = settings
        self.layout = layout
        # Planned wherever its breadth is within bounds, not only where it is cheapest.
        self.always = always

    @classmethod
    def build(
        cls, matrix: VectorMatrix, settings: VectorIndexSettings, *, layout: int
    ) -> VectorGraph:
        rows = matrix.rows
        metric = faiss.METRIC_L2 if matrix.metric == "euclidean" else faiss.METRIC_INNER_PRODUCT
        index = faiss.IndexHNSWFlat(matrix.dimension, settings.graph.links, metric)
        index.hnsw.efConstruction = settings.graph.build_breadth
        if len(rows):
            index.add(np.ascontiguousarray(rows))
        graph = cls(index, rows, settings.graph, layout=layout, always=settings.index == "graph")
        graph._view_rows(rows)
        return graph

    def write(self, path: Path) -> None:
        """Write the graph's links to ``path`` without its rows (they are the matrix's)."""
        faiss.write_index(self._index, str(path), faiss.IO_FLAG_SKIP_STORAGE)

    @classmethod
    def read(
        cls,
        path: Path,
        matrix: VectorMatrix,
        settings: VectorIndexSettings,
        *,
        rows: int,
        layout: int,
    ) -> VectorGraph:
        """A graph ``write`` wrote, over the first ``rows`` rows of ``matrix``, read in place.

        The file must be one this process can trust (its checksum checked): faiss reads it
        without checking it. Raises ``ValueError`` when it is not a graph over those rows.
        """
        index = faiss.read_index(str(path), faiss.IO_FLAG_SKIP_STORAGE)
        metric = faiss.METRIC_L2 if matrix.metric == "euclidean" else faiss.METRIC_INNER_PRODUCT
        if (
            not isinstance(index, faiss.IndexHNSWFlat)
            or index.d != matrix.dimension
            or index.metric_type != metric
            or index.ntotal != rows
            or rows > matrix.n_rows
        ):
            raise ValueError("the saved graph does not fit the saved vectors")
        storage = faiss.IndexFlat(matrix.dimension, metric)
        index.own_fields = False
        index.storage = storage
        graph = cls(
            index,
            matrix.rows[:rows],
            settings.graph,
            layout=layout,
            always=settings.index == "graph",
            storage=storage,
        )
        graph._view_rows(np.ascontiguousarray(matrix.rows[:rows]))
        storage.ntotal = rows
        return graph

    def _view_rows(self, rows: np.ndarray) -> None:
        """Point the graph's storage at ``rows`` (equal to what it holds), dropping its copy."""
        storage = faiss.downcast_index(self._index.storage)
        if not rows.flags.c_contiguous or rows.dtype != np.float32:
            raise ValueError("the graph views float32 rows laid out contiguously")
        if len(rows) == 0:
            return
        # The view's owner is left empty (an empty vector's null owner: the binding refuses
        # None); the rows are kept alive by this object instead.
        no_owner = faiss.MaybeOwnedVectorUInt8().owner
        storage.codes = faiss.MaybeOwnedVectorUInt8.create_view(
            faiss.swig_ptr(rows), int(rows.nbytes), no_owner
        )
        self._rows = rows

    def rebound(self, matrix: VectorMatrix, layout: int) -> VectorGraph:
        """This graph, not yet published, reading its rows from ``matrix`` (a copy of the rows
        it was built from, then more) under ``layout``: a compaction copies the rows again."""
        rows = matrix.rows[: self.rows]
        if len(rows) != len(self._rows):
            raise ValueError("the matrix does not hold the graph's rows")
        self._view_rows(rows)
        self.layout = layout
        return self

    @property
    def rows(self) -> int:
        return int(self._index.ntotal)

    @property
    def nbytes(self) -> int:
        """Memory of the graph (links, levels, and its own copy of the rows if it has one)."""
        hnsw = self._index.hnsw
        codes = faiss.downcast_index(self._index.storage).codes
        return int(
            hnsw.neighbors.size() * 4
            + hnsw.offsets.size() * 8
            + hnsw.levels.size() * 4
            + (codes.size() if codes.is_owned else 0)
        )

    @property
    def views_rows(self) -> bool:
        """Whether the graph reads the matrix's rows rather than a copy of its own."""
        return not faiss.downcast_index(self._index.storage).codes.is_owned

    def search(self, query: np.ndarray, mask: np.ndarray, count: int, breadth: int) -> GraphHits:
        """Up to ``count`` rows in ``mask`` (over this graph's rows) nearest to ``query``."""
        covered = self.rows
        if mask.shape != (covered,) or mask.dtype != np.bool_:
            raise ValueError(f"the graph's mask must be a boolean array of length {covered}")
        if covered == 0 or count <= 0:
            return GraphHits(np.zeros(0, dtype=np.int64), 0)
        bitmap = np.packbits(mask, bitorder="little")
        selector = faiss.IDSelectorBitmap(len(bitmap), faiss.swig_ptr(bitmap))
        params = faiss.SearchParametersHNSW(sel=selector, efSearch=max(breadth, count))
        # faiss counts the distances its searches compute in one process-wide record, so a
        # search that overlaps another counts some of the other's work too.
        stats = faiss.cvar.hnsw_stats
        before = int(stats.ndis)
        _, labels = self._index.search(query.reshape(1, -1), count, params=params)
        work = max(int(stats.ndis) - before, 0)
        found = labels[0]
        found = found[found >= 0]
        # faiss returns only selected rows; the check costs nothing when that holds.
        found = found[mask[found]]
        return GraphHits(found.astype(np.int64), work)
