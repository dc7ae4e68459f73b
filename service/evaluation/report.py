"""The evaluation written out: a readable report, every number as JSON, TREC runs, a picture.

The run files let anyone recompute the figures with trec_eval itself; for that they must keep
our order, and trec_eval re-sorts each query's documents by score (breaking ties by document id),
so tied scores are nudged apart here and the report says so.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from service.evaluation.filter_agreement import FilterAgreement
from service.evaluation.runner import EvaluationResult, SystemResult

WORST_QUERY_COUNT = 10
TOP_HIT_COUNT = 5


@dataclass(frozen=True, slots=True)
class ReportFiles:
    report: Path
    metrics: Path
    picture: Path
    runs: dict[str, Path]
    """Run file per system label."""
    nudged_scores: int
    """How many scores were lowered so that every run strictly decreases."""


def write_report(
    result: EvaluationResult, out_dir: str | Path, *, title: str = "Retrieval evaluation"
) -> ReportFiles:
    """Write report.md, metrics.json, report.png and one run file per system into ``out_dir``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    runs: dict[str, Path] = {}
    nudged_by_system: dict[str, int] = {}
    for system_result, file_name in zip(
        result.systems, _run_file_names(result.systems), strict=True
    ):
        label = system_result.system.label
        lines, nudged = trec_run_lines(system_result, tag=_run_tag(label))
        runs[label] = out / file_name
        runs[label].write_text("".join(lines), encoding="utf-8")
        nudged_by_system[label] = nudged
    picture = out / "report.png"
    _draw_picture(result, picture)
    metrics = out / "metrics.json"
    metrics.write_text(
        json.dumps(_metrics_document(result, runs, nudged_by_system), indent=2, default=str) + "\n",
        encoding="utf-8",
    )
    report = out / "report.md"
    report.write_text(
        _markdown(result, title, runs, nudged_by_system, picture.name), encoding="utf-8"
    )
    return ReportFiles(report, metrics, picture, runs, sum(nudged_by_system.values()))


def strictly_decreasing(scores: Sequence[float]) -> tuple[list[float], int]:
    """The scores with each one that does not fall below its predecessor lowered just enough.

    "Just enough" is the next representable double below the predecessor, so a tie stays
    visibly a tie to a reader and the order is the one the backend ranked.
    """
    adjusted: list[float] = []
    nudged = 0
    for score in scores:
        value = float(score)
        if adjusted and value >= adjusted[-1]:
            value = float(np.nextafter(adjusted[-1], -math.inf))
            nudged += 1
        adjusted.append(value)
    return adjusted, nudged


def trec_run_lines(system_result: SystemResult, *, tag: str) -> tuple[list[str], int]:
    """``qid Q0 docid rank score tag`` lines, queries in evaluation order, and the nudge count."""
    lines: list[str] = []
    nudged_total = 0
    for qid, ranked in system_result.rankings.items():
        scores, nudged = strictly_decreasing([score for _, score in ranked])
        nudged_total += nudged
        for rank, ((doc_id, _), score) in enumerate(zip(ranked, scores, strict=True), start=1):
            lines.append(f"{qid} Q0 {doc_id} {rank} {score!r} {tag}\n")
    return lines, nudged_total


def _run_tag(label: str) -> str:
    return re.sub(r"\s+", "_", label.strip())


def _run_file_names(systems: Sequence[SystemResult]) -> list[str]:
    names: list[str] = []
    for index, system_result in enumerate(systems, start=1):
        slug = re.sub(r"[^A-Za-z0-9._=-]+", "_", system_result.system.label).strip("_") or "run"
        name = f"run-{slug}.txt"
        if name in names:
            name = f"run-{index}-{slug}.txt"
        names.append(name)
    return names


