"""The training loop against known answers: the LQR gain, finite differences, and exact resumption."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.linalg
import torch

import envs
from apg import (Analytic, OptimSettings, Policy, PolicySettings, TrainSettings, load_run, make_policy, rollout, train)
from apg.checkpoint import CheckpointError, load_checkpoint
from apg.optim import learning_rate
from apg.policies import Normaliser
from apg.train import Monitor, NonFiniteError, RunExistsError
from apg.updates import GradientUpdate

LINEAR = PolicySettings(kind="linear", bias=False, normalise="none", squash="none", output_gain=1.0)
QUIET = dict(figure_every=0, eval_batch=64)


def test_linear_policy_converges_to_discrete_lqr_gain(tmp_path):
    """Policy gradient on the LQ problem converges to the Riccati gain (Fazel, Ge, Kakade, Mesbahi, ICML 2018).

    The terminal cost x'Px with P from the DARE makes the finite-horizon optimum the stationary LQR policy
    for every initial state, so the minibatch gradient vanishes exactly at K* and the fit can be tight.
    """
    system = envs.build("double_integrator", dt=0.1)
    a = np.array([[1.0, 0.1], [0.0, 1.0]])
    b = np.array([[0.1 ** 2 / 2], [0.1]])  # zero-order hold of xdd = u/m with m = 1 kg
    # The running cost is (x'Qx + u'Ru) dt: the discrete problem's weights are Q dt and R dt.
    q, r = np.diag([1.0, 0.1]) * 0.1, np.array([[0.1]]) * 0.1
    p = scipy.linalg.solve_discrete_are(a, b, q, r)
    k_star = np.linalg.solve(r + b.T @ p @ b, b.T @ p @ a)  # u = -K x
    result = train(system, LINEAR, OptimSettings(lr=0.05, schedule="cosine", final_lr_fraction=0.01),
                   # grad_clip 0.1: the cost is (x'Qx + u'Ru) dt, so its gradient is dt times that of the undivided
                   # weights; a threshold scaled the same way leaves Adam's path as it was (Adam is scale-free).
                   # horizon 10, batch 16: with the DARE terminal cost K* is optimal for every horizon and every
                   # initial state, so neither size moves the fixed point (measured 6e-5 at horizon 40, batch 64).
                   Analytic(), TrainSettings(iterations=300, batch_size=16, horizon=10, grad_clip=0.1, dtype="float64",
                                             **QUIET),
                   seed=0, run_dir=tmp_path)
    k_learned = -result.policy.net[0].weight.detach().numpy()
    # 0.5 % relative; measured 1e-5 (Adam's last steps at lr 5e-4 leave only minibatch-free residual).
    np.testing.assert_allclose(k_learned, k_star, rtol=5e-3)


def test_bptt_gradient_matches_central_differences():
    """The analytic estimator's gradient equals central finite differences of the same objective (float64)."""
    torch.manual_seed(0)
    system = envs.build("cartpole")
    policy = make_policy(PolicySettings(hidden=(8,)), system, dtype=torch.float64)
    x0 = system.sample_initial(16, torch.Generator().manual_seed(1), torch.float64)
    est = Analytic().estimate(system, policy, x0, 30, torch.Generator())
    flat_grad = torch.cat([g.reshape(-1) for g in est.grads])
    params = torch.nn.utils.parameters_to_vector(policy.parameters()).detach()
    idx = torch.randperm(params.numel(), generator=torch.Generator().manual_seed(2))[:12]
    eps = 1e-6
    for i in idx:
        vals = []
        for sign in (1, -1):
            p = params.clone()
            p[i] += sign * eps
            torch.nn.utils.vector_to_parameters(p, policy.parameters())
            with torch.no_grad():
                vals.append(rollout(system, policy, x0, 30).total_cost.mean())
        fd = (vals[0] - vals[1]) / (2 * eps)
        # Central differences carry O(eps^2) truncation and O(1e-16 / eps) rounding: ~1e-9 absolute here.
        torch.testing.assert_close(flat_grad[i], fd, rtol=1e-5, atol=1e-8)
    torch.nn.utils.vector_to_parameters(params, policy.parameters())


