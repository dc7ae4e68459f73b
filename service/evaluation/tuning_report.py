"""A tuning run written out: tuning.md to read, tuning.json with every number, tuning.png."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from service.evaluation.tuning import CURRENT, TuningResult


@dataclass(frozen=True, slots=True)
class TuningFiles:
    report: Path
    numbers: Path
    picture: Path


def write_tuning_report(
    result: TuningResult,
    out_dir: str | Path,
    *,
    collection: str,
    settings_before: dict[str, object],
    applied: bool,
) -> TuningFiles:
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    picture = out / "tuning.png"
    _draw(result, picture)
    numbers = out / "tuning.json"
    numbers.write_text(
        json.dumps(_document(result, collection, settings_before, applied), indent=2) + "\n",
        encoding="utf-8",
    )
    report = out / "tuning.md"
    report.write_text(
        _markdown(result, collection, settings_before, applied, picture.name), encoding="utf-8"
    )
    return TuningFiles(report, numbers, picture)


def _document(
    result: TuningResult, collection: str, before: dict[str, object], applied: bool
) -> dict[str, object]:
    return {
        "collection": collection,
        "measure": result.measure,
        "queries": len(result.current),
        "folds": [
            {
                "fold": fold.fold,
                "held_out": list(fold.held_out),
                "chosen": fold.chosen,
                "training_mean": fold.training_mean,
                "held_out_mean": fold.held_out_mean,
            }
            for fold in result.folds
        ],
        "candidates": [
            {
                "label": candidate.label,
                "settings": dict(candidate.settings),
                "mean_all_queries": result.means[candidate.label],
            }
            for candidate in result.candidates
        ],
        "settings_before": before,
        "current": result.current_interval._asdict(),
        "tuned_held_out": result.tuned_interval._asdict(),
        "difference": result.difference_interval._asdict(),
        "p_value": result.p_value,
        "significant": result.significant,
        "chosen": {"label": result.chosen.label, "settings": dict(result.chosen.settings)},
        "applied": applied,
        "verdict": result.verdict(),
        "per_query": {
            qid: {"current": result.current[qid], "tuned_held_out": result.tuned[qid]}
            for qid in result.current
        },
    }


def _markdown(
    result: TuningResult,
    collection: str,
    before: dict[str, object],
    applied: bool,
    picture: str,
) -> str:
    m = result.measure
    lines = [
        f"# Tuning: {collection}",
        "",
        f"**{result.verdict()}**",
        "",
        "Applied to the collection: "
        + ("yes." if applied else "no (only `--apply` with a significant held-out gain does)."),
        "",
        "## Held-out comparison",
        "",
        f"{len(result.current)} queries, {len(result.folds)} folds. Each query's tuned value",
        "comes from the settings chosen on the other folds. Intervals: 95% percentile bootstrap;",
        "p: two-sided paired randomization test.",
        "",
        f"| | mean {m} | 95% interval |",
        "|---|---|---|",
    ]
    for name, interval in (
        ("current settings", result.current_interval),
        ("tuned (held out)", result.tuned_interval),
        ("difference", result.difference_interval),
    ):
        lines.append(
            f"| {name} | {interval.mean:.4f} | {interval.low:.4f} to {interval.high:.4f} |"
        )
    lines += ["", f"p = {result.p_value:.4f}", "", "## Folds", ""]
    lines += ["| fold | queries | chosen on the other folds | training mean | held-out mean |"]
    lines += ["|---|---|---|---|---|"]
    for fold in result.folds:
        lines.append(
            f"| {fold.fold} | {len(fold.held_out)} | {fold.chosen} | {fold.training_mean:.4f} |"
            f" {fold.held_out_mean:.4f} |"
        )
    lines += ["", "## Settings tried", "", f"Mean {m} over every query (in sample).", ""]
    lines += ["| settings | mean |", "|---|---|"]
    for candidate in sorted(result.candidates, key=lambda c: -result.means[c.label]):
        lines.append(f"| {candidate.label} | {result.means[candidate.label]:.4f} |")
    lines += [
        "",
        f"Best over every query: `{result.chosen.label}`.",
        "",
        "## Settings before",
        "",
        "```json",
        json.dumps(before, indent=2, default=str),
        "```",
        "",
        f"![tried settings and held-out differences]({picture})",
        "",
    ]
    return "\n".join(lines)


def _draw(result: TuningResult, path: Path) -> None:
    """Each candidate's in-sample mean, best first, the current settings marked; below, the
    per-query held-out differences from the current settings."""
    figure = Figure(figsize=(11, 8.5), layout="constrained")
    FigureCanvasAgg(figure)
    top, bottom = figure.subplots(2, 1)
    ranked = sorted(result.candidates, key=lambda c: -result.means[c.label])
    means = [result.means[c.label] for c in ranked]
    colors = ["tab:orange" if c.label == CURRENT else "tab:blue" for c in ranked]
    top.bar(np.arange(len(ranked)), means, color=colors)
    low = min(means)
    top.set_ylim(max(0.0, low - 0.05), min(1.0, max(means) + 0.02))
    top.set_xticks([])
    top.set_ylabel(f"mean {result.measure}, every query")
    top.set_title(f"{len(ranked)} settings tried, best first (orange: the current settings)")
    differences = np.sort(
        np.array([result.tuned[qid] - result.current[qid] for qid in result.current])
    )[::-1]
    bottom.bar(
        np.arange(differences.size),
        differences,
        width=1.0,
        color=["tab:blue" if d > 0 else "tab:orange" for d in differences],
    )
    bottom.axhline(0.0, color="black", linewidth=0.8)
    bottom.axhline(float(differences.mean()), color="black", linestyle="--", linewidth=0.8)
    bottom.set_xticks([])
    bottom.set_ylabel(f"{result.measure}: tuned (held out) minus current")
    bottom.set_title(
        f"mean {result.difference_interval.mean:+.4f}"
        f" ({result.difference_interval.low:+.4f} to {result.difference_interval.high:+.4f}),"
        f" p = {result.p_value:.4f}"
    )
    figure.savefig(path, dpi=110)
