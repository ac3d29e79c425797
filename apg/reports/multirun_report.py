"""What ``apg-aggregate`` writes for a multirun: ``summary.csv``, ``summary.md`` and ``summary.png``.

The rows come from :func:`apg.aggregate.multirun_summary` (per setting, seeds and Student-t intervals); nothing
here recomputes them.
"""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path
from typing import Any, Sequence

import matplotlib.pyplot as plt

from apg.aggregate import METRICS, find_runs, multirun_summary

OUTPUT_NAMES = ("summary.csv", "summary.md", "summary.png")


def to_csv(rows: Sequence[dict[str, Any]]) -> str:
    """The rows as CSV text, one column per key (the per-seed value lists left out); floats in full precision."""
    columns = [c for c in rows[0] if not c.endswith("_values")]
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for row in rows:
        w.writerow({c: (repr(v) if isinstance(v, float) else v) for c, v in row.items() if c in columns})
    return buf.getvalue()


def to_markdown(rows: Sequence[dict[str, Any]], confidence: float = 0.95) -> str:
    """A markdown table: per setting, the seeds and each metric's mean with its confidence interval."""
    pct = f"{100 * confidence:g}%"
    lines = [f"| setting | seeds | held-out cost: mean [{pct} CI] | success rate: mean [{pct} CI] |",
             "| --- | ---: | --- | --- |"]
    for row in rows:
        cells = []
        for metric, fmt in (("eval_cost", "{:.4g}"), ("success_rate", "{:.3f}")):
            mean, low, high = (row[f"{metric}_{p}"] for p in ("mean", "low", "high"))
            ci = "n/a" if math.isnan(low) else f"{fmt.format(low)}, {fmt.format(high)}"
            cells.append(f"{fmt.format(mean)} [{ci}]")
        unfinished = f" (+{row['unfinished']} unfinished)" if row["unfinished"] else ""
        lines.append(f"| {row['setting']} | {row['n']}{unfinished} | {cells[0]} | {cells[1]} |")
    return "\n".join(lines) + "\n"


def figure(rows: Sequence[dict[str, Any]], confidence: float = 0.95):
    """Per setting: each seed's value (dots), the mean and its confidence interval (bar), for both metrics."""
    fig, axes = plt.subplots(1, 2, figsize=(max(6.0, 2.0 + 1.2 * len(rows)) * 1.6, 4.0), squeeze=False)
    x = list(range(len(rows)))
    for ax, (metric, label) in zip(axes[0], METRICS.items()):
        for i, row in enumerate(rows):
            vals = row[f"{metric}_values"]
            ax.plot([i - 0.15] * len(vals), vals, ".", color="0.5", zorder=1)  # beside the bar, not under it
            mean, low, high = (row[f"{metric}_{p}"] for p in ("mean", "low", "high"))
            err = [[0.0], [0.0]] if math.isnan(low) else [[mean - low], [high - mean]]
            ax.errorbar([i], [mean], yerr=err, fmt="o", color="C0", capsize=4, zorder=2)
        ax.set_xticks(x, [row["setting"] for row in rows], rotation=30, ha="right", fontsize=8)
        ax.set_ylabel(label)
        ax.set_title(f"{label}: seeds, mean and {100 * confidence:g}% Student-t CI", fontsize=9)
        ax.grid(alpha=0.3)
    fig.tight_layout()
    return fig


def write_summary(sweep_dir: Path, out_dir: Path | None = None,
                  confidence: float = 0.95) -> tuple[list[dict], list[Path]]:
    """Summarise the multirun in ``sweep_dir`` into ``summary.csv``, ``summary.md`` and ``summary.png``.

    Returns the rows and the paths written (into ``out_dir``, by default ``sweep_dir``).

    Raises:
        FileNotFoundError: no job directory under ``sweep_dir``.
        ValueError: ``confidence`` outside (0, 1).
    """
    rows = multirun_summary(find_runs(sweep_dir), confidence)
    out = Path(out_dir) if out_dir is not None else Path(sweep_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = [out / name for name in OUTPUT_NAMES]
    paths[0].write_text(to_csv(rows))
    paths[1].write_text(to_markdown(rows, confidence))
    fig = figure(rows, confidence)
    fig.savefig(paths[2], dpi=120)
    plt.close(fig)
    return rows, paths


__all__ = ["OUTPUT_NAMES", "to_csv", "to_markdown", "figure", "write_summary"]
