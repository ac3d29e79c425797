"""apg-eval against references outside it: the trainer's own evaluator, the exact zero-order-hold model of the
double integrator, Wilson's interval as scipy computes it, and trajectories built by hand."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
import torch
from PIL import Image

import envs
from apg.ensemble import ParameterRanges
from apg import Analytic, OptimSettings, PolicySettings, TrainSettings, evaluate, make_policy, train
from apg.evaluation import (ClosedLoop, Disturbance, SweepSettings, _wilson, disturbed_closed_loop, evaluation_metrics,
                            param_grid, saturation, sweep, sweep_plan, time_to_success, violations)
from apg.export import ExportSettings, export
from apg.report import EvalSettings, run_report
from apg.reports.animation import animate
from apg.cli.eval import CONFIG_DIR
from apg.cli.config import build_eval
from hydra import compose, initialize_config_dir
from apg.rollout import Trajectory

SMALL_SWEEP = SweepSettings(points=5, actuator_gain=(0.7, 1.3), obs_noise=(0.0, 0.1), delays=(0, 1, 2),
                            pushes=(0.0, 1.0))


def _policy(system_name: str, dtype=torch.float32):
    torch.manual_seed(0)
    system = envs.build(system_name)
    return system, make_policy(PolicySettings(hidden=(16,)), system, torch.Generator().manual_seed(1), dtype=dtype)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("name", ["pendulum", "quadrotor", "crane"])
def test_undisturbed_simulation_is_the_trainers_evaluation(name, dtype):
    """Reference: apg.rollout.evaluate, the trainer's held-out evaluator (bit for bit: the same operations)."""
    system, policy = _policy(name, dtype)
    x0 = system.sample_initial(64, torch.Generator().manual_seed(2), dtype)
    ref = evaluate(system, policy, x0, 50)
    run = disturbed_closed_loop(system, policy, x0, 50)
    assert torch.equal(run.trajectory.states, ref.trajectory.states)
    assert torch.equal(run.trajectory.total_cost, ref.costs)
    assert torch.equal(run.success, ref.success)


def test_sweep_at_the_nominal_point_reproduces_the_plain_evaluation():
    """Every axis's nominal point is the undisturbed plant, so it must give the plain evaluation exactly."""
    system, policy = _policy("crane", torch.float64)
    x0 = system.sample_initial(48, torch.Generator().manual_seed(3), torch.float64)
    plain = disturbed_closed_loop(system, policy, x0, 80)
    curves = sweep(system, policy, x0, 80, SMALL_SWEEP, seed=7)
    axes = {c.axis for c in curves}
    assert {"param:load_mass", "param:rope_length", "actuator_gain", "obs_noise", "delay", "push"} <= axes
    for c in curves:
        assert c.success[c.nominal_index] == float(plain.success.double().mean()), c.axis
        assert c.mean_cost[c.nominal_index] == float(plain.trajectory.total_cost.double().mean()), c.axis
        assert len(set(c.mean_cost)) > 1, f"{c.axis}: the disturbance changed nothing"