def _metrics_document(
    result: EvaluationResult, runs: dict[str, Path], nudged_by_system: dict[str, int]
) -> dict[str, object]:
    return {
        "k": result.k,
        "depth": result.depth,
        "filter": result.global_filter,
        "measures": result.measures,
        "counts": {
            "queries_read": result.queries_read,
            "queries_evaluated": len(result.queries),
            "skipped_without_relevant": len(result.skipped_without_relevant),
            "skipped_after_filter": len(result.skipped_after_filter),
            "dropped_judgments": sum(result.dropped_judgments.values()),
            "dropped_relevant_judgments": result.dropped_relevant,
        },
        "skipped_without_relevant": result.skipped_without_relevant,
        "skipped_after_filter": result.skipped_after_filter,
        "dropped_judgments": result.dropped_judgments,
        "systems": [
            {
                "label": system_result.system.label,
                "mode": system_result.system.mode,
                "settings": dict(system_result.system.settings),
                "settings_used": system_result.settings_used,
                "run_file": runs[system_result.system.label].name,
                "nudged_scores": nudged_by_system[system_result.system.label],
                "summary": {
                    name: interval._asdict() for name, interval in system_result.summary.items()
                },
                "per_query": system_result.per_query,
            }
            for system_result in result.systems
        ],
        "infer_filter": None if result.infer_filter is None else dict(result.infer_filter),
        "filter_agreement": _agreement_document(result.filter_agreement),
        "comparisons": [
            {
                "first": comparison.first,
                "second": comparison.second,
                "measure": comparison.measure,
                "mean_difference": comparison.mean_difference,
                "p_value": comparison.p_value,
            }
            for comparison in result.comparisons
        ],
    }


def _agreement_document(agreement: FilterAgreement | None) -> dict[str, object] | None:
    if agreement is None:
        return None
    return {
        "exact_share": agreement.exact_share,
        "excluding_relevant_share": agreement.excluding_share,
        "mean_jaccard": agreement.mean_jaccard,
        "per_query": {
            qid: {
                "labelled": c.labelled,
                "inferred": c.inferred,
                "labelled_documents": c.labelled_documents,
                "inferred_documents": c.inferred_documents,
                "exact": c.exact,
                "excluded_relevant": list(c.excluded_relevant),
                "jaccard": c.jaccard,
            }
            for qid, c in agreement.per_query.items()
        },
    }


def _markdown(
    result: EvaluationResult,
    title: str,
    runs: dict[str, Path],
    nudged_by_system: dict[str, int],
    picture_name: str,
) -> str:
    lines = [f"# {title}", ""]
    lines += _setup_section(result)
    lines += _measures_section(result)
    lines += _filter_agreement_section(result)
    lines += _comparisons_section(result)
    lines += [f"![Measures with 95% intervals and per-query differences]({picture_name})", ""]
    lines += _settings_section(result)
    lines += _runs_section(result, runs, nudged_by_system)
    lines += _worst_queries_section(result)
    return "\n".join(lines)


def _setup_section(result: EvaluationResult) -> list[str]:
    dropped = sum(result.dropped_judgments.values())
    filter_text = "none" if result.global_filter is None else f"`{_compact(result.global_filter)}`"
    with_own_filter = sum(1 for query in result.queries.values() if query.filter is not None)
    lines = [
        "## Setup",
        "",
        f"- Evaluated by document: a document ranks where its best chunk ranks; runs hold up to "
        f"{result.depth} documents per query, and k = {result.k}.",
        f"- Global filter: {filter_text}; evaluated queries with their own filter: "
        f"{with_own_filter}.",
        f"- Queries read: {result.queries_read}; evaluated: {len(result.queries)}.",
        f"- Skipped, no positive judgment: {len(result.skipped_without_relevant)}"
        + _id_list(result.skipped_without_relevant),
        f"- Skipped, every positive judgment failed the filter: "
        f"{len(result.skipped_after_filter)}" + _id_list(result.skipped_after_filter),
        f"- Judgments dropped because their document fails the query's filter: {dropped} "
        f"(of which relevant: {result.dropped_relevant}) over "
        f"{len(result.dropped_judgments)} queries.",
        "- Measures follow trec_eval: relevant means grade > 0; nDCG gain is the grade; "
        "MAP and recall divide by every relevant judged document.",
        "- Intervals: 95% percentile bootstrap of the mean over queries (10,000 resamples, "
        "seed 0).",
        "",
    ]
    return lines


def _measures_section(result: EvaluationResult) -> list[str]:
    lines = [
        "## Measures",
        "",
        "| system | " + " | ".join(result.measures) + " |",
        "|---|" + "---|" * len(result.measures),
    ]
    for system_result in result.systems:
        cells = [
            f"{interval.mean:.4f} [{interval.low:.4f}, {interval.high:.4f}]"
            for interval in (system_result.summary[name] for name in result.measures)
        ]
        lines.append(f"| {_cell(system_result.system.label)} | " + " | ".join(cells) + " |")
    lines.append("")
    return lines


