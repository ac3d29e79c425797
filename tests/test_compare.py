"""apg-compare: the study against closed forms, the race's bookkeeping against hand-worked curves, and the CLI end to end."""

from __future__ import annotations

import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
import torch
from hydra import compose, initialize_config_dir

import envs
from apg import OptimSettings, Policy, PolicySettings, TrainSettings
from apg.cli import config as compare_config
from apg.cli.compare import CONFIG_DIR
from apg.compare import (Entrant, RaceResult, RaceSettings, StudySettings, choose_target, evaluation_schedule,
                         gradient_study, race_summary)
from apg.reports.compare_report import FILES
from apg.estimators import EstimatorSettings

F64 = torch.float64
LINEAR = PolicySettings(kind="linear", bias=False, normalise="none", squash="none", output_gain=1.0)


# ---- the study on the linear-quadratic problem (closed form: see tests/test_estimators.py) ----------------------------
def _lq_gradient(k: np.ndarray, xs: np.ndarray, dt: float = 0.1) -> np.ndarray:
    """``2 (R K + B'P (A + BK)) S`` with ``S = mean x x'``: the one-step quadratic's gradient."""
    a, b = np.array([[1.0, dt], [0.0, 1.0]]), np.array([[dt ** 2 / 2], [dt]])
    q, r = np.diag([1.0, 0.1]) * dt, np.array([[0.1]]) * dt  # the running cost is (x'Qx + u'Ru) dt
    p = scipy.linalg.solve_discrete_are(a, b, q, r)
    return (2 * (r @ k + b.T @ p @ (a + b @ k)) @ (xs.T @ xs / xs.shape[0])).reshape(-1)


def test_study_on_the_quadratic_matches_closed_forms():
    system = envs.build("double_integrator", dt=0.1)
    policy = Policy(LINEAR, 2, system.action_low, system.action_high).to(F64)
    k = np.array([[-2.0, -0.5]])
    with torch.no_grad():
        policy.net[0].weight.copy_(torch.from_numpy(k))
    estimators = {"analytic": EstimatorSettings(), "es": EstimatorSettings(name="es", sigma=0.05),
                  "lr": EstimatorSettings(name="likelihood_ratio", action_noise=0.05)}
    settings = StudySettings(batch=16, horizons=(1,), samples=(2, 8), repeats=300, reference_samples=4, groups=4)
    rows = gradient_study(system, policy, estimators, settings, seed=0)
    by = {(r["estimator"], r["samples"]): r for r in rows}
    assert set(by) == {("analytic", 0), ("es", 2), ("es", 8), ("lr", 2), ("lr", 8)}

    xs = system.sample_initial(16, torch.Generator().manual_seed(0), F64).numpy()  # the study's minibatch
    exact = _lq_gradient(k, xs)
    assert by["analytic", 0]["exact_norm"] == pytest.approx(np.linalg.norm(exact), rel=1e-10)
    assert by["analytic", 0]["rel_error"] < 1e-12 and by["analytic", 0]["variance"] == 0.0
    # The initial-state variance is Cov(group gradient) / G over the 4 groups of 4 states, each in closed form.
    groups = np.stack([_lq_gradient(k, g) for g in np.split(xs, 4)])
    assert by["analytic", 0]["x0_variance"] == pytest.approx(groups.var(0, ddof=1).sum() / 4, rel=1e-9)
    # Smoothing a quadratic leaves its gradient in place: the ES reference is the exact gradient.
    assert by["es", 2]["reference_norm"] == pytest.approx(np.linalg.norm(exact), rel=1e-9)
    # Honest costs: 2 x pairs x 16 states x 1 step; samples x 16 x 1.
    assert by["es", 2]["sim_steps"] == 64 and by["es", 8]["sim_steps"] == 256 and by["lr", 8]["sim_steps"] == 128
    # Variance falls as 1/n: x4 from 2 to 8 pairs (300 repeats: the ratio's spread is ~20 %; band [2.5, 6.5]).
    assert 2.5 < by["es", 2]["variance"] / by["es", 8]["variance"] < 6.5
    assert by["es", 8]["rel_error"] < by["es", 2]["rel_error"]
    assert by["es", 8]["cosine_exact"] > 0.8


# ---- race bookkeeping on hand-made curves ------------------------------------------------------------------------------
def _entrant(label, name):
    return Entrant(label=label, update=EstimatorSettings(name=name, pairs=2), optim=OptimSettings(),
                   train=TrainSettings(batch_size=4, horizon=5))


def _result(curves, target_cost=None):
    settings = RaceSettings(seeds=(0, 1), budget_steps=1000, target_cost=target_cost)
    runs = []
    for (label, seed), pts in curves.items():
        runs.append({"system": "toy", "budget": "steps", "entrant": label, "seed": seed, "method": "gradient",
                     "status": "ok", "env_steps": pts[-1][0], "compute_seconds": pts[-1][1],
                     "final_cost": pts[-1][2], "final_success": 0.0, "initial_cost": pts[0][2]})
    rows = [{"system": "toy", "budget": "steps", "entrant": label, "seed": seed, "iteration": i, "env_steps": s,
             "compute_seconds": t, "wall_seconds": t, "heldout_cost": c, "success_rate": 0.0}
            for (label, seed), pts in curves.items() for i, (s, t, c) in enumerate(pts)]
    result = RaceResult(rows, runs, None, "", settings, (_entrant("analytic", "analytic"), _entrant("es", "es")))
    result.target, result.target_note = choose_target(runs, settings)
    return result


