"""Uncertainty of a mean over queries, and whether two systems differ on the same queries.

Both procedures are seeded so that a report computed twice says the same thing; both work on the
per-query values, because the query sample, not the document sample, is what varies between
test collections.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

EXACT_ENUMERATION_LIMIT = 16
"""Up to this many pairs every one of the 2^n sign assignments is enumerated."""

_RESAMPLE_BLOCK = 1_000


def bootstrap_interval(
    values: Sequence[float], *, resamples: int = 10_000, seed: int = 0, level: float = 0.95
) -> tuple[float, float, float]:
    """The mean and a percentile bootstrap interval for it (Efron and Tibshirani, 1993, ch. 13).

    A constant sample returns that constant three times: every resample has the same mean, and
    answering it directly keeps the floating-point sum from inventing a width.
    """
    sample = _as_sample(values, "values")
    if resamples < 1:
        raise ValueError(f"resamples must be at least 1, got {resamples}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must lie strictly between 0 and 1, got {level}")
    if np.all(sample == sample[0]):
        constant = float(sample[0])
        return constant, constant, constant
    rng = np.random.default_rng(seed)
    means = np.empty(resamples, dtype=np.float64)
    for start in range(0, resamples, _RESAMPLE_BLOCK):
        stop = min(start + _RESAMPLE_BLOCK, resamples)
        picks = rng.integers(0, sample.size, size=(stop - start, sample.size))
        means[start:stop] = sample[picks].mean(axis=1)
    tail = (1.0 - level) / 2.0
    low, high = np.quantile(means, [tail, 1.0 - tail])
    return float(sample.mean()), float(low), float(high)


def paired_randomization_test(
    a: Sequence[float], b: Sequence[float], *, flips: int = 10_000, seed: int = 0
) -> float:
    """Two-sided p-value of the mean paired difference under random sign flips.

    Under the null hypothesis that the two systems are exchangeable on every query, each paired
    difference is as likely negated as not (Fisher's randomization test; Smucker, Allan and
    Carterette, CIKM 2007, for its use in retrieval evaluation). Up to 16 queries all 2^n
    assignments are enumerated and the p-value is exact; beyond that ``flips`` random assignments
    are drawn and the observed one is counted among them, so p is never 0.
    """
    first = _as_sample(a, "a")
    second = _as_sample(b, "b")
    if first.shape != second.shape:
        raise ValueError(f"paired samples differ in length: {first.size} and {second.size}")
    differences = first - second
    observed = abs(differences.sum())
    # Sums that equal the observed one in exact arithmetic may differ in the last bits.
    tolerance = 1e-9 * max(1.0, float(np.abs(differences).sum()))
    if differences.size <= EXACT_ENUMERATION_LIMIT:
        signs = _all_sign_assignments(differences.size)
        extreme = np.abs(signs @ differences) >= observed - tolerance
        return float(extreme.mean())
    if flips < 1:
        raise ValueError(f"flips must be at least 1, got {flips}")
    rng = np.random.default_rng(seed)
    extreme_count = 0
    for start in range(0, flips, _RESAMPLE_BLOCK):
        block = min(_RESAMPLE_BLOCK, flips - start)
        signs = rng.choice(np.array([-1.0, 1.0]), size=(block, differences.size))
        extreme_count += int(np.count_nonzero(np.abs(signs @ differences) >= observed - tolerance))
    return (extreme_count + 1) / (flips + 1)


def _all_sign_assignments(n: int) -> npt.NDArray[np.float64]:
    bits = (np.arange(2**n, dtype=np.int64)[:, None] >> np.arange(n, dtype=np.int64)) & 1
    return np.where(bits == 1, -1.0, 1.0)


def _as_sample(values: Sequence[float], name: str) -> npt.NDArray[np.float64]:
    sample = np.asarray(values, dtype=np.float64)
    if sample.ndim != 1 or sample.size == 0:
        raise ValueError(f"{name} must be a non-empty sequence of numbers")
    if not np.all(np.isfinite(sample)):
        raise ValueError(f"{name} holds a value that is not finite")
    return sample