def _filter_agreement_section(result: EvaluationResult) -> list[str]:
    agreement = result.filter_agreement
    if agreement is None:
        return []
    count = len(agreement.per_query)
    exact = sum(c.exact for c in agreement.per_query.values())
    excluding = sum(bool(c.excluded_relevant) for c in agreement.per_query.values())
    lines = [
        "## Filter agreement",
        "",
        f"Filters inferred from the question (`infer_filter`: `{_compact(result.infer_filter)}`)"
        " against the labelled ones, compared by the documents each selects.",
        "",
        f"- same documents: {agreement.exact_share:.3f} ({exact} of {count} questions)",
        f"- a relevant document excluded: {agreement.excluding_share:.3f}"
        f" ({excluding} of {count} questions)",
        f"- mean Jaccard of the two document sets: {agreement.mean_jaccard:.3f}",
        "",
    ]
    differing = [(qid, c) for qid, c in agreement.per_query.items() if not c.exact]
    if differing:
        lines += [
            "| query | labelled | inferred | documents (labelled / inferred) | Jaccard |"
            " relevant excluded |",
            "|---|---|---|---|---|---|",
        ]
        for qid, c in differing:
            labelled = "none" if c.labelled is None else f"`{_cell(_compact(c.labelled))}`"
            inferred = "none" if c.inferred is None else f"`{_cell(_compact(c.inferred))}`"
            excluded = ", ".join(f"`{doc}`" for doc in c.excluded_relevant) or "-"
            lines.append(
                f"| {qid} | {labelled} | {inferred} | {c.labelled_documents} /"
                f" {c.inferred_documents} | {c.jaccard:.3f} | {excluded} |"
            )
        lines.append("")
    return lines


def _comparisons_section(result: EvaluationResult) -> list[str]:
    if not result.comparisons:
        return []
    lines = [
        "## Comparisons",
        "",
        "Mean paired difference (first minus second) and its two-sided p-value from a paired "
        "randomization test (10,000 sign flips, seed 0; exact enumeration up to 16 queries).",
        "",
        "| first | second | " + " | ".join(result.measures) + " |",
        "|---|---|" + "---|" * len(result.measures),
    ]
    by_pair: dict[tuple[str, str], dict[str, str]] = {}
    for comparison in result.comparisons:
        by_pair.setdefault((comparison.first, comparison.second), {})[comparison.measure] = (
            f"{comparison.mean_difference:+.4f} (p={comparison.p_value:.4f})"
        )
    for (first, second), cells in by_pair.items():
        row = " | ".join(cells[name] for name in result.measures)
        lines.append(f"| {_cell(first)} | {_cell(second)} | {row} |")
    lines.append("")
    return lines


def _settings_section(result: EvaluationResult) -> list[str]:
    lines = ["## Settings used", ""]
    for system_result in result.systems:
        described = ", ".join(
            f"{name}={_compact(value)}" for name, value in system_result.settings_used.items()
        )
        lines.append(
            f"- **{system_result.system.label}** ({system_result.system.mode}): "
            f"{described or 'defaults'}"
        )
    lines.append("")
    return lines


def _runs_section(
    result: EvaluationResult, runs: dict[str, Path], nudged_by_system: dict[str, int]
) -> list[str]:
    lines = [
        "## Run files",
        "",
        "TREC format, `qid Q0 docid rank score tag`. trec_eval orders documents by score, so "
        "scores strictly decrease within each query: where a score tied (or exceeded) the one "
        "above it, it was lowered to the next representable double below that one "
        "(numpy.nextafter). The order is unchanged.",
        "",
    ]
    for system_result in result.systems:
        label = system_result.system.label
        lines.append(f"- `{runs[label].name}` ({label}): {nudged_by_system[label]} scores nudged")
    lines.append("")
    return lines


