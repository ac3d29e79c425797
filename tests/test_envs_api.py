"""The contract of :mod:`envs`: registry, validation at the door, shapes, dtypes, purity, sampling, success."""

from __future__ import annotations

import dataclasses
import math
import re

import pytest
import torch

import envs
from envs.base import bounded, check_record, unit
from envs.pendulum import Pendulum

NAMES = envs.available()
DTYPES = [torch.float32, torch.float64]
INTEGRATORS = ["rk4", "semi_implicit_euler"]



def bounded_fields(name: str, bound: str, part: str = "Params") -> list[str]:
    """The fields of a system's record that declare ``bound`` ("positive" or "nonnegative") in their metadata."""
    record = getattr(envs.system_class(name), part)
    return [f.name for f in dataclasses.fields(record) if f.metadata.get("bound") == bound]


def has_hold_time(name: str) -> bool:
    """Whether the task asks for the goal to be held (a ``hold_time`` field in the Task record)."""
    return any(f.name == "hold_time" for f in dataclasses.fields(envs.system_class(name).Task))


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
def test_available_lists_every_registered_system_with_its_config():
    assert envs.available() == tuple(sorted(envs.SYSTEMS)) and len(envs.available()) >= 8
    # each registered system has its config group file (step 3 of "Adding a system" in DEVELOPERS.md); other files
    # there are variants that name a registered system (``name: cartpole`` in cartpole_hanging.yaml)
    from pathlib import Path

    import yaml

    configs = sorted((Path(__file__).resolve().parents[1] / "configs" / "system").glob("*.yaml"))
    assert set(envs.available()) <= {p.stem for p in configs}
    for path in configs:
        named = (yaml.safe_load(path.read_text()) or {}).get("name", path.stem)
        assert named in envs.SYSTEMS, f"{path.name} configures {named!r}, not a registered system"
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
def test_negative_or_zero_positive_parameter_is_rejected_naming_the_field(name):
    fields = bounded_fields(name, "positive")
    assert fields, f"{name}.Params declares no positive field (a mass, a length)"
    cls = envs.system_class(name)
    for field in fields:
        for bad in (-1.0, 0.0):
            with pytest.raises(ValueError, match=rf"params\.{field} must be > 0"):
                envs.build(name, params={field: bad})
        # ... also when built from the record directly, and when one entry of a per-batch tensor is bad
        with pytest.raises(ValueError, match=rf"^{field} must be > 0"):
            cls.Params(**{field: -2.0})
        with pytest.raises(ValueError, match=rf"^{field} must be > 0"):
            dataclasses.replace(cls.Params(), **{field: torch.tensor([1.0, -1.0, 2.0])})


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
@pytest.mark.parametrize("name", NAMES)
def test_non_finite_parameter_is_rejected_naming_the_field(name, bad):
    for field in bounded_fields(name, "positive") + bounded_fields(name, "nonnegative"):
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
    """A state that meets the task when held for the whole trajectory, and one that does not.

    Per-system reference data, written from each task's definition (not read from the system under test)."""
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
    table = {
        "double_integrator": ([0.0, 0.0], [1.0, 0.0]),
        "pendulum": ([0.0, 0.0], [math.pi, 0.0]),  # upright vs hanging
        "cartpole": ([0.0, 0.0, 0.0, 0.0], [0.0, math.pi, 0.0, 0.0]),
        "acrobot": ([math.pi, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 0.0]),  # tip 2 m above the shoulder vs hanging
    }
    if system.name not in table:
        pytest.fail(f"no goal and failure state for {system.name!r}: add them to goal_and_failure_states from the "
                    f"task's definition")
    return table[system.name]


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
    if has_hold_time(name):
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


# ---------------------------------------------------------------------------------------------------------------
# deployment facts: every registered system carries its state limits, sweep parameters and sketch
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", NAMES)
def test_state_limits_name_real_states_with_low_below_high(name):
    system = envs.build(name)
    limits = system.state_limits
    states = [s.name for s in system.state]
    assert limits, f"{name} declares no state limits"
    for state, (low, high) in limits.items():
        assert state in states, f"{name}.state_limits names {state!r}, not one of {states}"
        assert low < high and not (math.isnan(low) or math.isnan(high)), (state, low, high)
    # the task's initial box lies inside the limits: a policy is not charged for where it was started
    for i, s in enumerate(system.state):
        if s.name in limits and not s.angle:
            low, high = limits[s.name]
            assert low <= system.task.init_low[i] and system.task.init_high[i] <= high, s.name