CURVES = {  # (steps, compute seconds, held-out cost) at each evaluation
    ("analytic", 0): [(0, 0.0, 10.0), (100, 1.0, 5.0), (200, 2.0, 1.5), (300, 3.0, 1.0)],
    ("analytic", 1): [(0, 0.0, 10.0), (100, 1.0, 1.8), (200, 2.0, 1.4), (300, 3.0, 1.2)],
    ("es", 0): [(0, 0.0, 10.0), (2000, 0.5, 3.0), (4000, 1.0, 1.9), (6000, 1.5, 1.7)],
    ("es", 1): [(0, 0.0, 10.0), (2000, 0.5, 4.0), (4000, 1.0, 3.0), (6000, 1.5, 2.5)],
}


def test_target_steps_and_ratios_by_hand():
    result = _result(CURVES)
    # 95 % of the way from the median initial cost (10) to analytic's worst final cost (1.2), on a log scale.
    assert result.target == pytest.approx(10 ** 0.05 * 1.2 ** 0.95)  # 1.334
    rows = {r["entrant"]: r for r in race_summary(result)}
    # analytic: both seeds first get below 1.334 at the last evaluation (300 steps, 3 s); es never does.
    assert rows["analytic"]["steps_to_target"] == 300 and rows["analytic"]["seconds_to_target"] == 3.0
    assert rows["es"]["reached"] == 0 and math.isinf(rows["es"]["steps_to_target"])
    # Target 1.9: analytic at 200 and 100 steps (median 150); es seed 0 at 4000 steps, seed 1 never, so the
    # median of {4000, inf} is a miss and there is no ratio.
    mid = {r["entrant"]: r for r in race_summary(_result(CURVES, target_cost=1.9))}
    assert mid["analytic"]["steps_to_target"] == 150 and mid["es"]["reached"] == 1
    assert math.isinf(mid["es"]["steps_to_target"]) and math.isnan(mid["es"]["steps_ratio"])
    # Target 3.0, reached on every seed: analytic at 200 and 100 steps (2 s, 1 s), es at 2000 and 4000 steps
    # (0.5 s, 1 s); the ratios are those of the medians: 3000 / 150 steps and 0.75 / 1.5 s.
    easy = {r["entrant"]: r for r in race_summary(_result(CURVES, target_cost=3.0))}
    assert easy["analytic"]["steps_to_target"] == 150 and easy["es"]["steps_to_target"] == 3000
    assert easy["es"]["steps_ratio"] == pytest.approx(20.0)
    assert easy["es"]["seconds_ratio"] == pytest.approx(0.5)
    assert easy["es"]["final_cost_median"] == pytest.approx(2.1)


def test_evaluation_schedule_is_geometric_and_ends_at_the_last_iteration():
    points = sorted(evaluation_schedule(1000, 10))
    assert points[0] == 1 and points[-1] == 1000 and len(points) <= 11
    gaps = np.diff(np.log(points))
    assert np.allclose(gaps[3:], np.log(1000) / 9, atol=0.1)  # equal ratios once ceil's rounding is small
    assert evaluation_schedule(5, 10) == {1, 2, 3, 4, 5}


def test_no_target_when_no_entrant_improves():
    flat = {k: [(s, t, 10.0 + 0.0 * c) for s, t, c in v] for k, v in CURVES.items()}
    result = _result(flat)
    assert result.target is None and "not below" in result.target_note
    assert all(math.isinf(r["steps_to_target"]) for r in race_summary(result))


def test_target_falls_back_to_the_best_entrant_when_the_reference_does_not_improve():
    stuck = {k: ([(s, t, 10.0) for s, t, _ in v] if k[0] == "analytic" else v) for k, v in CURVES.items()}
    result = _result(stuck)
    # es's worst final cost is 2.5: 95 % of the way from 10 on a log scale.
    assert result.target == pytest.approx(10 ** 0.05 * 2.5 ** 0.95)
    assert "es's worst final cost" in result.target_note and "analytic's worst final cost (10)" in result.target_note
    rows = {r["entrant"]: r for r in race_summary(result)}
    assert rows["es"]["reached"] == 2 and math.isnan(rows["es"]["steps_ratio"])  # no ratio to a reference that missed


# ---- configuration and the command line --------------------------------------------------------------------------------
def _compose(*overrides):
    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
        return compose(config_name="compare", overrides=list(overrides))