def _worst_queries_section(result: EvaluationResult) -> list[str]:
    main = result.systems[0]
    main_measure = result.measures[0]
    worst = sorted(main.per_query, key=lambda qid: main.per_query[qid][main_measure])
    lines = [
        f"## Worst queries ({main_measure} of {main.system.label})",
        "",
    ]
    for qid in worst[:WORST_QUERY_COUNT]:
        query = result.queries[qid]
        judgments = result.judgments[qid]
        scores = ", ".join(
            f"{system_result.system.label} {system_result.per_query[qid][main_measure]:.4f}"
            for system_result in result.systems
        )
        relevant = sum(1 for grade in judgments.values() if grade > 0)
        lines += [
            f"### {qid}: {query.text}",
            "",
            f"{main_measure}: {scores}. Relevant judged documents: {relevant}.",
        ]
        if query.filter is not None:
            lines.append(f"Filter: `{_compact(query.filter)}`.")
        lines += ["", "| rank | document | score | grade |", "|---|---|---|---|"]
        for rank, (doc_id, score) in enumerate(main.rankings[qid][:TOP_HIT_COUNT], start=1):
            grade = judgments.get(doc_id)
            lines.append(
                f"| {rank} | `{doc_id}` | {score:.4f} | "
                f"{'not judged' if grade is None else grade} |"
            )
        if not main.rankings[qid]:
            lines.append("| - | nothing retrieved | | |")
        lines.append("")
    return lines


def _draw_picture(result: EvaluationResult, path: Path) -> None:
    """Bars with interval whiskers per measure and system; per-query differences of a pair."""
    paired = len(result.systems) >= 2
    figure = Figure(figsize=(11, 8.5 if paired else 4.5), layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.subplots(2 if paired else 1, 1, squeeze=False)[:, 0]
    bars = axes[0]
    positions = np.arange(len(result.measures), dtype=np.float64)
    width = 0.8 / len(result.systems)
    for index, system_result in enumerate(result.systems):
        intervals = [system_result.summary[name] for name in result.measures]
        means = np.array([interval.mean for interval in intervals])
        whiskers = np.array(
            [
                [interval.mean - interval.low for interval in intervals],
                [interval.high - interval.mean for interval in intervals],
            ]
        )
        bars.bar(
            positions + (index - (len(result.systems) - 1) / 2) * width,
            means,
            width,
            yerr=whiskers,
            capsize=3,
            label=system_result.system.label,
        )
    bars.set_xticks(positions, result.measures)
    bars.set_ylim(0, 1.05)
    bars.set_ylabel("mean over queries (95% interval)")
    bars.set_title(f"{len(result.queries)} queries")
    bars.legend(
        fontsize="small",
        ncols=min(4, len(result.systems)),
        loc="upper center",
        bbox_to_anchor=(0.5, -0.08),
    )
    if paired:
        _draw_differences(axes[1], result)
    figure.savefig(path, dpi=110)


def _draw_differences(axis: Axes, result: EvaluationResult) -> None:
    first, second = result.systems[0], result.systems[1]
    measure = result.measures[0]
    differences = np.sort(
        np.array(
            [
                first.per_query[qid][measure] - second.per_query[qid][measure]
                for qid in first.per_query
            ]
        )
    )[::-1]
    better = int(np.count_nonzero(differences > 0))
    worse = int(np.count_nonzero(differences < 0))
    colors = ["tab:blue" if value > 0 else "tab:orange" for value in differences]
    axis.bar(np.arange(differences.size), differences, width=1.0, color=colors)
    axis.axhline(0.0, color="black", linewidth=0.8)
    axis.axhline(
        float(differences.mean()), color="black", linestyle="--", linewidth=0.8, label="mean"
    )
    axis.set_xticks([])
    axis.legend(fontsize="small")
    axis.set_xlabel(f"{differences.size} queries, sorted by difference")
    axis.set_ylabel(f"{measure} difference")
    axis.set_title(
        f"{first.system.label} minus {second.system.label}: better on {better}, worse on "
        f"{worse}, equal on {differences.size - better - worse}"
    )


def _id_list(qids: Sequence[str], shown: int = 20) -> str:
    if not qids:
        return ""
    listed = ", ".join(qids[:shown])
    more = f", and {len(qids) - shown} more" if len(qids) > shown else ""
    return f" ({listed}{more})"


def _compact(value: object) -> str:
    return value if isinstance(value, str) else json.dumps(value, default=str)


def _cell(text: str) -> str:
    return text.replace("|", "\\|")
