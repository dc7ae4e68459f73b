"""Choosing ranking settings on a collection's own labelled queries without fooling oneself.

Every candidate setting is measured on every query once; k-fold cross-validation over the
queries then picks, for each fold, the candidate best on the other folds' queries and scores it
on the fold's own, so each query's tuned value comes from settings chosen without it (Hastie,
Tibshirani and Friedman, "The Elements of Statistical Learning", 2009, sec. 7.10; common
practice in retrieval tuning). The held-out values are compared with the current settings' on
the same queries by a bootstrap interval of the mean difference and the paired randomization
test (``service.evaluation.significance``); only a significant gain counts as real.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from service.evaluation.runner import Interval, SettingValue, parse_settings
from service.evaluation.significance import bootstrap_interval, paired_randomization_test

SIGNIFICANCE_LEVEL = 0.05
CURRENT = "current"
"""The label of the candidate that keeps the collection's settings as they are."""


@dataclass(frozen=True)
class Candidate:
    label: str
    settings: Mapping[str, SettingValue]
    """Only the settings the grid varies; the collection's own apply to the rest."""


@dataclass(frozen=True)
class FoldChoice:
    fold: int
    held_out: tuple[str, ...]
    chosen: str
    """The label of the candidate best on the other folds."""
    training_mean: float
    held_out_mean: float


@dataclass(frozen=True)
class TuningResult:
    measure: str
    candidates: tuple[Candidate, ...]
    means: Mapping[str, float]
    """Each candidate's mean over every query (in-sample: for the record, not the verdict)."""
    folds: tuple[FoldChoice, ...]
    current: Mapping[str, float]
    """Per query, the current settings' value."""
    tuned: Mapping[str, float]
    """Per query, the value of the settings chosen without that query."""
    current_interval: Interval
    tuned_interval: Interval
    difference_interval: Interval
    """Of the mean of tuned minus current, over queries."""
    p_value: float
    chosen: Candidate
    """The candidate best over every query: what would be applied."""

    @property
    def significant(self) -> bool:
        """True when the held-out gain is positive and significant at 0.05."""
        return self.difference_interval.mean > 0 and self.p_value < SIGNIFICANCE_LEVEL

    def verdict(self) -> str:
        """One plain sentence saying whether the gain is real."""
        gain = self.difference_interval
        if self.chosen.label == CURRENT:
            return "The current settings are the best of those tried; nothing to apply."
        if self.significant:
            return (
                f"The held-out gain of {gain.mean:+.4f} {self.measure} is significant "
                f"(p = {self.p_value:.4f} < {SIGNIFICANCE_LEVEL}): the chosen settings are "
                "better on queries they were not chosen on."
            )
        return (
            f"The held-out gain of {gain.mean:+.4f} {self.measure} is not significant "
            f"(p = {self.p_value:.4f}): it is not a real gain, and nothing should be applied."
        )


def candidates_from_grid(grid: Mapping[str, Sequence[str]]) -> list[Candidate]:
    """The current settings first, then every combination of the grid's values, checked."""
    values = parse_settings(grid)
    if not values:
        raise ValueError("give at least one setting to tune")
    names = list(values)
    candidates = [Candidate(CURRENT, {})]
    for combination in itertools.product(*(values[name] for name in names)):
        settings = dict(zip(names, combination, strict=True))
        label = " ".join(f"{name}={value}" for name, value in settings.items())
        candidates.append(Candidate(label, settings))
    return candidates


def cross_validate(
    candidates: Sequence[Candidate],
    per_query: Mapping[str, Mapping[str, float]],
    *,
    folds: int = 5,
    measure: str = "nDCG@10",
    seed: int = 0,
) -> TuningResult:
    """Cross-validated choice among ``candidates`` (the first is the current settings) from
    ``per_query[label][qid]``, the measure of every candidate on every query.

    Queries are split into ``folds`` folds by a seeded shuffle; ties between candidates go to
    the earlier one, so the current settings win a tie.
    """
    if not candidates or candidates[0].label != CURRENT:
        raise ValueError("the first candidate must be the current settings")
    qids = list(per_query[CURRENT])
    if folds < 2:
        raise ValueError("cross-validation needs at least 2 folds")
    if len(qids) < folds:
        raise ValueError(f"{len(qids)} queries cannot fill {folds} folds")
    labels = [candidate.label for candidate in candidates]
    table = np.array([[per_query[label][qid] for qid in qids] for label in labels])
    order = np.random.default_rng(seed).permutation(len(qids))
    assignment = np.empty(len(qids), dtype=np.int64)
    assignment[order] = np.arange(len(qids)) % folds
    tuned = np.empty(len(qids), dtype=np.float64)
    choices: list[FoldChoice] = []
    for fold in range(folds):
        held = assignment == fold
        training = table[:, ~held].mean(axis=1)
        best = int(np.argmax(training))
        tuned[held] = table[best, held]
        choices.append(
            FoldChoice(
                fold=fold + 1,
                held_out=tuple(qid for qid, inside in zip(qids, held, strict=True) if inside),
                chosen=labels[best],
                training_mean=float(training[best]),
                held_out_mean=float(table[best, held].mean()),
            )
        )
    current = table[0]
    means = table.mean(axis=1)
    differences = tuned - current
    return TuningResult(
        measure=measure,
        candidates=tuple(candidates),
        means={label: float(mean) for label, mean in zip(labels, means, strict=True)},
        folds=tuple(choices),
        current=dict(zip(qids, current.tolist(), strict=True)),
        tuned=dict(zip(qids, tuned.tolist(), strict=True)),
        current_interval=Interval(*bootstrap_interval(current.tolist())),
        tuned_interval=Interval(*bootstrap_interval(tuned.tolist())),
        difference_interval=Interval(*bootstrap_interval(differences.tolist())),
        p_value=paired_randomization_test(tuned.tolist(), current.tolist()),
        chosen=candidates[int(np.argmax(means))],
    )
