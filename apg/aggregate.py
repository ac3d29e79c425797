"""Summaries of a multirun: held-out cost and success rate per setting, across seeds, with confidence intervals.

A multirun directory (``apg-train --multirun ...``, any launcher) holds one directory per job, each with the
``config.yaml`` and ``metrics.json`` the trainer wrote. Jobs whose configs differ only in ``seed`` (and in the
runtime keys ``resume``, ``progress``, ``threads``) are one *setting*. For each setting and metric the summary
gives the number of seeds ``n``, the mean, the sample standard deviation ``s`` and the two-sided Student-t
confidence interval ``mean +- t_{(1+c)/2, n-1} s / sqrt(n)`` (Student 1908, "The probable error of a mean",
Biometrika 6(1):1-25). The interval treats the per-seed results as independent draws from a normal
distribution; with one seed it is undefined and reported as NaN. Success rates are fractions in [0, 1] and
their interval is not clipped to that range.
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import yaml
from scipy import stats

METRICS = {"eval_cost": "held-out cost", "success_rate": "held-out success rate"}
IGNORED_KEYS = ("seed", "resume", "progress", "threads")  # differ between seeds of one setting, or change nothing
OUTPUT_NAMES = ("summary.csv", "summary.md", "summary.png")


@dataclass(frozen=True)
class Interval:
    """Mean, sample standard deviation and Student-t confidence interval of ``n`` values."""

    n: int
    mean: float
    std: float  # sample standard deviation (n - 1 in the denominator); NaN for n = 1
    low: float
    high: float


def t_interval(values: Sequence[float], confidence: float = 0.95) -> Interval:
    """The two-sided Student-t interval for the mean of ``values`` (module docstring).

    Raises:
        ValueError: no values, or ``confidence`` outside (0, 1).
    """
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")
    n = len(values)
    if n == 0:
        raise ValueError("t_interval needs at least one value")
    mean = math.fsum(values) / n
    if n == 1:
        return Interval(1, mean, math.nan, math.nan, math.nan)
    std = math.sqrt(math.fsum((v - mean) ** 2 for v in values) / (n - 1))
    half = float(stats.t.ppf((1.0 + confidence) / 2.0, n - 1)) * std / math.sqrt(n)
    return Interval(n, mean, std, mean - half, mean + half)


@dataclass(frozen=True)
class Run:
    """One job of a multirun: its directory, flattened config and metrics (``None`` if it did not finish)."""

    path: Path
    config: dict[str, Any]
    metrics: dict[str, Any] | None


def _flatten(d: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in d.items():
        if isinstance(v, dict) and v:
            out.update(_flatten(v, f"{prefix}{k}."))
        else:
            out[f"{prefix}{k}"] = v
    return out


def find_runs(sweep_dir: Path) -> list[Run]:
    """Every job directory under ``sweep_dir`` (one holding ``config.yaml``), hidden folders such as
    ``.submitit`` skipped, in path order.

    Raises:
        FileNotFoundError: ``sweep_dir`` does not exist or holds no job directory.
    """
    sweep_dir = Path(sweep_dir)
    if not sweep_dir.is_dir():
        raise FileNotFoundError(f"{sweep_dir} is not a directory")
    runs = []
    for cfg in sorted(sweep_dir.rglob("config.yaml")):
        if any(part.startswith(".") for part in cfg.relative_to(sweep_dir).parts[:-1]):
            continue
        metrics_path = cfg.parent / "metrics.json"
        metrics = json.loads(metrics_path.read_text()) if metrics_path.exists() else None
        runs.append(Run(cfg.parent, _flatten(yaml.safe_load(cfg.read_text()) or {}), metrics))
    if not runs:
        raise FileNotFoundError(f"{sweep_dir} holds no job directory (a folder with config.yaml and metrics.json); "
                                f"pass the directory of a multirun, e.g. runs/multirun/<date>_<time>")
    return runs


def setting_keys(runs: Iterable[Run]) -> list[str]:
    """The config keys, other than :data:`IGNORED_KEYS`, whose values differ between runs: they name a setting."""
    runs = list(runs)
    keys = sorted({k for r in runs for k in r.config} - set(IGNORED_KEYS))
    return [k for k in keys if len({json.dumps(r.config.get(k), sort_keys=True) for r in runs}) > 1]


def _shown(v: Any) -> str:
    return json.dumps(v) if isinstance(v, (list, dict)) else str(v)


def summarise(runs: Sequence[Run], confidence: float = 0.95) -> list[dict[str, Any]]:
    """One row per setting: its key values, ``n`` finished seeds, ``unfinished`` jobs, and for each metric in
    :data:`METRICS` the ``<metric>_mean``, ``_std``, ``_low`` and ``_high`` of the interval."""
    keys = setting_keys(runs)
    groups: dict[tuple[str, ...], list[Run]] = {}
    for r in runs:
        groups.setdefault(tuple(_shown(r.config.get(k)) for k in keys), []).append(r)
    rows = []
    for values, members in groups.items():
        done = [r for r in members if r.metrics is not None]
        row: dict[str, Any] = {"setting": " ".join(f"{k}={v}" for k, v in zip(keys, values)) or "all runs"}
        row.update(zip(keys, values))
        row["n"] = len(done)
        row["unfinished"] = len(members) - len(done)
        row["seeds"] = " ".join(str(r.metrics.get("seed", r.config.get("seed"))) for r in done)
        for metric in METRICS:
            vals = [float(r.metrics[metric]) for r in done]
            iv = t_interval(vals, confidence) if vals else Interval(0, math.nan, math.nan, math.nan, math.nan)
            row.update({f"{metric}_mean": iv.mean, f"{metric}_std": iv.std, f"{metric}_low": iv.low,
                        f"{metric}_high": iv.high})
            row[f"{metric}_values"] = vals
        rows.append(row)
    return rows


def to_csv(rows: Sequence[dict[str, Any]]) -> str:
    columns = [c for c in rows[0] if not c.endswith("_values")]
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for row in rows:
        w.writerow({c: (repr(v) if isinstance(v, float) else v) for c, v in row.items() if c in columns})
    return buf.getvalue()


def to_markdown(rows: Sequence[dict[str, Any]], confidence: float = 0.95) -> str:
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
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

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
    import matplotlib.pyplot as plt

    rows = summarise(find_runs(sweep_dir), confidence)
    out = Path(out_dir) if out_dir is not None else Path(sweep_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = [out / name for name in OUTPUT_NAMES]
    paths[0].write_text(to_csv(rows))
    paths[1].write_text(to_markdown(rows, confidence))
    fig = figure(rows, confidence)
    fig.savefig(paths[2], dpi=120)
    plt.close(fig)
    return rows, paths
