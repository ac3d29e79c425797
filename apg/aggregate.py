"""Summaries of a multirun: held-out cost and success rate per setting, across seeds, with confidence intervals.

A multirun directory (``apg-train --multirun ...``, any launcher) holds one directory per job, each with the
``config.yaml`` (its run record) and ``metrics.json`` the training loop wrote. Jobs whose records differ only in
``seed``, the code version and the runtime fields (``apg.runs.PER_SEED_KEYS``) are one *setting*. For each setting and metric the summary
gives the number of seeds ``n``, the mean, the sample standard deviation ``s`` and the two-sided Student-t
confidence interval ``mean +- t_{(1+c)/2, n-1} s / sqrt(n)`` (Student 1908, "The probable error of a mean",
Biometrika 6(1):1-25). The interval treats the per-seed results as independent draws from a normal
distribution; with one seed it is undefined and reported as NaN. Success rates are fractions in [0, 1] and
their interval is not clipped to that range.

This module computes the numbers; :mod:`apg.reports.multirun_report` writes them as CSV, markdown and a figure.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import yaml
from scipy import stats

from apg.runs import PER_SEED_KEYS, flatten

METRICS = {"eval_cost": "held-out cost", "success_rate": "held-out success rate"}
IGNORED_KEYS = PER_SEED_KEYS  # differ between the seeds of one setting, or change nothing (apg.runs)


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
        runs.append(Run(cfg.parent, flatten(yaml.safe_load(cfg.read_text()) or {}), metrics))
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


def multirun_summary(runs: Sequence[Run], confidence: float = 0.95) -> list[dict[str, Any]]:
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


__all__ = ["METRICS", "IGNORED_KEYS", "Interval", "t_interval", "Run", "find_runs", "setting_keys",
           "multirun_summary"]
