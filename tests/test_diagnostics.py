"""Gradient diagnostics (apg.diagnostics) against known answers, and the monitors that report them.

References:
* costate: central finite differences of the total cost with respect to the state at step t, rolled out by
  apg.rollout.rollout (an independent loop), and the discrete adjoint recursion
  lambda_t = dc_t/dx_t + (A - BK)^T lambda_{t+1}, lambda_T = dphi/dx_T (Bryson & Ho, Applied Optimal Control, 1975,
  ch. 2) for the linear double integrator under u = -K x;
* state Jacobian: dx_t/dx_0 = (A - BK)^t with the exact zero-order-hold model of m xdd = u (Franklin, Powell &
  Workman, Digital Control of Dynamic Systems, 3rd ed., sec. 4.3), numpy.linalg.matrix_power and numpy.linalg.svd;
  for the pendulum resting upright, scipy.linalg.expm of its linearisation; along a swinging pendulum's
  trajectory, central differences of apg.rollout.rollout;
* action gradient: zero at every step for the LQR gain with the Riccati terminal cost (Bertsekas, Dynamic
  Programming and Optimal Control, vol. 1, sec. 4.1).
"""

from __future__ import annotations

import dataclasses
import logging
import math

import numpy as np
import pytest
import scipy.linalg
import torch
from torch import nn

import envs
from apg.diagnostics import GradientProfile, gradient_profile
from apg.monitor import TAGS, ProgressMonitor, TensorBoardMonitor
from apg.policies import PolicySettings, make_policy
from apg.reports.figures import plt, profile_figure  # the Agg backend
from apg.rollout import rollout
from apg.runs import TrainSettings
from apg.train import RunInfo

F64 = torch.float64
X0 = torch.tensor([[1.0, 0.5], [-1.5, 0.2], [0.3, -0.8]], dtype=F64)  # position (m), velocity (m/s)


