"""The contract of :mod:`envs`: registry, validation at the door, shapes, dtypes, purity, sampling, success."""

from __future__ import annotations

import dataclasses
import math

import pytest
import torch

import envs
from envs.pendulum import Pendulum

NAMES = envs.available()
DTYPES = [torch.float32, torch.float64]
INTEGRATORS = ["rk4", "semi_implicit_euler"]

# per system: a mass-like field and another positive field, both must be > 0
POSITIVE_FIELDS = {
    "double_integrator": ("mass", "force_limit"),
    "pendulum": ("mass", "length"),
    "cartpole": ("cart_mass", "half_length"),
    "acrobot": ("link_mass_1", "com_2"),
    "quadrotor": ("mass", "arm_length"),
    "crane": ("trolley_mass", "rope_length"),
    "pogo": ("body_mass", "leg_rest_length"),
    "paddle": ("ball_mass", "contact_stiffness"),
}


def inputs(system, n: int, dtype: torch.dtype, seed: int = 0):
    g = torch.Generator().manual_seed(seed)
    x = system.sample_initial(n, g, dtype) + 0.1 * torch.randn(n, system.state_dim, generator=g, dtype=dtype)
    lo = torch.tensor(system.action_low, dtype=dtype)
    hi = torch.tensor(system.action_high, dtype=dtype)
    u = lo + (hi - lo) * torch.rand(n, system.action_dim, generator=g, dtype=dtype)
    return x, u


# ---------------------------------------------------------------------------------------------------------------
# registry
# ---------------------------------------------------------------------------------------------------------------
def test_available_lists_all_eight_systems():
    assert envs.available() == ("acrobot", "cartpole", "crane", "double_integrator", "paddle", "pendulum", "pogo",
                                "quadrotor")
    for name in envs.available():
        system = envs.build(name)
        assert system.name == name and isinstance(system, envs.System)
        assert system.integrator == "rk4" and system.dt == type(system).default_dt


def test_make_unknown_name_lists_valid_names():
    with pytest.raises(ValueError, match="unknown system 'pendulm'") as info:
        envs.build("pendulm")
    for name in NAMES:
        assert name in str(info.value)


def test_make_overrides_params_task_dt_and_integrator():
    system = envs.build("pendulum", params={"torque_limit": 2.0}, task={"init_low": [-1.0, -0.5]}, dt=0.02,
                       integrator="semi_implicit_euler")
    assert system.params.torque_limit == 2.0 and system.action_high == (2.0,)
    assert system.task.init_low == (-1.0, -0.5)  # a list from a config file becomes the tuple the record holds
    assert system.dt == 0.02 and system.integrator == "semi_implicit_euler"


@pytest.mark.parametrize("what", ["params", "task"])
@pytest.mark.parametrize("name", NAMES)
def test_make_unknown_key_is_named(name, what):
    with pytest.raises(ValueError, match=rf"unknown {what} key\(s\) \['frobnicate'\]"):
        envs.build(name, **{what: {"frobnicate": 1.0}})


@pytest.mark.parametrize("name", NAMES)
def test_negative_or_zero_mass_is_rejected_naming_the_field(name):
    field = POSITIVE_FIELDS[name][0]
    for bad in (-1.0, 0.0):
        with pytest.raises(ValueError, match=rf"params\.{field} must be > 0"):
            envs.build(name, params={field: bad})
    # ... also when built from the record directly, and when one entry of a per-batch tensor is bad
    cls = envs.system_class(name)
    with pytest.raises(ValueError, match=rf"^{field} must be > 0"):
        cls.Params(**{field: -2.0})
    with pytest.raises(ValueError, match=rf"^{field} must be > 0"):
        dataclasses.replace(cls.Params(), **{field: torch.tensor([1.0, -1.0, 2.0])})


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
@pytest.mark.parametrize("name", NAMES)
def test_non_finite_parameter_is_rejected_naming_the_field(name, bad):
    field = POSITIVE_FIELDS[name][1]
    with pytest.raises(ValueError, match=rf"params\.{field} must be finite"):
        envs.build(name, params={field: bad})
    with pytest.raises(ValueError, match=rf"^{field} must be finite"):
        dataclasses.replace(envs.system_class(name).Params(), **{field: torch.tensor([1.0, bad])})


