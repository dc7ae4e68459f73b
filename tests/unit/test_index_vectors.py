import os
import threading
import time

import numpy as np
import pytest

from service.index import vectors as vectors_module
from service.index.vectors import VectorMatrix


def random_rows(count: int, dimension: int, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal((count, dimension)).astype(np.float32)


@pytest.mark.parametrize("metric", ["cosine", "dot", "euclidean"])
def test_scores_equal_plain_numpy(metric: str) -> None:
    rows = random_rows(500, 24)
    query = random_rows(1, 24, seed=1)[0]
    matrix = VectorMatrix.build(rows, metric=metric, dimension=24)  # type: ignore[arg-type]
    got_rows, got = matrix.score(matrix.prepare_query(query), np.ones(500, dtype=bool))
    wide, q = rows.astype(np.float64), query.astype(np.float64)
    if metric == "cosine":
        want = (wide / np.linalg.norm(wide, axis=1, keepdims=True)) @ (q / np.linalg.norm(q))
    elif metric == "dot":
        want = wide @ q
    else:
        want = -np.linalg.norm(wide - q, axis=1)
    assert got_rows.tolist() == list(range(500))
    np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("count", [1, 63, 64, 1000, 4099])
@pytest.mark.parametrize("fraction", [0.001, 0.05, 0.5, 1.0])
def test_gathering_and_scanning_give_bit_identical_scores(count: int, fraction: float) -> None:
    rng = np.random.default_rng(count)
    matrix = VectorMatrix.build(random_rows(count, 48, seed=count), metric="cosine", dimension=48)
    query = matrix.prepare_query(rng.standard_normal(48))
    mask = rng.random(count) < fraction
    mask[0] = True
    _, full = matrix.score(query, np.ones(count, dtype=bool))
    rows, filtered = matrix.score(query, mask)
    assert np.array_equal(filtered, full[rows])


@pytest.mark.parametrize("metric", ["cosine", "dot", "euclidean"])
@pytest.mark.parametrize("fraction", [0.15, 0.5, 1.0])
def test_a_scan_begun_on_a_scan_thread_gives_bit_identical_scores(
    metric: str, fraction: float, monkeypatch: pytest.MonkeyPatch
) -> None:
    count = 4099
    rng = np.random.default_rng(7)
    matrix = VectorMatrix.build(random_rows(count, 48), metric=metric, dimension=48)  # type: ignore[arg-type]
    query = matrix.prepare_query(rng.standard_normal(48))
    mask = np.zeros(count, dtype=bool)
    mask[rng.permutation(count)[: int(np.ceil(fraction * count))]] = True
    assert matrix.scans_every_row(int(mask.sum()))
    threads: list[str] = []
    full_products = VectorMatrix._full_products

    def noting_thread(self: VectorMatrix, q: np.ndarray) -> np.ndarray:
        threads.append(threading.current_thread().name)
        return full_products(self, q)

    monkeypatch.setattr(VectorMatrix, "_full_products", noting_thread)
    begun = matrix.begin_full_scan(query)
    rows, scores = matrix.score(query, mask, begun)
    want_rows, want = matrix.score(query, mask)
    assert np.array_equal(rows, want_rows)
    assert np.array_equal(scores, want)
    assert threads[0].startswith("excerpta-scan") and threads[1] == threading.current_thread().name


@pytest.mark.parametrize("metric", ["cosine", "dot", "euclidean"])
@pytest.mark.parametrize("fraction", [0.0, 0.01, 0.1, 0.5])
def test_rows_gathered_once_score_any_query_as_scanning_does_bit_for_bit(
    metric: str, fraction: float
) -> None:
    count = 4099
    rng = np.random.default_rng(11)
    matrix = VectorMatrix.build(random_rows(count, 48), metric=metric, dimension=48)  # type: ignore[arg-type]
    mask = rng.random(count) < fraction
    gathered = matrix.gather(mask)
    assert gathered.rows.tolist() == np.flatnonzero(mask).tolist()
    for _ in range(3):
        query = matrix.prepare_query(rng.standard_normal(48))
        rows, scores = matrix.score_gathered(query, gathered)
        _, full = matrix.score(query, np.ones(count, dtype=bool))
        assert rows.tolist() == gathered.rows.tolist()
        assert np.array_equal(scores, full[rows])


def test_a_gather_refuses_a_mask_of_another_length() -> None:
    matrix = VectorMatrix.build(random_rows(100, 8), metric="dot", dimension=8)
    with pytest.raises(ValueError, match="length 100"):
        matrix.gather(np.ones(99, dtype=bool))


def test_a_forked_child_can_still_begin_a_scan() -> None:
    matrix = VectorMatrix.build(random_rows(300, 8), metric="dot", dimension=8)
    query = matrix.prepare_query(np.ones(8))
    expected = matrix.begin_full_scan(query).result()
    time.sleep(0.2)  # lets the scan thread go idle, which an inherited pool would count on
    child = os.fork()
    if child == 0:
        try:
            same = np.array_equal(matrix.begin_full_scan(query).result(timeout=20), expected)
            os._exit(0 if same else 1)
        except BaseException:
            os._exit(2)
    _, status = os.waitpid(child, 0)
    assert os.waitstatus_to_exitcode(status) == 0


def test_every_row_is_scanned_exactly_from_the_gather_cut_over() -> None:
    matrix = VectorMatrix.build(random_rows(1000, 8), metric="dot", dimension=8)
    assert not matrix.scans_every_row(149)
    assert matrix.scans_every_row(150)


def test_both_paths_are_used_on_either_side_of_the_cut_over(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    matrix = VectorMatrix.build(random_rows(1000, 8), metric="dot", dimension=8)
    query = matrix.prepare_query(np.ones(8))
    mask = np.zeros(1000, dtype=bool)
    mask[::50] = True
    scanned = matrix.score(query, mask)[1]
    monkeypatch.setattr(vectors_module, "GATHER_BELOW_FRACTION", 0.0)
    assert np.array_equal(matrix.score(query, mask)[1], scanned)


def test_growth_doubles_capacity_instead_of_copying_per_write() -> None:
    matrix = VectorMatrix.empty(metric="dot", dimension=4)
    buffers = set()
    for row in range(2000):
        matrix = matrix.append(np.full((1, 4), row, dtype=np.float32))
        buffers.add(id(matrix._buffer))
    assert len(buffers) <= 12
    assert matrix.rows[1999].tolist() == [1999.0] * 4


def test_an_earlier_version_keeps_its_rows_after_later_appends() -> None:
    first = VectorMatrix.build(random_rows(10, 4), metric="dot", dimension=4)
    copy = first.rows.copy()
    first.append(random_rows(5, 4, seed=9))
    assert first.n_rows == 10 and np.array_equal(first.rows, copy)


def test_bad_query_vectors_are_refused_by_the_core_with_its_own_error() -> None:
    matrix = VectorMatrix.build(random_rows(3, 4), metric="cosine", dimension=4)
    with pytest.raises(ValueError, match="4 numbers"):
        matrix.prepare_query([1.0, 2.0])
    with pytest.raises(ValueError, match="all zeros"):
        matrix.prepare_query([0.0] * 4)


@pytest.mark.parametrize("metric", ["cosine", "dot", "euclidean"])
@pytest.mark.parametrize("first", [0, 5, 64, 1000, 4090])
@pytest.mark.parametrize("fraction", [0.01, 0.2, 1.0])
def test_scoring_the_rows_from_one_on_equals_scoring_them_anywhere(
    metric: str, first: int, fraction: float
) -> None:
    count = 4099
    rng = np.random.default_rng(first)
    matrix = VectorMatrix.build(random_rows(count, 48), metric=metric, dimension=48)  # type: ignore[arg-type]
    query = matrix.prepare_query(rng.standard_normal(48))
    tail = rng.random(count - first) < fraction
    tail[0] = True
    mask = np.zeros(count, dtype=bool)
    mask[first:] = tail
    rows, scores = matrix.score_from(query, first, tail)
    want_rows, want = matrix.score(query, mask)
    assert rows.tolist() == want_rows.tolist()
    assert np.array_equal(scores, want)
    assert matrix.scans_from(first, int(tail.sum())) is bool(tail.sum() >= 0.15 * (count - first))
