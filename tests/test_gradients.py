"""Analytic gradients of every system against finite differences, in float64.

Analytic policy gradients back-propagate through ``step`` and the costs, so these are the derivatives that
matter. ``torch.autograd.gradcheck`` compares autograd's Jacobian with central differences (PyTorch docs,
``torch.autograd.gradcheck``); the rollout test does the same by hand for a whole open-loop horizon (BPTT).

Actions are passed in normalised form ``v`` in [-1, 1] and mapped to ``u = centre + half_range * v``, as a
policy's output would be: the derivatives then have comparable sizes across systems (the crane's forces are
~1e4 N, the acrobot's torque ~1 N m) and a single finite-difference step size suits all of them.
"""

from __future__ import annotations

import dataclasses
import math

import pytest
import torch
from torch.autograd import gradcheck

import envs

F64 = torch.float64
NAMES = envs.available()
INTEGRATORS = ["rk4", "semi_implicit_euler"]
B = 3

# gradcheck tolerances. Central differences with eps = 1e-6 in float64 have truncation error ~eps^2 |f'''| ~ 1e-12
# and rounding error ~1e-16 |f| / eps ~ 1e-10 |f| (|f| <= ~10 here); atol 1e-7 and rtol 1e-5 sit well above both
# and far below the O(1e-2..1) error of a missing or wrong derivative term. (PyTorch's defaults, atol 1e-5 and
# rtol 1e-3, would also pass; tighter is stricter.)
GC = dict(eps=1e-6, atol=1e-7, rtol=1e-5)


def action_map(system):
    lo = torch.tensor(system.action_low, dtype=F64)
    hi = torch.tensor(system.action_high, dtype=F64)
    return (hi + lo) / 2, (hi - lo) / 2


def random_state(system, n: int, generator: torch.Generator) -> torch.Tensor:
    """Generic states, not just the task's start box: angles anywhere in [-pi, pi], other entries in [-1.5, 1.5]
    (the crane's trolley position around its target). Velocities are moderate so one step stays smooth."""
    cols = []
    for i, q in enumerate(system.state):
        r = torch.rand(n, generator=generator, dtype=F64)
        if q.angle:
            cols.append(math.pi * (2 * r - 1))
        else:
            cols.append(1.5 * (2 * r - 1))
    x = torch.stack(cols, dim=-1)
    if system.name == "quadrotor":
        x[:, 1] += 1.0  # altitude around the hover point
    if system.name == "crane":
        x[:, 0] += 5.0
    return x


def random_inputs(name: str, integrator: str = "rk4", seed: int = 0):
    system = envs.build(name, integrator=integrator)
    g = torch.Generator().manual_seed(seed)
    x = random_state(system, B, g)
    v = 2 * torch.rand(B, system.action_dim, generator=g, dtype=F64) - 1
    return system, x, v


# ---------------------------------------------------------------------------------------------------------------
# one step
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("integrator", INTEGRATORS)
@pytest.mark.parametrize("name", NAMES)
def test_step_gradcheck_state_and_action(name, integrator):
    system, x, v = random_inputs(name, integrator)
    centre, half = action_map(system)
    x.requires_grad_(True)
    v.requires_grad_(True)
    assert gradcheck(lambda x, v: system.step(x, centre + half * v), (x, v), **GC)


# One physical parameter per system, passed as nominal * k with k a (B,) tensor near 1 requiring grad (so the
# derivative has a usable size even for the crane's 10 t load): the first one the system's robustness sweep varies
# (a mass in every system so far; measured |d step / d k| 0.03 to 16 at these inputs), so a new system is covered
# without a table here.
def param_field(name: str) -> str:
    return envs.system_class(name).robustness_params[0]


@pytest.mark.parametrize("integrator", INTEGRATORS)
@pytest.mark.parametrize("name", NAMES)
def test_step_gradcheck_tensor_parameter(name, integrator):
    system, x, v = random_inputs(name, integrator, seed=1)
    centre, half = action_map(system)
    field = param_field(name)
    nominal = float(getattr(system.params, field))
    k = torch.tensor([0.8, 1.0, 1.3], dtype=F64, requires_grad=True)

    def f(k):
        s = system.replace(params=dataclasses.replace(system.params, **{field: nominal * k}))
        return s.step(x, centre + half * v)

    assert gradcheck(f, (k,), **GC)
    # and the parameter matters: d step / d k is not identically zero (otherwise the check proves nothing)
    (jac,) = torch.autograd.functional.jacobian(f, (k,))
    assert jac.abs().max() > 1e-6