def _settings(**kw):
    base = dict(iterations=8, batch_size=16, horizon=20, eval_every=4, checkpoint_every=4, **QUIET)
    base.update(kw)
    return TrainSettings(**base)


def _train(run_dir, settings, resume=False, monitors=(), seed=3, policy=PolicySettings(hidden=(16,),
                                                                                    normalise="running")):
    return train(envs.build("pendulum"), policy, OptimSettings(lr=1e-2), Analytic(), settings, seed=seed,
                 run_dir=run_dir, resume=resume, monitors=monitors)


def _params(policy):
    return {k: v.clone() for k, v in policy.state_dict().items()}


class _Crash(Monitor):
    """Raise ``error`` when iteration ``at`` completes, as a crash or Ctrl-C would."""

    def __init__(self, at, error=RuntimeError):
        self.at, self.error = at, error

    def iteration(self, it, stats):
        if it == self.at:
            raise self.error("simulated")


def test_resume_after_a_crash_continues_exactly_as_if_never_stopped(tmp_path):
    straight = _train(tmp_path / "a", _settings(iterations=8))
    with pytest.raises(RuntimeError, match="simulated"):
        _train(tmp_path / "b", _settings(iterations=8), monitors=[_Crash(6)])
    assert load_checkpoint(tmp_path / "b")["iteration"] == 4  # the last checkpoint before the crash
    resumed = _train(tmp_path / "b", _settings(iterations=8), resume=True)
    for k, v in _params(straight.policy).items():
        assert torch.equal(v, resumed.policy.state_dict()[k]), k  # bitwise: same seed, same result on CPU
    assert straight.metrics["env_steps"] == resumed.metrics["env_steps"] == 8 * 16 * 20


def test_interrupt_saves_a_checkpoint_that_resumes_exactly(tmp_path):
    straight = _train(tmp_path / "a", _settings(iterations=8))
    with pytest.raises(KeyboardInterrupt):
        _train(tmp_path / "b", _settings(iterations=8, checkpoint_every=100), monitors=[_Crash(3, KeyboardInterrupt)])
    assert load_checkpoint(tmp_path / "b")["iteration"] == 3
    resumed = _train(tmp_path / "b", _settings(iterations=8, checkpoint_every=100), resume=True)
    for k, v in _params(straight.policy).items():
        assert torch.equal(v, resumed.policy.state_dict()[k]), k


class _InterruptedEstimate(Analytic):
    """Ctrl-C inside the 4th estimate: after the minibatch was drawn, before any parameter changed."""

    calls = 0

    def estimate(self, *args):
        type(self).calls += 1
        if type(self).calls == 4:
            raise KeyboardInterrupt
        return super().estimate(*args)


class _InterruptedAfterStep(GradientUpdate):
    """Ctrl-C in the 4th update, after the optimiser stepped but before the loop counted the iteration."""

    calls = 0

    def step(self, *args):
        result = super().step(*args)
        type(self).calls += 1
        if type(self).calls == 4:
            raise KeyboardInterrupt
        return result


@pytest.mark.parametrize("method", [_InterruptedEstimate(), _InterruptedAfterStep(Analytic())])
def test_an_interrupt_inside_an_iteration_saves_the_last_completed_one(tmp_path, method):
    """The saved state is the one after iteration 3 whatever the moment of the interrupt in iteration 4, so the
    resumed run is bit-identical to one never stopped (a state saved mid-iteration would differ)."""
    straight = _train(tmp_path / "a", _settings(iterations=8))
    with pytest.raises(KeyboardInterrupt):
        train(envs.build("pendulum"), PolicySettings(hidden=(16,), normalise="running"), OptimSettings(lr=1e-2),
              method, _settings(iterations=8, checkpoint_every=100), seed=3, run_dir=tmp_path / "b")
    assert load_checkpoint(tmp_path / "b")["iteration"] == 3
    resumed = _train(tmp_path / "b", _settings(iterations=8, checkpoint_every=100), resume=True)
    for k, v in _params(straight.policy).items():
        assert torch.equal(v, resumed.policy.state_dict()[k]), k
    assert resumed.metrics["env_steps"] == straight.metrics["env_steps"]


