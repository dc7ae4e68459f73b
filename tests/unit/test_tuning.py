"""Cross-validated choice of settings: it finds a truly better setting and calls it
significant, and calls nothing significant where every setting is the same in truth."""

from __future__ import annotations

import numpy as np
import pytest

from service.cli import _grid_options
from service.evaluation.tuning import CURRENT, Candidate, candidates_from_grid, cross_validate


def table(
    candidates: list[Candidate], means: list[float], queries: int, seed: int
) -> dict[str, dict[str, float]]:
    """Per-query values: a shared per-query difficulty plus each candidate's own noise."""
    rng = np.random.default_rng(seed)
    difficulty = rng.uniform(0.2, 0.8, queries)
    return {
        candidate.label: {
            f"q{i}": float(np.clip(difficulty[i] + mean + rng.normal(0, 0.05), 0, 1))
            for i in range(queries)
        }
        for candidate, mean in zip(candidates, means, strict=True)
    }


def test_a_truly_better_setting_is_found_and_called_significant() -> None:
    candidates = candidates_from_grid({"semantic_weight": ["0.3", "0.5", "0.7"]})
    per_query = table(candidates, [0.0, 0.0, 0.0, 0.08], queries=60, seed=1)
    result = cross_validate(candidates, per_query, folds=5)
    assert result.chosen.label == "semantic_weight=0.7"
    assert all(fold.chosen == "semantic_weight=0.7" for fold in result.folds)
    assert result.significant
    assert result.p_value < 0.05
    assert result.difference_interval.low > 0
    assert "is significant" in result.verdict()


def test_where_nothing_is_better_the_gain_is_not_called_real() -> None:
    candidates = candidates_from_grid({"k1": ["0.9", "1.5"], "b": ["0.5", "0.75"]})
    per_query = table(candidates, [0.0] * len(candidates), queries=60, seed=2)
    result = cross_validate(candidates, per_query, folds=5)
    assert not result.significant
    assert "not" in result.verdict()


def test_every_query_is_held_out_exactly_once() -> None:
    candidates = candidates_from_grid({"rrf_k": ["10", "60"]})
    per_query = table(candidates, [0.0, 0.01, 0.0], queries=23, seed=3)
    result = cross_validate(candidates, per_query, folds=5)
    held = [qid for fold in result.folds for qid in fold.held_out]
    assert sorted(held) == sorted(per_query[CURRENT])
    assert [len(fold.held_out) for fold in result.folds] == [5, 5, 5, 4, 4]


def test_a_tie_keeps_the_current_settings() -> None:
    candidates = candidates_from_grid({"second_chunk_weight": ["0.2"]})
    same = {f"q{i}": 0.5 for i in range(10)}
    result = cross_validate(candidates, {c.label: same for c in candidates}, folds=2)
    assert result.chosen.label == CURRENT
    assert result.p_value == 1.0
    assert result.verdict().startswith("The current settings are the best")


def test_the_grid_reads_names_and_values_in_one_list() -> None:
    assert _grid_options(["k1=0.9,1.2,b=0.5,0.75", "fusion=rrf,min_max"]) == {
        "k1": ["0.9", "1.2"],
        "b": ["0.5", "0.75"],
        "fusion": ["rrf", "min_max"],
    }
    with pytest.raises(ValueError):
        _grid_options(["0.9,k1=1.2"])
    with pytest.raises(ValueError):
        candidates_from_grid({"title_weight": ["2"]})
    with pytest.raises(ValueError):
        candidates_from_grid({"semantic_weight": ["1.5"]})
    with pytest.raises(ValueError):
        candidates_from_grid({"fusion": ["average"]})
    sources = candidates_from_grid({"feedback_source": ["own", "fused"]})
    assert [c.settings for c in sources[1:]] == [
        {"feedback_source": "own"},
        {"feedback_source": "fused"},
    ]
    with pytest.raises(ValueError):
        candidates_from_grid({"feedback_source": ["both"]})