@pytest.mark.parametrize("name", NAMES)
def test_tensor_parameter_gradient_is_rowwise(name):
    # A (B,) parameter must only influence its own row: d x1[i] / d k[j] = 0 for i != j.
    system, x, v = random_inputs(name, seed=2)
    centre, half = action_map(system)
    field = param_field(name)
    nominal = float(getattr(system.params, field))

    def f(k):
        s = system.replace(params=dataclasses.replace(system.params, **{field: nominal * k}))
        return s.step(x, centre + half * v)

    jac = torch.autograd.functional.jacobian(f, torch.tensor([0.8, 1.0, 1.3], dtype=F64))  # (B, n, B)
    off = jac * (1 - torch.eye(B, dtype=F64))[:, None, :]
    torch.testing.assert_close(off, torch.zeros_like(off), rtol=0.0, atol=0.0)  # structurally zero: exact


# ---------------------------------------------------------------------------------------------------------------
# costs and observation
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", NAMES)
def test_cost_and_observe_gradcheck(name):
    system, x, v = random_inputs(name, seed=3)
    centre, half = action_map(system)
    x.requires_grad_(True)
    v.requires_grad_(True)
    assert gradcheck(lambda x, v: system.running_cost(x, centre + half * v), (x, v), **GC)
    assert gradcheck(system.terminal_cost, (x,), **GC)
    assert gradcheck(system.observe, (x,), **GC)


# ---------------------------------------------------------------------------------------------------------------
# back-propagation through time
# ---------------------------------------------------------------------------------------------------------------
T = 20
FD_EPS = 1e-6


def total_cost(system, x0, v, centre, half):
    """Per-row open-loop cost: sum_t running_cost(x_t, u_t) + terminal_cost(x_T). ``v`` is ``(T, N, m)``."""
    x, cost = x0, torch.zeros(x0.shape[0], dtype=F64)
    for t in range(v.shape[0]):
        u = centre + half * v[t]
        cost = cost + system.running_cost(x, u)
        x = system.step(x, u)
    return cost + system.terminal_cost(x)


def central_differences(fn, z: torch.Tensor) -> torch.Tensor:
    """d sum(fn(z)) / dz by central differences, all perturbations evaluated in one batch.

    ``fn`` maps ``(N, *shape)`` to per-row costs ``(N,)``; rows are independent, so the 2 * numel perturbed copies
    of the single trajectory ``z`` (shape ``(1, *shape)``) can share one rollout."""
    n = z[0].numel()
    basis = torch.eye(n, dtype=F64).reshape(n, *z.shape[1:])
    zs = torch.cat([z + FD_EPS * basis, z - FD_EPS * basis])
    c = fn(zs)
    return ((c[:n] - c[n:]) / (2 * FD_EPS)).reshape(z.shape)


# Tolerances: the rollout cost is O(0.01..50); central differences at eps 1e-6 carry rounding ~1e-16 * 50 / 1e-6
# = 5e-9 absolute and truncation ~1e-12; measured worst disagreement 1.1e-8 (double integrator, cost ~50), 3e-9
# or less elsewhere. atol 1e-7 and rtol 1e-5 leave margin yet catch a wrong derivative in any one step of the
# chain (an error of O(dt * 1e-2) or more in the gradient).
BPTT_TOL = dict(rtol=1e-5, atol=1e-7)


@pytest.mark.parametrize("integrator", INTEGRATORS)
@pytest.mark.parametrize("name", NAMES)
def test_bptt_rollout_cost_matches_finite_differences(name, integrator):
    system = envs.build(name, integrator=integrator)
    centre, half = action_map(system)
    g = torch.Generator().manual_seed(4)
    x0 = system.sample_initial(1, g, F64)
    v = 0.8 * (2 * torch.rand(T, 1, system.action_dim, generator=g, dtype=F64) - 1)

    # autograd through the whole horizon
    x0_ = x0.clone().requires_grad_(True)
    v_ = v.clone().requires_grad_(True)
    total_cost(system, x0_, v_, centre, half).sum().backward()

    # finite differences w.r.t. the action sequence: perturbed copies along the batch axis
    v_rows = v.permute(1, 0, 2)  # (1, T, m)
    fd_v = central_differences(lambda vs: total_cost(system, x0.expand(vs.shape[0], -1), vs.permute(1, 0, 2),
                                                     centre, half), v_rows).permute(1, 0, 2)
    fd_x = central_differences(lambda xs: total_cost(system, xs, v.expand(-1, xs.shape[0], -1), centre, half), x0)

    assert v_.grad.abs().max() > 1e-4 and x0_.grad.abs().max() > 1e-4  # the gradients are not trivially zero
    torch.testing.assert_close(v_.grad, fd_v, **BPTT_TOL)
    torch.testing.assert_close(x0_.grad, fd_x, **BPTT_TOL)