def test_existing_run_directory_is_refused_and_left_untouched(tmp_path):
    _train(tmp_path, _settings())
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir() if p.is_file()}
    with pytest.raises(RunExistsError, match="resume=true"):
        _train(tmp_path, _settings())
    after = {p.name: p.read_bytes() for p in tmp_path.iterdir() if p.is_file()}
    assert before == after


def test_resume_with_different_settings_names_the_fields(tmp_path):
    _train(tmp_path, _settings())
    with pytest.raises(RunExistsError, match=r"seed \(3 -> 4\)"):
        _train(tmp_path, _settings(), resume=True, seed=4)
    with pytest.raises(RunExistsError, match=r"train.horizon \(20 -> 25\), train.batch_size|train.batch_size.*train.horizon"):
        _train(tmp_path, _settings(horizon=25, batch_size=8), resume=True)


def test_resume_refuses_another_plant(tmp_path):
    """The record holds the plant's own parameter values: a resume on a different plant names the parameter."""
    settings = _settings(iterations=4)
    policy = PolicySettings(hidden=(16,))
    train(envs.build("pendulum", params={"mass": 0.7}), policy, OptimSettings(), Analytic(), settings, seed=0,
          run_dir=tmp_path)
    nominal = envs.build("pendulum").params.mass
    with pytest.raises(RunExistsError, match=rf"system.params.mass \(0.7 -> {nominal}\)"):
        train(envs.build("pendulum"), policy, OptimSettings(), Analytic(), settings, seed=0, run_dir=tmp_path,
              resume=True)


def test_non_finite_rollout_stops_with_iteration_and_keeps_last_checkpoint(tmp_path):
    # An actuator that saturates keeps the sled finite; a limit of 1e30 N lets a diverging linear policy overflow.
    system = envs.build("double_integrator", params={"force_limit": 1e30})
    with pytest.raises(NonFiniteError, match=r"iteration \d+.*optim.lr.*system.dt") as err:
        train(system, LINEAR, OptimSettings(name="sgd", lr=1e4, schedule="constant"), Analytic(),
              TrainSettings(iterations=50, batch_size=8, horizon=50, grad_clip=0.0, checkpoint_every=1, **QUIET),
              seed=0, run_dir=tmp_path)
    saved = load_checkpoint(tmp_path)
    assert saved["iteration"] >= 1 and f"checkpoint.pt" in str(err.value)
    assert all(torch.isfinite(v).all() for v in saved["policy"].values())
    assert not (tmp_path / "metrics.json").exists()


def test_simulator_step_budget_stops_training(tmp_path):
    # 16 x 20 = 320 steps an iteration: a budget of 1000 steps ends after the 4th iteration (1280 >= 1000).
    result = _train(tmp_path, _settings(iterations=100, max_env_steps=1000))
    assert result.metrics["iterations"] == 4 and result.metrics["env_steps"] == 1280
    assert load_checkpoint(tmp_path)["iteration"] == 4


def test_metrics_file_has_the_documented_keys(tmp_path):
    result = _train(tmp_path, _settings())
    metrics = json.loads((tmp_path / "metrics.json").read_text())
    for key in ("eval_cost", "success_rate", "env_steps", "wall_time_s", "iterations", "seed", "system"):
        assert key in metrics
    assert metrics["system"] == "pendulum" and metrics["iterations"] == 8 and metrics["seed"] == 3
    assert metrics == result.metrics


