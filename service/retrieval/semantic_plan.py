"""The semantic ranking's plan: gather the candidates, scan every row, or search the graph.

Work is counted in vectors compared with the query; the three ways compare at different
speeds, so each is weighed by its cost per vector, in units of one gathered row:

- gather: every candidate's row, copied out of the matrix and multiplied (cost 1 a row);
- scan: every row of the matrix in one product, the candidates' scores kept (cheaper per row,
  ``GATHER_BELOW_FRACTION`` of a gathered row, which is where ``VectorMatrix`` switches);
- graph: about ``breadth * links`` distances (``GraphSettings.expected_work``), each a row read
  at random (``GRAPH_DISTANCE_COST``), plus the exact plan of the rows added since the graph was
  built (its tail, which lies together at the end of the matrix: its candidates gathered, or
  the whole tail multiplied where they are many, ``VectorMatrix.score_from``).

A filter that keeps few rows makes gathering cheap and the graph's needed breadth large, so
the graph is chosen only where its weighed work is the smallest and its breadth within the
collection's bound (``max_search_breadth``). Its search may do more work than expected (a
query far from the graph's entry, or a filter that keeps rows the query's region lacks):
``work_bound`` is ``WORK_BOUND_FACTOR`` times the expectation, and a search that passes it, or
returns fewer rows than it should, is set aside for the exact plan.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from service.index.collection_index import IndexSnapshot
from service.index.vectors import GATHER_BELOW_FRACTION

PlanMethod = Literal["gather", "scan", "graph"]
# A distance computed by the graph search relative to one gathered row; measured with
# ``excerpta bench --vector-index`` (see the README's vector index section).
GRAPH_DISTANCE_COST = 1.0
WORK_BOUND_FACTOR = 4


@dataclass(frozen=True)
class SemanticPlan:
    """How a semantic ranking finds its rows (see the module docstring).

    ``estimated_work`` counts vectors compared; for ``graph``, ``breadth`` is the search
    breadth, ``tail_candidates`` the candidates the graph does not cover (scored exactly) and
    ``work_bound`` the distances the graph search may compute.
    """

    method: PlanMethod
    estimated_work: int
    breadth: int = 0
    tail_candidates: int = 0
    work_bound: int = 0


def exact_plan(rows: int, candidates: int) -> SemanticPlan:
    if candidates >= GATHER_BELOW_FRACTION * rows:
        return SemanticPlan("scan", rows)
    return SemanticPlan("gather", candidates)


def exact_cost(plan: SemanticPlan) -> float:
    if plan.method == "scan":
        return plan.estimated_work * GATHER_BELOW_FRACTION
    return float(plan.estimated_work)


def semantic_plan(
    snapshot: IndexSnapshot, candidate_mask: np.ndarray, candidates: int, depth: int
) -> SemanticPlan:
    """The cheapest plan for ``depth`` rows among ``candidates`` (the mask's true count)."""
    exact = exact_plan(snapshot.vectors.n_rows, candidates)
    graph = snapshot.graph
    if graph is None or candidates == 0:
        return exact
    covered = graph.rows
    tail = int(np.count_nonzero(candidate_mask[covered:]))
    in_graph = candidates - tail
    if in_graph == 0:
        return exact
    settings = graph.settings
    breadth = settings.breadth_for(depth, in_graph, covered)
    if breadth > settings.max_search_breadth:
        return exact
    distances = settings.expected_work(breadth)
    tail_plan = exact_plan(snapshot.vectors.n_rows - covered, tail)
    graph_cost = distances * GRAPH_DISTANCE_COST + exact_cost(tail_plan)
    if not graph.always and graph_cost >= exact_cost(exact):
        return exact
    return SemanticPlan(
        "graph",
        distances + tail_plan.estimated_work,
        breadth=breadth,
        tail_candidates=tail,
        work_bound=math.ceil(WORK_BOUND_FACTOR * distances),
    )