def test_state_limits_follow_the_task():
    """Limits the task sets move with it (the cart-pole's track, the crane's distance)."""
    assert envs.build("cartpole", task={"track_limit": 1.5}).state_limits["cart_position"] == (-1.5, 1.5)
    assert envs.build("crane", task={"distance": 4.0}).state_limits["trolley_position"] == (-2.0, 6.0)


@pytest.mark.parametrize("name", NAMES)
def test_robustness_params_name_real_positive_fields(name):
    cls = envs.system_class(name)
    params = cls().params
    fields = {f.name: f for f in dataclasses.fields(params)}
    assert cls.robustness_params, f"{name} sweeps no parameter by default"
    assert len(set(cls.robustness_params)) == len(cls.robustness_params)
    for p in cls.robustness_params:
        assert p in fields, f"{name}.robustness_params names {p!r}, not a field of {type(params).__name__}"
        assert float(getattr(params, p)) > 0, f"{p}: a default sweep scales the nominal value, which must be > 0"
        assert p != "gravity" and not p.endswith("_limit"), f"{p}: not a model error"


@pytest.mark.parametrize("name", NAMES)
def test_sketch_is_plain_shapes_with_the_traced_point_in_view(name):
    from envs import sketch as sk

    system = envs.build(name)
    x = system.sample_initial(16, torch.Generator().manual_seed(0), torch.float64).tolist()
    x0, x1, y0, y1 = system.sketch_bounds(x)
    assert x0 < x1 and y0 < y1 and all(math.isfinite(v) for v in (x0, x1, y0, y1))
    for state in x:
        shapes = system.sketch(state)
        assert shapes and all(isinstance(s, sk.PRIMITIVES) for s in shapes)
        assert all(math.isfinite(v) for v in sk.extent(shapes))
        for s in shapes:
            if isinstance(s, (sk.Push, sk.Twist)):
                assert 0 <= s.action < system.action_dim
        traces = [s.point for s in shapes if isinstance(s, sk.Trace)]
        assert len(traces) <= 1
        for px, py in traces:
            assert x0 <= px <= x1 and y0 <= py <= y1, (px, py)


def test_sketch_follows_the_forward_kinematics():
    """Reference: the acrobot's tip at (l1 sin q1 + l2 sin(q1 + q2), -l1 cos q1 - l2 cos(q1 + q2)), angles from
    hanging, written here from the geometry of Sutton & Barto (1998), sec. 11.3, whose goal test is that height."""
    from envs import sketch as sk

    system = envs.build("acrobot", params={"link_length_1": 0.7, "link_length_2": 1.3})
    q1, q2 = 0.4, -1.1
    (tip,) = [s.point for s in system.sketch([q1, q2, 0.0, 0.0]) if isinstance(s, sk.Trace)]
    want = (0.7 * math.sin(q1) + 1.3 * math.sin(q1 + q2), -0.7 * math.cos(q1) - 1.3 * math.cos(q1 + q2))
    assert tip == pytest.approx(want, abs=1e-12)


def test_a_system_without_its_deployment_facts_cannot_be_built():
    class Bare(envs.System):
        name = "bare"
        state = Pendulum.state
        action = Pendulum.action
        Params = Pendulum.Params
        Task = Pendulum.Task
        default_dt = 0.05
        acceleration = Pendulum.acceleration
        stage_cost = Pendulum.stage_cost
        effort_cost = Pendulum.effort_cost
        success = Pendulum.success

    with pytest.raises(TypeError, match="sketch.*state_limits|state_limits.*sketch"):
        Bare()

    class NoSweep(Bare):
        state_limits = Pendulum.state_limits
        sketch = Pendulum.sketch

    with pytest.raises(TypeError, match="NoSweep.robustness_params must be a non-empty tuple"):
        NoSweep()
    NoSweep.robustness_params = ("mass",)
    assert NoSweep().robustness_params == ("mass",)