def test_nonnegative_fields_accept_zero_and_reject_negative():
    assert envs.build("pendulum", params={"damping": 0.0}).params.damping == 0.0
    assert envs.build("crane", params={"rolling_resistance": 0.0}).params.rolling_resistance == 0.0
    with pytest.raises(ValueError, match=r"params\.damping must be >= 0"):
        envs.build("pendulum", params={"damping": -0.1})
    with pytest.raises(ValueError, match=r"params\.rolling_resistance must be >= 0"):
        envs.build("crane", params={"rolling_resistance": -1.0})
    with pytest.raises(ValueError, match=r"task\.hold_time must be > 0"):
        envs.build("cartpole", task={"hold_time": -1.0})


@pytest.mark.parametrize("dt", [-0.1, 0.0, math.nan, math.inf])
@pytest.mark.parametrize("name", NAMES)
def test_bad_dt_is_rejected(name, dt):
    with pytest.raises(ValueError, match=r"^dt must be a positive number"):
        envs.build(name, dt=dt)


@pytest.mark.parametrize("name", NAMES)
def test_unknown_integrator_is_rejected_listing_valid_ones(name):
    with pytest.raises(ValueError, match=r"unknown integrator 'leapfrog'") as info:
        envs.build(name, integrator="leapfrog")
    for integrator in INTEGRATORS:
        assert integrator in str(info.value)


def test_wrong_record_type_is_a_type_error():
    with pytest.raises(TypeError, match="PendulumParams"):
        Pendulum(params=envs.system_class("cartpole").Params())


def test_replace_returns_a_new_validated_system():
    system = envs.build("pendulum")
    dt, mass = system.dt, system.params.mass
    other = system.replace(dt=dt / 4, params=dataclasses.replace(system.params, mass=2 * mass))
    assert other is not system and other.dt == dt / 4 and other.params.mass == 2 * mass
    assert system.dt == dt and system.params.mass == mass  # the original is unchanged
    with pytest.raises(ValueError, match="dt"):
        system.replace(dt=-1.0)


# ---------------------------------------------------------------------------------------------------------------
# purity, shapes and dtypes
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("integrator", INTEGRATORS)
@pytest.mark.parametrize("name", NAMES)
def test_methods_do_not_mutate_their_inputs(name, integrator):
    system = envs.build(name, integrator=integrator)
    x, u = inputs(system, 4, torch.float64)
    x0, u0 = x.clone(), u.clone()
    states = torch.stack([x, system.step(x, u)])
    s0 = states.clone()
    system.step(x, u)
    system.derivative(x, u)
    system.observe(x)
    system.running_cost(x, u)
    system.terminal_cost(x)
    system.success(states, u[None])
    # bitwise: nothing may write into the caller's tensors
    torch.testing.assert_close(x, x0, rtol=0.0, atol=0.0)
    torch.testing.assert_close(u, u0, rtol=0.0, atol=0.0)
    torch.testing.assert_close(states, s0, rtol=0.0, atol=0.0)


