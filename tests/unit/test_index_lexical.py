import math

import numpy as np
import pytest

from service.index.lexical import LexicalIndex

CORPUS = [
    ["brake", "pad", "wear", "brake"],
    ["frame", "warranty", "year"],
    ["brake", "cable", "tension"],
    ["chain", "wear", "check", "chain", "chain"],
    ["frame", "size", "chart"],
    [],
]


def formula_scores(
    corpus: list[list[str]], query: list[str], k1: float, b: float
) -> dict[int, float]:
    """The smoothed BM25 of the module docstring, in float64, by hand."""
    n = len(corpus)
    avglen = sum(map(len, corpus)) / n
    scores: dict[int, float] = {}
    for term in query:
        df = sum(term in doc for doc in corpus)
        if df == 0:
            continue
        idf = math.log(1 + (n - df + 0.5) / (df + 0.5))
        for row, doc in enumerate(corpus):
            tf = doc.count(term)
            if tf:
                norm = k1 * (1 - b + b * len(doc) / avglen)
                scores[row] = scores.get(row, 0.0) + idf * tf * (k1 + 1) / (tf + norm)
    return scores


def present_scores(index: LexicalIndex, query: list[str], **kwargs: float) -> dict[int, float]:
    match = index.match(query, **kwargs)  # type: ignore[arg-type]
    return {int(row): float(match.scores[row]) for row in np.flatnonzero(match.present)}


def test_scores_equal_the_formula_and_rows_without_query_terms_are_absent() -> None:
    index = LexicalIndex.build(CORPUS)
    got = present_scores(index, ["brake", "wear", "unknown"])
    want = formula_scores(CORPUS, ["brake", "wear", "unknown"], 1.2, 0.75)
    assert got.keys() == want.keys() == {0, 2, 3}
    for row, score in want.items():
        assert got[row] == pytest.approx(score, rel=1e-6)


def test_a_repeated_query_term_counts_once_per_occurrence() -> None:
    index = LexicalIndex.build(CORPUS)
    once = present_scores(index, ["chain"])
    twice = present_scores(index, ["chain", "chain"])
    assert twice[3] == pytest.approx(2 * once[3], rel=1e-6)


def test_statistics_exclude_tombstoned_rows_at_once() -> None:
    index = LexicalIndex.build(CORPUS).tombstone(np.array([0, 4]))
    fresh = LexicalIndex.build([doc for row, doc in enumerate(CORPUS) if row not in (0, 4)])
    assert index.live_rows == fresh.live_rows == 4
    assert index.average_length == pytest.approx(fresh.average_length)
    assert index.document_frequency("brake") == 1
    got = present_scores(index, ["brake", "frame", "chain"])
    want = present_scores(fresh, ["brake", "frame", "chain"])
    renumber = {1: 0, 2: 1, 3: 2, 5: 3}
    assert {renumber[row]: score for row, score in got.items()} == pytest.approx(want, rel=1e-6)


def test_appending_in_several_writes_equals_one_build() -> None:
    rng = np.random.default_rng(3)
    vocabulary = [f"w{i}" for i in range(40)]
    corpus = [list(rng.choice(vocabulary, size=rng.integers(1, 12))) for _ in range(300)]
    grown = LexicalIndex.empty()
    for start in range(0, 300, 7):
        grown = grown.append(corpus[start : start + 7])
    assert grown.segment_count <= 6
    built = LexicalIndex.build(corpus)
    for query in (["w1"], ["w3", "w17", "w39"], ["w0", "w0", "w5"]):
        assert present_scores(grown, query) == pytest.approx(present_scores(built, query))


def test_compaction_drops_tombstoned_rows_and_keeps_scores() -> None:
    index = LexicalIndex.build(CORPUS[:3]).append(CORPUS[3:]).tombstone(np.array([1, 3]))
    compacted, remap = index.compact()
    assert remap.tolist() == [0, -1, 1, -1, 2, 3]
    assert compacted.n_rows == 4 and compacted.segment_count == 1
    before = present_scores(index, ["brake", "frame", "wear"])
    after = present_scores(compacted, ["brake", "frame", "wear"])
    assert {int(remap[row]): s for row, s in before.items()} == pytest.approx(after)


def test_okapi_floors_negative_idf_at_epsilon_times_mean_idf() -> None:
    corpus = [["common", "a"], ["common", "b"], ["common"], ["rare"]]
    index = LexicalIndex.build(corpus)
    n = 4
    raw = {
        t: math.log((n - df + 0.5) / (df + 0.5))
        for t, df in [("common", 3), ("a", 1), ("b", 1), ("rare", 1)]
    }
    mean = sum(raw.values()) / len(raw)
    assert index.idf("common", variant="okapi", epsilon=0.25) == pytest.approx(0.25 * mean)
    assert index.idf("rare", variant="okapi") == pytest.approx(raw["rare"])


def test_a_term_with_zero_idf_still_makes_its_rows_present() -> None:
    index = LexicalIndex.build([["x"], ["x"], ["y"], ["y"]])
    assert index.idf("x", variant="okapi") == 0.0
    match = index.match(["x"], variant="okapi")
    assert match.present.tolist() == [True, True, False, False]


def test_terms_added_by_a_later_version_are_unknown_to_an_earlier_one() -> None:
    early = LexicalIndex.build(CORPUS)
    later = early.append([["novel", "term"]])
    assert present_scores(early, ["novel"]) == {}
    assert list(present_scores(later, ["novel"])) == [6]
