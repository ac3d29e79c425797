"""Sweeps: Hydra multirun through the submitit (local executor) and joblib launchers, and apg-aggregate.

Intervals are checked against ``scipy.stats.t.interval`` and against the published two-sided 95% critical values
of Student's t (NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.2: 12.706 for 1 degree of
freedom, 4.303 for 2, 2.776 for 4).
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
import yaml
from hydra import compose, initialize_config_dir

from apg.aggregate import find_runs, multirun_summary, t_interval
from apg.reports.multirun_report import write_summary
from apg.cli.aggregate import main as aggregate_main
from apg.cli.train import CONFIG_DIR

TINY = ["train.iterations=2", "train.batch_size=8", "train.horizon=10", "train.eval_every=1", "train.eval_batch=16",
        "train.figure_every=0", "progress=false"]


def _apg(module: str, *args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "HYDRA_FULL_ERROR": "0", "OMP_NUM_THREADS": "1"}
    return subprocess.run([sys.executable, "-m", module, *args], cwd=cwd, env=env, capture_output=True, text=True,
                          timeout=300)


def _scipy_interval(values, confidence=0.95):
    values = np.asarray(values, dtype=float)
    return scipy.stats.t.interval(confidence, len(values) - 1, loc=values.mean(), scale=scipy.stats.sem(values))


@pytest.mark.parametrize("values, t_table", [
    ([1.0, 2.0], 12.706),
    ([3.1, 2.7, 3.9], 4.303),
    ([10.0, 12.5, 9.0, 11.0, 10.5], 2.776),
])
def test_t_interval_matches_scipy_and_the_published_table(values, t_table):
    iv = t_interval(values)
    low, high = _scipy_interval(values)
    # Same quantile and standard error, computed along another route: agreement to rounding.
    assert (iv.low, iv.high) == pytest.approx((low, high), rel=1e-12)
    half = t_table * np.std(values, ddof=1) / np.sqrt(len(values))
    # The table rounds to three decimals: up to 5e-4 absolute on t, so up to 1.8e-4 relative for t >= 2.776.
    assert iv.high - iv.mean == pytest.approx(half, rel=2e-4)
    assert iv.n == len(values) and iv.mean == pytest.approx(np.mean(values), rel=1e-15)


def test_one_seed_has_no_interval_and_bad_confidence_is_refused():
    iv = t_interval([2.0])
    assert iv.mean == 2.0 and np.isnan(iv.low) and np.isnan(iv.high)
    with pytest.raises(ValueError, match="confidence"):
        t_interval([1.0, 2.0], confidence=1.5)


def _fake_job(root: Path, name: str, lr: float, seed: int, cost: float | None, success: float = 0.5) -> None:
    job = root / name
    job.mkdir(parents=True)
    config = {"seed": seed, "threads": 1, "optim": {"name": "adam", "lr": lr}, "train": {"horizon": 50}}
    (job / "config.yaml").write_text(yaml.safe_dump(config))
    if cost is not None:
        (job / "metrics.json").write_text(json.dumps({"eval_cost": cost, "success_rate": success, "seed": seed}))


def test_summary_groups_seeds_by_setting_and_writes_table_and_plot(tmp_path):
    costs = {1e-3: [4.0, 5.0, 7.5], 3e-3: [2.0, 2.5, 2.25]}
    success = {1e-3: [0.25, 0.5, 0.0], 3e-3: [1.0, 0.75, 0.875]}
    for i, lr in enumerate(costs):
        for seed in range(3):
            _fake_job(tmp_path, f"{i}{seed}_lr={lr},seed={seed}", lr, seed, costs[lr][seed], success[lr][seed])
    _fake_job(tmp_path, "9_unfinished", 3e-3, 7, None)  # a job that crashed: config.yaml, no metrics.json
    _fake_job(tmp_path / ".submitit" / "123", "decoy", 1.0, 0, 99.0)  # launcher internals are not runs
    rows, paths = write_summary(tmp_path)
    assert [p.name for p in paths] == ["summary.csv", "summary.md", "summary.png"] and all(p.exists() for p in paths)
    by_lr = {float(r["optim.lr"]): r for r in rows}
    assert set(by_lr) == {1e-3, 3e-3}  # seed and threads do not split settings
    assert by_lr[3e-3]["n"] == 3 and by_lr[3e-3]["unfinished"] == 1 and by_lr[1e-3]["unfinished"] == 0
    with open(paths[0]) as f:
        table = {float(r["optim.lr"]): r for r in csv.DictReader(f)}
    for lr in costs:
        for metric, values in (("eval_cost", costs[lr]), ("success_rate", success[lr])):
            low, high = _scipy_interval(values)
            assert float(table[lr][f"{metric}_mean"]) == pytest.approx(np.mean(values), rel=1e-12)
            assert float(table[lr][f"{metric}_low"]) == pytest.approx(low, rel=1e-12)
            assert float(table[lr][f"{metric}_high"]) == pytest.approx(high, rel=1e-12)
    md = paths[1].read_text()
    assert "optim.lr=0.001" in md and "(+1 unfinished)" in md and "95% CI" in md


def test_aggregate_command_refuses_a_directory_without_runs(tmp_path, capsys):
    assert aggregate_main([str(tmp_path)]) == 2
    assert "holds no job directory" in capsys.readouterr().err


def test_submitit_local_sweep_then_aggregate(tmp_path, capsys):
    """The Slurm launcher's code path on this machine (submitit's local executor): two seeds, one setting."""
    sweep = tmp_path / "sweep"
    out = _apg("apg.cli.train", "--multirun", "hydra/launcher=local", "seed=0,1", *TINY, f"hydra.sweep.dir={sweep}",
               cwd=tmp_path)
    assert out.returncode == 0, out.stderr[-3000:]
    assert (sweep / ".submitit").is_dir()  # the jobs really went through submitit
    metrics = [json.loads(p.read_text()) for p in sorted(sweep.glob("*/metrics.json"))]
    assert sorted(m["seed"] for m in metrics) == [0, 1]

    assert aggregate_main([str(sweep)]) == 0
    with open(sweep / "summary.csv") as f:
        (row,) = list(csv.DictReader(f))
    assert row["setting"] == "all runs" and row["n"] == "2"
    low, high = _scipy_interval([m["eval_cost"] for m in metrics])
    assert float(row["eval_cost_low"]) == pytest.approx(low, rel=1e-12)
    assert float(row["eval_cost_high"]) == pytest.approx(high, rel=1e-12)
    assert "| all runs | 2 |" in capsys.readouterr().out


def test_joblib_sweep_over_a_setting(tmp_path):
    """The many-core launcher: two settings of one seed each (so no interval: n = 1)."""
    sweep = tmp_path / "sweep"
    out = _apg("apg.cli.train", "--multirun", "hydra/launcher=many_cores", "hydra.launcher.n_jobs=2",
               "optim.lr=1e-3,3e-3", *TINY, f"hydra.sweep.dir={sweep}", cwd=tmp_path)
    assert out.returncode == 0, out.stderr[-3000:]
    rows = multirun_summary(find_runs(sweep))
    assert sorted(r["optim.lr"] for r in rows) == ["0.001", "0.003"]
    assert all(r["n"] == 1 and np.isnan(r["eval_cost_low"]) for r in rows)


def test_slurm_launcher_config_composes():
    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
        cfg = compose(config_name="train", overrides=["hydra/launcher=slurm", "hydra.launcher.partition=cpu"],
                      return_hydra_config=True)
    launcher = cfg.hydra.launcher
    assert launcher._target_.endswith("submitit_launcher.SlurmLauncher")
    assert launcher.partition == "cpu" and launcher.cpus_per_task == 1 and launcher.tasks_per_node == 1
