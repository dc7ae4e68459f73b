from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from service.evaluation.significance import bootstrap_interval, paired_randomization_test


def enumerated_p_value(a: list[float], b: list[float]) -> float:
    """Fisher's exact randomization p-value, by listing every sign assignment."""
    differences = [x - y for x, y in zip(a, b, strict=True)]
    observed = abs(math.fsum(differences))
    assignments = list(itertools.product((1, -1), repeat=len(differences)))
    extreme = sum(
        1
        for signs in assignments
        if abs(math.fsum(s * d for s, d in zip(signs, differences, strict=True)))
        >= observed - 1e-12
    )
    return extreme / len(assignments)


def test_randomization_test_on_few_queries_equals_an_exact_enumeration() -> None:
    a = [0.9, 0.4, 0.7, 0.3, 0.65, 0.8, 0.2]
    b = [0.5, 0.45, 0.3, 0.3, 0.6, 0.1, 0.25]
    expected = enumerated_p_value(a, b)
    assert 0.0 < expected < 1.0
    assert paired_randomization_test(a, b) == pytest.approx(expected, abs=1e-15)


def test_randomization_test_is_exact_up_to_sixteen_pairs_whatever_the_flips() -> None:
    rng = np.random.default_rng(3)
    a = rng.random(16).tolist()
    b = (rng.random(16) * 0.8).tolist()
    p = paired_randomization_test(a, b, flips=1)
    assert p == paired_randomization_test(a, b, flips=50_000, seed=9)
    assert p * 2**16 == pytest.approx(round(p * 2**16), abs=1e-6)


def test_randomization_test_beyond_sixteen_pairs_is_seeded_and_near_the_exact_value() -> None:
    rng = np.random.default_rng(4)
    a = rng.random(18).tolist()
    b = (rng.random(18) + 0.1).tolist()
    sampled = paired_randomization_test(a, b)
    assert sampled == paired_randomization_test(a, b)
    assert sampled == pytest.approx(enumerated_p_value(a, b), abs=0.02)


def test_identical_systems_are_never_significantly_different() -> None:
    values = [0.1, 0.5, 0.3]
    assert paired_randomization_test(values, values) == 1.0
    assert paired_randomization_test(values * 10, values * 10) == 1.0


def test_a_large_consistent_difference_gets_the_smallest_possible_p_value() -> None:
    a = [1.0] * 30
    b = [0.0] * 30
    assert paired_randomization_test(a, b, flips=999) == pytest.approx(1 / 1000)


def test_samples_of_different_length_are_refused() -> None:
    with pytest.raises(ValueError, match="differ in length"):
        paired_randomization_test([0.1, 0.2], [0.1])


def test_the_bootstrap_interval_of_a_constant_sample_is_that_constant() -> None:
    assert bootstrap_interval([0.1] * 7) == (0.1, 0.1, 0.1)
    assert bootstrap_interval([1 / 3] * 225) == (1 / 3, 1 / 3, 1 / 3)


def test_the_bootstrap_interval_holds_the_mean_and_is_reproducible() -> None:
    values = np.random.default_rng(1).random(50).tolist()
    mean, low, high = bootstrap_interval(values)
    assert mean == pytest.approx(float(np.mean(values)))
    assert low < mean < high
    assert (mean, low, high) == bootstrap_interval(values)
    # The standard error of a mean of uniforms is about 0.29 / sqrt(50) = 0.041.
    assert 0.12 < high - low < 0.20


def test_a_lower_level_gives_a_narrower_interval() -> None:
    values = np.random.default_rng(2).random(40).tolist()
    _, low95, high95 = bootstrap_interval(values)
    _, low50, high50 = bootstrap_interval(values, level=0.5)
    assert low95 < low50 < high50 < high95


def test_an_empty_sample_is_refused() -> None:
    with pytest.raises(ValueError, match="non-empty"):
        bootstrap_interval([])