def test_load_run_rebuilds_the_trained_policy(tmp_path):
    result = _train(tmp_path, _settings())
    run = load_run(tmp_path)
    obs = torch.randn(5, 3)
    torch.testing.assert_close(run.policy(obs), result.policy(obs), rtol=0, atol=0)
    assert run.record == result.record and run.iteration == 8


def test_corrupt_checkpoint_is_a_clear_error(tmp_path):
    (tmp_path / "checkpoint.pt").write_bytes(b"not a checkpoint")
    with pytest.raises(CheckpointError, match="not a readable checkpoint"):
        load_checkpoint(tmp_path)


def test_running_normaliser_matches_pooled_statistics():
    """Merged batch statistics equal the pooled mean and variance (Chan, Golub, LeVeque 1979)."""
    data = torch.randn(1000, 3, generator=torch.Generator().manual_seed(0), dtype=torch.float64) * 3 + 1
    norm = Normaliser(3, "running", 1e-6).double()
    for chunk in data.split([100, 1, 399, 500]):
        norm.update(chunk)
    torch.testing.assert_close(norm.mean, data.mean(0), rtol=1e-12, atol=1e-12)
    torch.testing.assert_close(norm.var, data.var(0, unbiased=False), rtol=1e-12, atol=1e-12)


def test_squashed_actions_respect_the_system_limits():
    system = envs.build("quadrotor")
    policy = make_policy(PolicySettings(output_gain=50.0), system)
    u = policy(system.observe(system.sample_initial(256, torch.Generator().manual_seed(0)) * 10))
    assert (u >= 0).all() and (u <= system.params.thrust_limit).all()


@pytest.mark.parametrize("iteration, expected", [(0, 1e-2), (50, 0.55e-2), (100, 0.1e-2)])
def test_cosine_schedule_endpoints(iteration, expected):
    s = OptimSettings(lr=1e-2, schedule="cosine", final_lr_fraction=0.1)
    # cos(0) = 1 -> lr; cos(pi/2) = 0 -> midpoint; cos(pi) = -1 -> final fraction.
    assert learning_rate(s, iteration, 100) == pytest.approx(expected)


def test_bad_settings_are_named():
    with pytest.raises(ValueError, match="batch_size"):
        TrainSettings(batch_size=0)
    with pytest.raises(ValueError, match="activation"):
        PolicySettings(activation="sigmoidish")
    with pytest.raises(ValueError, match="lr"):
        OptimSettings(lr=-1.0)
    with pytest.raises(ValueError, match="squash=none"):
        Policy(PolicySettings(), 2, (-float("inf"),), (float("inf"),))


def test_ensemble_draws_one_model_per_batch_element_inside_the_ranges():
    from apg.ensemble import ParameterRanges

    system = envs.build("crane")
    ranges = ParameterRanges.from_mapping({"load_mass": [8000.0, 12000.0], "rope_length": [6.0, 10.0]})
    models = ranges.sample(system, 256, torch.Generator().manual_seed(0), torch.float64)
    for name, low, high in ranges.ranges:
        v = getattr(models.params, name)
        assert v.shape == (256,) and (v >= low).all() and (v <= high).all() and v.std() > 0
    assert models.params.trolley_mass == system.params.trolley_mass  # unranged parameters stay nominal
    with pytest.raises(ValueError, match="system.ensemble.load_mas"):
        ParameterRanges.from_mapping({"load_mas": [1.0, 2.0]}).check(system)
    with pytest.raises(ValueError, match="load_mass must be > 0"):
        ParameterRanges.from_mapping({"load_mass": [-1.0, 2.0]}).check(system)
    with pytest.raises(ValueError, match="low <= high"):
        ParameterRanges.from_mapping({"load_mass": [3.0, 2.0]})