def test_sketch_records_name_a_bad_role_or_size():
    from envs import sketch as sk

    with pytest.raises(ValueError, match="Segment.role must be one of"):
        sk.Segment((0.0, 0.0), (1.0, 0.0), 0.1, role="paint")
    with pytest.raises(ValueError, match="Disc.radius must be a finite length"):
        sk.Disc((0.0, 0.0), -1.0)
    with pytest.raises(ValueError, match="Push.direction must be a unit vector"):
        sk.Push((0.0, 0.0), (2.0, 0.0), 1.0, 0)


# bounds declared once, in the fields' metadata
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("part", ["Params", "Task"])
@pytest.mark.parametrize("name", NAMES)
def test_every_declared_bound_is_enforced_with_its_unit(name, part):
    record = getattr(envs.system_class(name), part)
    declared = [f for f in dataclasses.fields(record) if "bound" in f.metadata]
    assert declared, f"{record.__name__} declares no bound"
    for f in declared:
        if f.metadata["bound"] == "positive":
            bad, sign = 0.0, ">"
        else:
            assert getattr(record(**{f.name: 0.0}), f.name) == 0.0  # zero is allowed
            bad, sign = -1.0, ">="
        expected = f"{f.name} must be {sign} 0 {f.metadata['unit']}".rstrip() + f", got {bad}"
        with pytest.raises(ValueError, match=f"^{re.escape(expected)}$"):
            record(**{f.name: bad})


def test_check_record_reads_metadata_and_still_takes_name_tuples():
    @dataclasses.dataclass(frozen=True)
    class Record:
        length: float = unit("m", 1.0, positive=True)
        weight: float = bounded(0.5, nonnegative=True)
        legacy: float = 2.0

        def __post_init__(self) -> None:
            check_record(self, positive=("legacy",))

    Record(weight=0.0)
    for field, bad, message in (("length", 0.0, "length must be > 0 m, got 0.0"),
                                ("weight", -0.1, "weight must be >= 0, got -0.1"),
                                ("legacy", -2.0, "legacy must be > 0, got -2.0")):
        with pytest.raises(ValueError, match=f"^{re.escape(message)}$"):
            Record(**{field: bad})
    with pytest.raises(TypeError, match="not both"):
        unit("m", 1.0, positive=True, nonnegative=True)
    with pytest.raises(TypeError, match="needs positive=True or nonnegative=True"):
        bounded(1.0)


# ---------------------------------------------------------------------------------------------------------------
# one running-cost convention: (stage_cost + effort_cost) * dt
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", NAMES)
def test_running_cost_is_a_quadrature_of_a_cost_rate(name):
    """With the running cost a cost rate times dt, the total over a fixed time is a left Riemann sum: it converges
    at first order as dt shrinks, so successive halvings change it by ratios near 2 (the rectangle rule's O(dt)
    error, any numerical analysis text). A running cost without the dt factor doubles instead."""
    assert type(envs.build(name)).running_cost is envs.System.running_cost  # no system bends the convention
    totals = []
    for halvings in range(3):
        base = envs.build(name)
        system = base.replace(dt=base.default_dt / 2 ** halvings)
        x = system.sample_initial(16, torch.Generator().manual_seed(0), torch.float64)
        u = ((torch.tensor(system.action_low) + torch.tensor(system.action_high)) / 2).to(torch.float64).expand(16, -1)
        total = torch.zeros(16, dtype=torch.float64)
        for _ in range(20 * 2 ** halvings):  # 20 default steps of simulated time
            total = total + system.running_cost(x, u)
            x = system.step(x, u)
        totals.append(total)
    first = ((totals[0] - totals[1]).abs() / totals[1]).max()
    second = ((totals[1] - totals[2]).abs() / totals[2]).max()
    # measured: first 6e-5 (acrobot) to 0.09 (cartpole), ratio 1.99-2.01 for every system
    assert first < 0.15
    assert 1.8 < float(first / second) < 2.2