@pytest.mark.parametrize("n", [1, 5])
@pytest.mark.parametrize("name", NAMES)
def test_output_shapes(name, n):
    system = envs.build(name)
    x, u = inputs(system, n, torch.float64)
    assert system.state_dim == len(system.state) == 2 * system.n_q
    assert system.action_dim == len(system.action) == len(system.action_low) == len(system.action_high)
    assert all(lo < hi for lo, hi in zip(system.action_low, system.action_high))
    n_angles = sum(q.angle for q in system.state)
    assert system.obs_dim == len(system.obs_names) == system.state_dim + n_angles
    assert system.step(x, u).shape == (n, system.state_dim)
    assert system.derivative(x, u).shape == (n, system.state_dim)
    assert system.acceleration(x[:, :system.n_q], x[:, system.n_q:], u).shape == (n, system.n_q)
    assert system.observe(x).shape == (n, system.obs_dim)
    assert system.running_cost(x, u).shape == (n,)
    assert system.terminal_cost(x).shape == (n,)
    assert system.sample_initial(n, torch.Generator().manual_seed(0)).shape == (n, system.state_dim)
    t = 7
    states = x.expand(t + 1, n, system.state_dim)
    ok = system.success(states, u.expand(t, n, system.action_dim))
    assert ok.shape == (n,) and ok.dtype == torch.bool
    assert isinstance(system.success_criterion, str) and system.success_criterion