def test_ensemble_training_resumes_exactly(tmp_path):
    from apg.ensemble import ParameterRanges

    ranges = ParameterRanges.from_mapping({"mass": [0.8, 1.2], "length": [0.9, 1.1]})

    def run(d, resume=False, monitors=()):
        return train(envs.build("pendulum"), PolicySettings(hidden=(16,)), OptimSettings(lr=1e-2), Analytic(),
                     _settings(), seed=0, run_dir=d, resume=resume, monitors=monitors, ensemble=ranges)

    straight = run(tmp_path / "a")
    with pytest.raises(RuntimeError):
        run(tmp_path / "b", monitors=[_Crash(6)])
    resumed = run(tmp_path / "b", resume=True)
    for k, v in _params(straight.policy).items():
        assert torch.equal(v, resumed.policy.state_dict()[k]), k
    plain = _train(tmp_path / "c", _settings(), seed=0, policy=PolicySettings(hidden=(16,)))
    assert not torch.equal(plain.policy.net[0].weight, straight.policy.net[0].weight)  # the ensemble mattered


def test_a_run_directory_in_use_is_refused(tmp_path):
    """Two runs in one directory would destroy each other: while one holds the directory's claim (an exclusive
    flock, as a second process would see it), another is refused before it writes anything."""
    from apg.train import _Claim

    holder = _Claim(tmp_path)
    try:
        with pytest.raises(RunExistsError, match="another apg run is writing to"):
            _train(tmp_path, _settings())
        assert not (tmp_path / "config.yaml").exists() and not (tmp_path / "checkpoint.pt").exists()
    finally:
        holder.release()
    _train(tmp_path, _settings(iterations=2))  # released: the directory is free again


@pytest.mark.parametrize("left", ["metrics.json", "config.yaml", "events.out.tfevents.1.host"])
def test_any_run_file_means_a_run_is_here(tmp_path, left):
    """A finished run's files without its checkpoint are still a run: never overwritten, with or without resume."""
    (tmp_path / left).write_text("a finished run's file\n")
    for resume in (False, True):
        with pytest.raises(RunExistsError, match=f"already holds a run.*{left}"):
            _train(tmp_path, _settings(), resume=resume)
    assert (tmp_path / left).read_text() == "a finished run's file\n"


def test_a_run_is_resumable_from_its_first_moment(tmp_path):
    """The checkpoint is written before the first iteration, so a run killed early resumes instead of leaving a
    directory that can be neither resumed nor reused."""
    straight = _train(tmp_path / "a", _settings(iterations=8, checkpoint_every=100))
    with pytest.raises(RuntimeError, match="simulated"):
        _train(tmp_path / "b", _settings(iterations=8, checkpoint_every=100), monitors=[_Crash(1)])
    assert load_checkpoint(tmp_path / "b")["iteration"] == 0
    resumed = _train(tmp_path / "b", _settings(iterations=8, checkpoint_every=100), resume=True)
    for k, v in _params(straight.policy).items():
        assert torch.equal(v, resumed.policy.state_dict()[k]), k


def test_the_plant_saturates_every_policy_at_its_limits(tmp_path):
    """An unsquashed linear policy may command any force; the actuator delivers at most its limit, so the
    simulated force, the cost and the state all see the saturated action (a 2 N drive: u = -40 x clips at +-2 N)."""
    system = envs.build("double_integrator", params={"force_limit": 2.0})
    policy = make_policy(LINEAR, system)
    with torch.no_grad():
        policy.net[0].weight.copy_(torch.tensor([[-40.0, -40.0]]))
    x0 = torch.tensor([[1.0, 0.0], [-1.0, 0.0], [0.01, 0.0]])
    traj = rollout(system, policy, x0, 3)
    assert traj.actions[0, :, 0].tolist() == pytest.approx([-2.0, 2.0, -0.4])
    assert (traj.actions.abs() <= 2.0).all()
    # the first step against the exact zero-order-hold model with the clipped force (m = 1 kg, dt = 0.1 s)
    dt = system.dt
    assert traj.states[1, 0].tolist() == pytest.approx([1.0 - 2.0 * dt * dt / 2, -2.0 * dt], rel=1e-6)