def _zoh(dt: float, m: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact zero-order-hold discretisation of m xdd = u (Franklin, Powell, Workman, Digital Control, ch. 4)."""
    return np.array([[1.0, dt], [0.0, 1.0]]), np.array([dt * dt / (2 * m), dt / m])


@pytest.mark.parametrize("delay, gain", [(0, 1.0), (1, 1.0), (2, 1.0), (1, 0.6), (0, 1.4)])
def test_delay_and_actuator_gain_match_the_exact_linear_recursion(delay, gain):
    """Reference: x_{k+1} = A x_k + B g u_{k-d} with u = -K x, computed in numpy (RK4 is exact for this model)."""
    system = envs.build("double_integrator", params={"mass": 2.0})
    k_gain = np.array([1.5, 2.0])
    policy = lambda obs: -(obs @ torch.tensor(k_gain, dtype=obs.dtype)).unsqueeze(-1)
    x0 = system.sample_initial(5, torch.Generator().manual_seed(4), torch.float64)
    run = disturbed_closed_loop(system, policy, x0, 40, Disturbance(delay=delay, actuator_gain=gain))
    a, b = _zoh(system.dt, 2.0)
    x = x0.numpy().copy()
    queue = [-(x @ k_gain)] * delay
    for k in range(40):
        queue.append(-(x @ k_gain))
        u = gain * queue.pop(0)
        x = x @ a.T + np.outer(u, b)
        np.testing.assert_allclose(run.trajectory.states[k + 1].numpy(), x, rtol=1e-10, atol=1e-12)


def test_push_is_an_exact_velocity_step_at_the_stated_time():
    """With no force, a push changes each velocity by exactly level * reference scale, once, at push_time."""
    system = envs.build("double_integrator")
    zero = lambda obs: torch.zeros(obs.shape[0], 1, dtype=obs.dtype)
    x0 = torch.zeros(6, 2, dtype=torch.float64)
    run = disturbed_closed_loop(system, zero, x0, 40, Disturbance(push=2.0, push_time=0.25), seed=1)
    v = run.trajectory.states[:, :, 1]  # (T+1, B)
    half_width = (system.task.init_high[1] - system.task.init_low[1]) / 2
    k = 10  # round(0.25 * 40)
    assert torch.equal(v[: k + 1], torch.zeros_like(v[: k + 1]))
    torch.testing.assert_close(v[k + 1:].abs(), torch.full_like(v[k + 1:], 2.0 * half_width), rtol=0, atol=1e-15)


def test_observation_noise_has_the_stated_standard_deviation():
    """The policy sees x + level * scale * N(0, 1); the sample std over 20,000 draws is within 3 % (chi-square)."""
    system = envs.build("double_integrator")
    seen = []

    def recorder(obs):
        seen.append(obs.clone())
        return torch.zeros(obs.shape[0], 1, dtype=obs.dtype)

    x0 = torch.zeros(500, 2, dtype=torch.float64)
    disturbed_closed_loop(system, recorder, x0, 40, Disturbance(obs_noise=0.1))
    noise = torch.cat(seen)  # true state stays 0
    want = 0.1 * torch.tensor([2.0, 1.0], dtype=torch.float64)  # half-widths of the default initial box
    torch.testing.assert_close(noise.std(0), want, rtol=0.03, atol=0)


def test_wilson_interval_matches_scipy():
    """Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson")."""
    for k, n in [(0, 20), (7, 20), (511, 512), (512, 512)]:
        ci = scipy.stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
        np.testing.assert_allclose(_wilson(k, n), (ci.low, ci.high), atol=2e-4)  # z = 1.96 vs the exact quantile


def test_metrics_on_a_trajectory_built_by_hand():
    """A pendulum that arrives upright at step 10 and stays: success is completed once it has been upright for
    hold_time (hold steps of dt, from the defaults), at t = (10 + hold - 1) * dt; a second never arrives.
    Saturation and limit counts follow from the built actions and states."""
    system = envs.build("pendulum")
    hold = round(system.task.hold_time / system.dt)  # 25 steps of 0.04 s with the defaults
    T = 10 + hold + 30
    states = torch.zeros(T + 1, 2, 2, dtype=torch.float64)
    states[:10, 0, 0] = 1.0  # away from upright until step 10
    states[:, 1, 0] = math.pi  # hanging for ever
    states[5, 1, 1] = 9.0  # one moment over the 8 rad/s limit passed below
    actions = torch.zeros(T, 2, 1, dtype=torch.float64)
    actions[:15, 0, 0] = system.params.torque_limit  # at the limit for 15 of the 2 T steps
    traj = Trajectory(states, actions, torch.zeros(T, 2, dtype=torch.float64), torch.zeros(2, dtype=torch.float64))
    run = ClosedLoop(system, traj, actions, system.success(states, actions))
    tts = time_to_success(run)
    assert tts[0].item() == pytest.approx((10 + hold - 1) * system.dt) and math.isnan(tts[1].item())
    assert saturation(run).item() == pytest.approx(15 / (2 * T))
    assert violations(run, {"angular_velocity": (-8.0, 8.0)}) == {"angular_velocity": 0.5, "any": 0.5}
    s = evaluation_metrics(run, {"angular_velocity": (-8.0, 8.0)})
    assert s["success_rate"] == 0.5 and s["time_to_success_s"]["reached"] == 1


def test_param_grid_holds_the_nominal_value_and_the_ends():
    grid = param_grid(10_000.0, 2_000.0, 30_000.0, 9)
    assert grid[0] == 2_000.0 and grid[-1] == 30_000.0 and 10_000.0 in grid and list(grid) == sorted(grid)
    assert param_grid(1.0, 1.0, 1.0, 9) == (1.0,)
    with pytest.raises(ValueError, match="low <= high"):
        param_grid(1.0, 2.0, 0.5, 5)


def test_unknown_parameter_in_the_sweep_is_named():
    system, policy = _policy("crane", torch.float64)
    x0 = system.sample_initial(4, torch.Generator().manual_seed(0), torch.float64)
    with pytest.raises(ValueError, match="robustness.params.mass: crane has no parameter"):
        sweep(system, policy, x0, 5, SweepSettings(params=(("mass", 1.0, 2.0),)))


# ---- the report end to end --------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def quad_run(tmp_path_factory):
    run = tmp_path_factory.mktemp("quad")
    system = envs.build("quadrotor")
    train(system, PolicySettings(hidden=(16,)), OptimSettings(), Analytic(),
          TrainSettings(iterations=3, batch_size=16, horizon=30, eval_batch=16, figure_every=0), seed=0,
          run_dir=run, ensemble=ParameterRanges.from_mapping({"mass": [0.7, 0.9]}), experiment="tiny_quad")
    return run


def test_report_of_a_run_and_its_export(quad_run, tmp_path):
    """The .onnx evaluates like the run it came from (float32 policy arithmetic on both sides), and the report
    holds every promised part."""
    onnx_path = export(quad_run, tmp_path / "quad.onnx", ExportSettings(observations=512, rollouts=8)).onnx_path
    sweep_settings = SweepSettings(params=(("mass", 0.6, 1.0),), points=3, actuator_gain=(0.8,), obs_noise=(0.05,),
                                   delays=(1,), pushes=(1.0,))
    settings = EvalSettings(episodes=48, robustness=sweep_settings, max_frames=6)
    a = run_report([quad_run, onnx_path], tmp_path / "rep", settings)
    b = run_report([onnx_path], tmp_path / "rep_onnx", EvalSettings(episodes=48, sweep=False, max_frames=4))
    assert a["horizon"] == b["horizon"] == 30
    assert b["evaluation"]["success_rate"] == a["evaluation"]["success_rate"]
    assert b["evaluation"]["cost"]["mean"] == pytest.approx(a["evaluation"]["cost"]["mean"], rel=1e-5)
    # the .onnx compared in the same report gives the run's curves
    run_curves, onnx_curves = a["robustness"]["tiny_quad"], a["robustness"]["quad"]
    for c_run, c_onnx in zip(run_curves, onnx_curves):
        np.testing.assert_allclose(c_run["mean_cost"], c_onnx["mean_cost"], rtol=1e-4)

    out = tmp_path / "rep"
    for name in ("report.md", "evaluation.json", "trajectories.png", "phase.png", "distributions.png",
                 "robustness.png", "animation.gif"):
        assert (out / name).stat().st_size > 0, name
    assert Image.open(out / "animation.gif").n_frames == 6
    text = (out / "report.md").read_text()
    for part in ("success rate", "time to success", "saturation of left_thrust", "episodes with z outside",
                 "## Robustness", "mass [kg]", "actuation delay [steps]", "emergency stop"):
        assert part in text, part
    numbers = json.loads((out / "evaluation.json").read_text())
    assert numbers["ensemble"] == {"mass": [0.7, 0.9]}
    assert numbers["evaluation"]["episodes"] == 48


def test_unreadable_sources_give_clear_errors(quad_run, tmp_path):
    from apg.checkpoint import CheckpointError
    from apg.export import PolicyFileError

    (tmp_path / "run").mkdir()
    (tmp_path / "run" / "checkpoint.pt").write_bytes((quad_run / "checkpoint.pt").read_bytes()[:300])
    with pytest.raises(CheckpointError, match="not a readable checkpoint"):
        run_report([tmp_path / "run"], tmp_path / "out")
    (tmp_path / "x.onnx").write_text("not onnx")
    with pytest.raises(PolicyFileError, match="not a readable ONNX file"):
        run_report([quad_run, tmp_path / "x.onnx"], tmp_path / "out")
    with pytest.raises(ValueError, match="cannot compare"):
        run_report([quad_run, _cartpole_run(tmp_path)], tmp_path / "out", EvalSettings(episodes=4, sweep=False))


def _cartpole_run(tmp_path: Path) -> Path:
    run = tmp_path / "cartpole"
    train(envs.build("cartpole"), PolicySettings(hidden=(8,)), OptimSettings(), Analytic(),
          TrainSettings(iterations=1, batch_size=4, horizon=5, eval_batch=4, figure_every=0), seed=0, run_dir=run)
    return run


def test_cli_eval_runs_and_names_bad_keys(quad_run, tmp_path):
    env = {**os.environ, "HYDRA_FULL_ERROR": "0"}
    base = [sys.executable, "-m", "apg.cli.eval", f"source={quad_run}", f"output={tmp_path / 'r'}",
            "eval.episodes=16", "eval.animation=false", "progress=false"]
    ok = subprocess.run([*base, "+eval.robustness.params.mass=[0.5,1.0]", "eval.robustness.points=3",
                         "eval.robustness.obs_noise=[0.05]", "eval.robustness.pushes=[]", "eval.robustness.delays=[1]",
                         "eval.robustness.actuator_gain=[]"], cwd=tmp_path, env=env, capture_output=True, text=True,
                        timeout=120)
    assert ok.returncode == 0, ok.stderr
    assert (tmp_path / "r" / "report.md").exists() and not (tmp_path / "outputs").exists()
    numbers = json.loads((tmp_path / "r" / "evaluation.json").read_text())
    assert [c["values"] for c in numbers["robustness"]["tiny_quad"]][0] == [0.5, 0.8, 1.0]
    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
        with pytest.raises(Exception, match="eval.episode"):  # Hydra's own check names the unknown key
            compose(config_name="eval", overrides=[f"source={quad_run}", "eval.episode=5"])
        for override, named in [("+eval.robustness.params.mass=[1.0]", "eval.robustness.params.mass must be"),
                                ("+eval.robustness.params.wings=[1,2]", "robustness.params.wings"),
                                ("+eval.limits.altitude=[0,5]", "limits.altitude"),
                                ("eval.robustness.delays=[-1]", "robustness.delays")]:
            cfg = compose(config_name="eval", overrides=[f"source={quad_run}", f"output={tmp_path / 'e'}",
                                                         "eval.episodes=4", "eval.animation=false", override])
            with pytest.raises(ValueError, match=named):
                spec = build_eval(cfg)
                run_report(spec["sources"], spec["output"], spec["settings"])


@pytest.mark.parametrize("name", envs.available())
def test_every_system_animates(name, tmp_path):
    """Every registered system draws itself: a GIF of the stated frame count is written, and bad shapes are named."""
    system, policy = _policy(name, torch.float64)
    x0 = system.sample_initial(1, torch.Generator().manual_seed(0), torch.float64)
    run = disturbed_closed_loop(system, policy, x0, 6)
    path = animate(system, run.trajectory.states[:, 0].numpy(), run.trajectory.actions[:, 0].numpy(),
                   tmp_path / "a.gif", max_frames=3)
    assert path.stat().st_size > 0
    assert Image.open(path).n_frames == 3
    with pytest.raises(ValueError, match="animate needs states"):
        animate(system, run.trajectory.states[:, 0, :1].numpy(), run.trajectory.actions[:, 0].numpy(), path)


@pytest.mark.parametrize("name", envs.available())
def test_default_sweep_varies_the_systems_own_parameters(name):
    """With no ranges given, the sweep's parameter axes are the system's robustness_params, each over
    default_span times its nominal value, with the nominal value on the grid."""
    system = envs.build(name)
    plan = sweep_plan(system, SweepSettings(points=5, default_span=(0.5, 2.0)))
    axes = [(axis, points, k) for axis, _, points, k in plan if axis.startswith("param:")]
    assert [axis for axis, _, _ in axes] == [f"param:{p}" for p in system.robustness_params]
    for axis, points, k in axes:
        nominal = float(getattr(system.params, axis[len("param:"):]))
        values = [v for v, _ in points]
        assert values[0] == pytest.approx(0.5 * nominal) and values[-1] == pytest.approx(2.0 * nominal), axis
        assert values[k] == nominal and points[k][1].nominal, axis