@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("integrator", INTEGRATORS)
@pytest.mark.parametrize("name", NAMES)
def test_dtype_in_is_dtype_out(name, integrator, dtype):
    system = envs.build(name, integrator=integrator)
    x, u = inputs(system, 3, dtype)
    assert system.sample_initial(3, torch.Generator().manual_seed(0), dtype).dtype == dtype
    for out in (system.step(x, u), system.derivative(x, u), system.observe(x), system.running_cost(x, u),
                system.terminal_cost(x)):
        assert out.dtype == dtype
        assert torch.isfinite(out).all()
    # float32 and float64 agree to float32 precision (the float32 path is not silently a different model);
    # rtol 1e-4: one step of float32 arithmetic, ~1e-7 relative per operation, amplified by at most ~100.
    x64, u64 = x.double(), u.double()
    torch.testing.assert_close(system.step(x, u).double(), system.step(x64, u64), rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("name", NAMES)
def test_observe_maps_angles_to_sin_cos(name):
    system = envs.build(name)
    x, _ = inputs(system, 4, torch.float64)
    obs = system.observe(x)
    j = 0
    for i, q in enumerate(system.state):
        if q.angle:
            # exact: the same torch.sin/cos of the same numbers
            torch.testing.assert_close(obs[:, j], torch.sin(x[:, i]), rtol=0.0, atol=0.0)
            torch.testing.assert_close(obs[:, j + 1], torch.cos(x[:, i]), rtol=0.0, atol=0.0)
            assert system.obs_names[j] == f"sin({q.name})" and system.obs_names[j + 1] == f"cos({q.name})"
            j += 2
        else:
            torch.testing.assert_close(obs[:, j], x[:, i], rtol=0.0, atol=0.0)
            assert system.obs_names[j] == q.name
            j += 1
    # so the observation does not see a full turn of any angle (atol 1e-12: sin/cos of x + 2 pi in float64)
    shift = torch.tensor([2 * math.pi if q.angle else 0.0 for q in system.state], dtype=torch.float64)
    torch.testing.assert_close(system.observe(x + shift), obs, rtol=0.0, atol=1e-12)


# ---------------------------------------------------------------------------------------------------------------
# initial states
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("name", NAMES)
def test_sample_initial_is_reproducible_and_inside_the_box(name, dtype):
    system = envs.build(name)
    a = system.sample_initial(2000, torch.Generator().manual_seed(123), dtype)
    b = system.sample_initial(2000, torch.Generator().manual_seed(123), dtype)
    c = system.sample_initial(2000, torch.Generator().manual_seed(124), dtype)
    torch.testing.assert_close(a, b, rtol=0.0, atol=0.0)  # same seed, same draws: bitwise
    assert not torch.equal(a, c)
    lo = torch.tensor(system.task.init_low, dtype=dtype)
    hi = torch.tensor(system.task.init_high, dtype=dtype)
    assert (a >= lo).all() and (a <= hi).all()
    # ... and it fills the box rather than sitting at one point: with 2000 uniform draws the extremes lie within
    # 1% of the range of each face with probability 1 - 0.99^2000 > 1 - 1e-8
    span = hi - lo
    assert ((a.min(0).values - lo) < 0.01 * span).all() and ((hi - a.max(0).values) < 0.01 * span).all()


def test_sample_initial_follows_a_changed_task_box():
    system = envs.build("cartpole", task={"init_low": [3.0, 3.0, 0.0, 0.0], "init_high": [3.5, 3.2, 0.1, 0.1]})
    x = system.sample_initial(100, torch.Generator().manual_seed(0))
    assert (x[:, 0] >= 3.0).all() and (x[:, 0] <= 3.5).all() and (x[:, 1] >= 3.0).all()


# ---------------------------------------------------------------------------------------------------------------
# success
# ---------------------------------------------------------------------------------------------------------------
def goal_and_failure_states(system) -> tuple[list[float], list[float]]:
    """A state that meets the task when held for the whole trajectory, and one that does not."""
    if system.name == "quadrotor":
        tx, tz = system.task.target
        return [tx, tz, 0.0, 0.0, 0.0, 0.0], [tx, tz - 1.0, 0.0, 0.0, 0.0, 0.0]  # at the hover point vs 1 m low
    if system.name == "crane":
        return [system.task.distance, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0]  # at the target vs at the start
    if system.name == "pogo":
        z, leg = system.params.standing_height, -system.params.leg_rest_length
        return [system.task.mark, z, 0.0, leg] + [0.0] * 4, [0.0, z, 0.0, leg] + [0.0] * 4  # at the mark vs start
    if system.name == "paddle":
        # in flight at the apex height vs lying on the paddle (never flying)
        return [system.task.target, 0.0, 0.0, 0.0], [system.params.ball_radius, 0.0, 0.0, 0.0]
    return {
        "double_integrator": ([0.0, 0.0], [1.0, 0.0]),
        "pendulum": ([0.0, 0.0], [math.pi, 0.0]),  # upright vs hanging
        "cartpole": ([0.0, 0.0, 0.0, 0.0], [0.0, math.pi, 0.0, 0.0]),
        "acrobot": ([math.pi, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0]),  # tip 2 m above the shoulder vs hanging
    }[system.name]


@pytest.mark.parametrize("name", NAMES)
def test_success_is_a_bool_per_trajectory_and_means_something(name):
    system = envs.build(name)
    good, bad = goal_and_failure_states(system)
    steps = max(60, round(2.5 / system.dt))  # longer than every task's hold time (at most 2 s)
    states = torch.tensor([good, bad], dtype=torch.float64).expand(steps + 1, 2, system.state_dim)
    actions = torch.zeros(steps, 2, system.action_dim, dtype=torch.float64)
    ok = system.success(states, actions)
    assert ok.dtype == torch.bool and ok.shape == (2,)
    assert ok.tolist() == [True, False]
    # tasks with a hold time: reaching the goal only at the very last state is not holding it
    if name in ("pendulum", "cartpole", "quadrotor", "crane", "pogo", "paddle"):
        late = states[:, 1:].clone()
        late[-1] = torch.tensor(good, dtype=torch.float64)
        assert system.success(late, actions[:, 1:]).tolist() == [False]


@pytest.mark.parametrize("name", NAMES)
def test_success_uses_dt_for_the_hold_window(name):
    # final_window keeps round(seconds / dt) states (at least one): the window must scale with dt
    system = envs.build(name)
    states = torch.zeros(max(101, round(3.0 / system.dt)), 1, system.state_dim)  # longer than 2 s
    assert system.final_window(states, 1.0).shape[0] == max(1, round(1.0 / system.dt))
    assert system.replace(dt=system.dt / 2).final_window(states, 1.0).shape[0] == max(1, round(2.0 / system.dt))
    assert system.final_window(states, 1e-9).shape[0] == 1