def zoh_model(dt: float, mass: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact discretisation of m xdd = u with u held over the step (Franklin, Powell & Workman, sec. 4.3)."""
    return np.array([[1.0, dt], [0.0, 1.0]]), np.array([[dt * dt / (2 * mass)], [dt / mass]])


def lqr(system) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(A, B, Q, R, K) of the double integrator's task; K = (R + B'PB)^-1 B'PA with P from scipy's DARE.

    The running cost is (x'Qx + u'Ru) dt, so the discrete problem's per-step weights are the task's times dt."""
    a, b = zoh_model(system.dt, system.params.mass)
    q = np.diag([system.task.q_position, system.task.q_velocity]) * system.dt
    r = np.array([[system.task.r_force]]) * system.dt
    p = scipy.linalg.solve_discrete_are(a, b, q, r)
    return a, b, q, r, np.linalg.solve(r + b.T @ p @ b, b.T @ p @ a)


def linear_policy(gain: np.ndarray) -> nn.Module:
    """u = -K x; the double integrator observes its state as it is."""
    policy = nn.Linear(gain.shape[1], gain.shape[0], bias=False).to(F64)
    with torch.no_grad():
        policy.weight.copy_(torch.from_numpy(-gain))
    return policy


def zero_torque(obs_dim: int) -> nn.Module:
    policy = nn.Linear(obs_dim, 1).to(F64)
    nn.init.zeros_(policy.weight)
    nn.init.zeros_(policy.bias)
    return policy


@pytest.fixture
def di():
    # RK4: exactly the zero-order-hold model for constant acceleration. The destabilising gain's forces grow past
    # the sled's 10 N drive within the horizon; a drive wide enough never to saturate keeps the loop linear.
    return envs.build("double_integrator", params={"force_limit": 1e9})


# Half the LQR gain (stable, not optimal: dC/du_t != 0) and a gain that pushes the position away (unstable).
GAINS = {"half_lqr": lambda k: 0.5 * k, "destabilising": lambda k: np.array([[-1.0, 0.2]])}


def tail_cost(system, policy, x: torch.Tensor, steps: int) -> torch.Tensor:
    """Cost of each trajectory from state ``x`` over the remaining ``steps`` steps, via apg.rollout."""
    return rollout(system, policy, x, steps).total_cost if steps else system.terminal_cost(x)


def test_costate_matches_central_differences(di):
    a, b, q, r, k = lqr(di)
    policy, horizon, eps = linear_policy(0.5 * k), 30, 1e-4
    profile = gradient_profile(di, policy, X0, horizon)
    states = rollout(di, policy, X0, horizon).states.detach()  # (T+1, B, 2)
    for t in (0, 7, horizon - 1, horizon):
        fd_x = torch.stack([(tail_cost(di, policy, states[t] + eps * e, horizon - t)
                             - tail_cost(di, policy, states[t] - eps * e, horizon - t)) / (2 * eps)
                            for e in torch.eye(2, dtype=F64)], dim=-1)  # (B, 2)
        # Central differences are exact for a quadratic cost of a linear closed loop: only rounding is left
        # (about 1e-16 * cost / eps ~ 1e-10 relative), so 1e-6 is a safe margin.
        torch.testing.assert_close(profile.costate[t], fd_x.abs().mean(0), rtol=1e-6, atol=1e-9)
        if t == horizon:
            continue
        u = policy(di.observe(states[t])).detach()

        def cost_from_action(du: float) -> torch.Tensor:
            ut = u + du
            return di.running_cost(states[t], ut) + tail_cost(di, policy, di.step(states[t], ut), horizon - t - 1)

        fd_u = (cost_from_action(eps) - cost_from_action(-eps)) / (2 * eps)  # (B,)
        torch.testing.assert_close(profile.action[t, 0], fd_u.abs().mean(), rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("gain", GAINS)
def test_costate_matches_discrete_adjoint_recursion(di, gain):
    a, b, q, r, k = lqr(di)
    k = GAINS[gain](k)
    horizon = 40
    profile = gradient_profile(di, linear_policy(k), X0, horizon)
    a_cl = a - b @ k
    x = [X0.numpy()]  # rows are trajectories
    for _ in range(horizon):
        x.append(x[-1] @ a_cl.T)
    p = np.asarray(di.riccati)  # the terminal weight the system uses; scipy's DARE of the same (A, B, Q, R)
    lam = [2 * x[-1] @ p]
    for t in range(horizon - 1, -1, -1):  # Bryson & Ho: lambda_t = dc_t/dx_t + A_cl^T lambda_{t+1}
        lam.append(2 * x[t] @ (q + k.T @ r @ k) + lam[-1] @ a_cl)
    lam = np.stack(lam[::-1])  # (T+1, B, 2)
    dc_du = np.stack([2 * (-x[t] @ k.T) @ r + lam[t + 1] @ b for t in range(horizon)])  # 2 R u_t + B' lambda_{t+1}
    own = np.stack([2 * x[t] @ (q + k.T @ r @ k) for t in range(horizon)] + [2 * x[-1] @ p])  # g_t: no future
    # Float64 rounding only: two ways of summing the same products.
    torch.testing.assert_close(profile.costate, torch.from_numpy(np.abs(lam).mean(1)), rtol=1e-9, atol=1e-12)
    torch.testing.assert_close(profile.action, torch.from_numpy(np.abs(dc_du).mean(1)), rtol=1e-9, atol=1e-12)
    torch.testing.assert_close(profile.cost_gradient, torch.from_numpy(np.abs(own).mean(1)), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("gain", GAINS)
def test_jacobian_sigma_matches_matrix_power(di, gain):
    a, b, q, r, k = lqr(di)
    k = GAINS[gain](k)
    horizon = 200  # the destabilising gain reaches sigma ~ 5e7 here: the renormalised product must not drift
    profile = gradient_profile(di, linear_policy(k), X0, horizon, jacobian_trajectories=2)
    a_cl = a - b @ k
    for t in (0, 1, 5, 17, 60, horizon):
        expected = np.linalg.svd(np.linalg.matrix_power(a_cl, t), compute_uv=False)[0]
        # Float64: each of t matrix products rounds at ~1e-16, so 1e-8 leaves a wide margin.
        assert profile.jacobian_sigma[t].item() == pytest.approx(expected, rel=1e-8), t
    assert profile.jacobian_sigma[0].item() == 1.0


def test_jacobian_sigma_of_a_swinging_pendulum_matches_central_differences():
    # Along a nonlinear trajectory the step Jacobians differ from step to step, so their order in the product
    # matters; the reference is dx_t/dx_0 by central differences of apg.rollout.rollout.
    system = envs.build("pendulum")
    policy = make_policy(PolicySettings(hidden=(8,)), system, torch.Generator().manual_seed(0), dtype=F64)
    gen = torch.Generator().manual_seed(2)
    with torch.no_grad():
        for p in policy.parameters():  # a policy that really acts, so the closed loop is not the free pendulum
            p.copy_(torch.randn(p.shape, generator=gen, dtype=F64))
    x0, eps = torch.tensor([[2.5, -0.5]], dtype=F64), 1e-6
    profile = gradient_profile(system, policy, x0, 40, jacobian_trajectories=1)
    columns = [(rollout(system, policy, x0 + eps * e, 40).states - rollout(system, policy, x0 - eps * e, 40).states)
               / (2 * eps) for e in torch.eye(2, dtype=F64)]
    fd = torch.stack(columns, dim=-1)[:, 0].detach()  # (T+1, 2, 2): dx_t/dx_0
    # Central differences in float64: truncation ~ eps^2 and rounding ~ 1e-16 / eps ~ 1e-10, relative.
    torch.testing.assert_close(profile.jacobian_sigma, torch.linalg.matrix_norm(fd, ord=2), rtol=1e-6, atol=0)


def test_jacobian_sigma_upright_pendulum_matches_linearisation():
    # At rest upright under zero torque the trajectory stays on the equilibrium, so dx_t/dx_0 is the RK4 step of
    # the linearisation thdd = (g/l) th - b/(m l^2) thd, close to expm(A_c t); its largest singular value grows
    # like exp(sqrt(g/l) t) (the unstable eigenvalue, from the linearisation; damping shifts it by -b/(2 m l^2)).
    system = envs.build("pendulum")
    p = system.params
    a_c = np.array([[0.0, 1.0], [p.gravity / p.length, -p.damping / (p.mass * p.length ** 2)]])
    profile = gradient_profile(system, zero_torque(system.obs_dim), torch.zeros(1, 2, dtype=F64), 100)
    for t in (20, 60, 100):
        expected = np.linalg.svd(scipy.linalg.expm(a_c * t * system.dt), compute_uv=False)[0]
        # RK4's amplification factor differs from exp(lambda dt) by (lambda dt)^5 / 120 ~ 1e-6 per step.
        assert profile.jacobian_sigma[t].item() == pytest.approx(expected, rel=1e-3), t
    slope = math.log(profile.jacobian_sigma[100] / profile.jacobian_sigma[60]) / (40 * system.dt)
    assert slope == pytest.approx(math.sqrt(p.gravity / p.length), rel=1e-2)
    assert profile.growth == 1.0  # the costate is zero on the equilibrium: nothing to amplify


def test_exploding_pendulum_warns_and_stable_lqr_does_not(di):
    # Pendulum 1e-9 rad from upright, zero torque, 120 steps (4.8 s with the defaults, sqrt(g/l) = 3.9 /s): from
    # the linearisation sigma ~ exp(sqrt(g/l) t) ~ 1e8 at the end (the angle is still only ~0.1 rad), and the
    # costate collects the late costs amplified as much.
    pendulum = envs.build("pendulum")
    x0 = torch.tensor([[1e-9, 0.0], [-1e-9, 0.0]], dtype=F64)
    exploding = gradient_profile(pendulum, zero_torque(pendulum.obs_dim), x0, 120)
    assert exploding.growth > 1e3 and exploding.sigma_max > 1e3
    message = exploding.warning()
    assert message is not None
    for switch in ("estimator.window=", "estimator=terminal_value", "train.horizon_start=", "train.grad_clip",
                   "train.continuation_param=contact_smoothing", "train.continuation_start="):
        assert switch in message, switch
    # The LQR closed loop contracts: no amplification however long the horizon, although its state (and with it
    # the costate) decays by many orders of magnitude over 30 s.
    a, b, q, r, k = lqr(di)
    stable = gradient_profile(di, linear_policy(k), X0, 300)
    assert stable.costate_norm[0] / stable.costate_norm[-1] > 1e10
    assert stable.growth < 2 and stable.sigma_max < 2
    assert stable.warning() is None
    # With the terminal cost x'Px the LQR gain is optimal on every finite horizon (Bertsekas, Dynamic Programming
    # and Optimal Control, vol. 1, sec. 4.1), so the first-order condition dC/du_t = 0 holds at every step.
    assert stable.action.max() < 1e-9 * stable.costate.max()


def test_profile_leaves_policy_untouched():
    system = envs.build("pendulum")
    policy = make_policy(PolicySettings(hidden=(8,)), system, torch.Generator().manual_seed(0))
    params = list(policy.parameters())
    params[0].grad = torch.ones_like(params[0])
    modes: list[bool] = []
    policy.register_forward_pre_hook(lambda module, args: modes.append(module.training))
    policy.train()
    profile = gradient_profile(system, policy, system.sample_initial(4, torch.Generator().manual_seed(1)), 20)
    assert torch.equal(params[0].grad, torch.ones_like(params[0]))
    assert all(p.grad is None for p in params[1:])
    assert modes and not any(modes)  # evaluated in eval mode, as apg.rollout.evaluate does
    assert policy.training
    assert profile.costate.shape == (21, 2) and profile.action.shape == (20, 1)
    assert profile.state_names == ("angle", "angular_velocity") and profile.dt == system.dt


def test_per_element_parameters_follow_their_rows():
    # mass enters the dynamics (and so the Jacobian), torque_limit only the running cost.
    system = envs.build("pendulum")
    policy = make_policy(PolicySettings(hidden=(8,)), system, torch.Generator().manual_seed(0), dtype=F64)
    x0 = torch.tensor([[2.0, 0.3], [-1.0, 0.5]], dtype=F64)
    values = {"mass": torch.tensor([0.5, 2.0], dtype=F64), "torque_limit": torch.tensor([1.0, 4.0], dtype=F64)}

    def model(**params):
        return system.replace(params=dataclasses.replace(system.params, **params))

    both = gradient_profile(model(**values), policy, x0, 30, jacobian_trajectories=2)
    single = [gradient_profile(model(**{k: float(v[i]) for k, v in values.items()}), policy, x0[i:i + 1], 30)
              for i in range(2)]
    # Absolute values of the same numbers averaged over two rows; the lower median of two is the smaller.
    for field in ("costate", "action", "cost_gradient"):
        torch.testing.assert_close(getattr(both, field), (getattr(single[0], field) + getattr(single[1], field)) / 2)
    torch.testing.assert_close(both.jacobian_sigma, torch.minimum(single[0].jacobian_sigma,
                                                                  single[1].jacobian_sigma))
    with pytest.raises(ValueError, match="mass"):
        gradient_profile(model(**values), policy, x0[:1], 5)
    with pytest.raises(ValueError, match="x0"):
        gradient_profile(system, policy, x0[:, :1], 5)


@pytest.fixture
def profiles(di) -> tuple[GradientProfile, GradientProfile]:
    pendulum = envs.build("pendulum")
    x0 = torch.tensor([[1e-9, 0.0]], dtype=F64)
    exploding = gradient_profile(pendulum, zero_torque(pendulum.obs_dim), x0, 100)
    stable = gradient_profile(di, linear_policy(lqr(di)[-1]), X0, 50)
    return exploding, stable


def test_tensorboard_monitor_writes_heatmap_and_scalars(tmp_path, profiles, di):
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    exploding, _ = profiles
    fig = profile_figure(exploding)
    assert any("log10" in ax.get_ylabel() for ax in fig.axes)  # the colourbar's label
    plt.close(fig)
    monitor = TensorBoardMonitor()
    monitor.start(RunInfo(di, None, TrainSettings(), tmp_path, 0, None))
    monitor.diagnostics(5, exploding)
    monitor.close()
    events = EventAccumulator(str(tmp_path))
    events.Reload()
    assert TAGS["gradient_profile"] in events.Tags()["images"]
    for key, value in exploding.summary().items():
        (event,) = events.Scalars(TAGS[key])
        assert event.step == 5 and event.value == pytest.approx(value, rel=1e-6), key
    assert all(TAGS[key].startswith("gradients/") for key in exploding.summary())


@pytest.mark.parametrize("enabled", [True, False])
def test_progress_monitor_warns_once_then_only_when_worse(caplog, tmp_path, profiles, di, enabled):
    exploding, stable = profiles
    monitor = ProgressMonitor(enabled=enabled)  # the warning must not depend on the bar being shown
    monitor.start(RunInfo(di, None, TrainSettings(iterations=10), tmp_path, 0, None))
    with caplog.at_level(logging.WARNING, logger="apg.train"):
        for it in range(3):
            monitor.diagnostics(it, exploding)
            monitor.diagnostics(it, stable)
        assert len(caplog.records) == 1
        assert "estimator.window" in caplog.records[0].getMessage() and caplog.records[0].name == "apg.train"
        worse = dataclasses.replace(exploding, jacobian_sigma=exploding.jacobian_sigma * 20)  # severity x20
        monitor.diagnostics(3, worse)
        monitor.diagnostics(4, worse)
        assert len(caplog.records) == 2
        monitor.close()
        monitor.start(RunInfo(di, None, TrainSettings(iterations=10), tmp_path, 0, None))  # a new run warns afresh
        monitor.diagnostics(0, exploding)
        assert len(caplog.records) == 3
    monitor.close()