def test_default_config_builds_every_entrant():
    spec = compare_config.build_compare(_compose())
    methods = {e.label: (e.method, e.estimator.name if e.estimator else None) for e in spec.entrants}
    assert methods == {"analytic": ("gradient", "analytic"), "es": ("gradient", "es"),
                       "likelihood_ratio": ("gradient", "likelihood_ratio"), "alpha_order": ("gradient", "alpha_order"),
                       "ppo": ("ppo", None)}
    es = next(e for e in spec.entrants if e.label == "es")
    assert es.estimator.rank_shaping and es.train.batch_size == 16 and es.optim.lr == 0.02  # entrant overrides
    assert es.train.horizon == spec.config["train"]["horizon"]  # ... merged over the shared train block
    assert set(spec.study_estimators) == {"analytic", "es", "likelihood_ratio", "alpha_order"}


@pytest.mark.parametrize("name", sorted(p.stem for p in (Path(CONFIG_DIR) / "compare").glob("*.yaml")))
def test_every_shipped_race_builds(name):
    """Each race preset in configs/compare composes into valid records and every entrant it races exists."""
    spec = compare_config.build_compare(_compose(f"+compare={name}"))
    labels = {e.label for e in spec.entrants}
    assert set(spec.race.only) <= labels and spec.race.reference in labels
    for e in spec.entrants:
        assert e.steps_per_iteration > 0 and e.description


def test_long_horizon_presets_switch_their_mitigations_on():
    spec = compare_config.build_compare(_compose("+compare=long_pogo"))
    by = {e.label: e for e in spec.entrants}
    assert by["truncated"].estimator.window == 100 and by["truncated"].estimator.name == "analytic"
    assert by["terminal_value"].estimator.name == "terminal_value"
    assert by["horizon_schedule"].train.horizon_start == 150
    assert by["continuation"].train.continuation_param == "contact_smoothing"
    # The schedule's mean horizon sets its step count: (1 - 0.6) * 600 + 0.6 * (150 + 600) / 2 = 465 steps.
    assert by["horizon_schedule"].steps_per_iteration == 64 * 465
    assert "horizon 150 to 600" in by["horizon_schedule"].description


@pytest.mark.parametrize("override, named", [
    ("race.reference=nobody", "not entrants"),
    ("+race.entrants.es.estimator.pairz=3", "race.entrants.es.estimator"),  # past Hydra, the record refuses it
    ("race.entrants.es.optim.lr=-1", "race.entrants.es.optim"),
    ("study.samples=[]", "study.samples"),
    ("race.target_fraction=2", "race.target_fraction"),
])
def test_bad_compare_config_names_the_key(override, named):
    with pytest.raises(ValueError, match=named):
        compare_config.build_compare(_compose(override))


TINY = ["progress=false", "train.horizon=8", "train.eval_batch=16", "study.batch=8", "study.groups=2",
        "study.horizons=[4,8]", "study.samples=[2,4]", "study.repeats=2", "study.reference_samples=2",
        "race.seeds=[0]", "race.budget_steps=2000", "race.budget_seconds=0.3", "race.evaluations=3",
        "race.only=[analytic,es,ppo]", "race.entrants.es.estimator.pairs=2", "race.entrants.ppo.ppo.epochs=1"]


def test_compare_writes_the_documented_run_directory(tmp_path, caplog):
    # the one subprocess of apg-compare: exit status, the log on stdout, the files
    run = tmp_path / "cmp"
    env = {**os.environ, "HYDRA_FULL_ERROR": "0", "OMP_NUM_THREADS": "1"}
    cmd = [sys.executable, "-m", "apg.cli.compare", *TINY, f"hydra.run.dir={run}"]
    out = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    for key, name in FILES.items():
        assert (run / name).exists(), key
    assert "equal-steps race" in out.stdout and "equal-seconds race" in out.stdout and "steps to target" in out.stdout
    report = (run / FILES["report"]).read_text()
    assert "Target cost" in report and "parameter-smoothed objective" in report
    for entrant in ("analytic", "es", "ppo"):
        assert (run / "race" / "steps" / entrant / "seed0" / "metrics.json").exists()
        assert (run / "race" / "seconds" / entrant / "seed0" / "metrics.json").exists()
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    events = EventAccumulator(str(run / FILES["tensorboard"]))
    events.Reload()
    assert "race/steps/es/seed0/heldout_cost_vs_env_steps" in events.Tags()["scalars"]
    assert "study/H8/es/rel_error" in events.Tags()["scalars"]
    # a second run into the same directory, in this process: the entry's own function (what @hydra.main wraps)
    # on the config composed with Hydra's runtime state pointing at the finished run
    from hydra.core.hydra_config import HydraConfig
    from omegaconf import open_dict

    from apg.cli import compare as compare_cli

    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
        cfg = compose(config_name="compare", overrides=TINY, return_hydra_config=True)
    with open_dict(cfg):
        cfg.hydra.runtime.output_dir = str(run)
    HydraConfig.instance().set_config(cfg)
    with open_dict(cfg):
        del cfg["hydra"]
    try:
        with pytest.raises(SystemExit) as info:
            compare_cli.main.__wrapped__(cfg)
    finally:
        HydraConfig.instance().cfg = None  # later tests start as Hydra would
    assert info.value.code == 2 and "already holds" in caplog.text
