"""Soft contact (:mod:`envs.contact`) and the two systems built on it, the pogo robot and the paddle.

References: the coefficient of restitution of a linear spring-dashpot (Kelvin-Voigt) contact,
``e = exp(-zeta pi / sqrt(1 - zeta^2))`` with ``zeta = c / (2 sqrt(k m))``, is the standard result of the damped
linear oscillator released after half a period (Stronge, *Impact Mechanics*, 2000; from memory); the
friction cone ``|F_t| <= mu N`` is Coulomb's law; ballistic flight, the two-body oscillator and the static
equilibria are derived in the comments where they are used. Gradients: float64 ``torch.autograd.gradcheck``
(central differences; PyTorch docs) away from, at and across the contact onset.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp
from torch.autograd import gradcheck

import envs
from envs.contact import friction_force, kelvin_voigt_restitution, normal_force, smooth_penetration
from envs.pogo import Pogo, PogoParams
from envs.integrators import INTEGRATORS
from envs.paddle import Paddle, PaddleParams

F64 = torch.float64
# gradcheck tolerances as in tests/test_gradients.py (central differences at eps 1e-6 in float64: truncation
# ~eps^2 |f'''|, rounding ~1e-16 |f| / eps; both far below atol 1e-7 + rtol 1e-5 for the O(1..1e3) values here,
# and far below the O(1e-2) relative error of a missing derivative term). The contact curvature is k / w: with
# the widths used below (>= 2e-4 m) eps = 1e-6 m resolves it (eps / w <= 5e-3).
GC = dict(eps=1e-6, atol=1e-7, rtol=1e-5)


def rollout(system, x0, actions):
    """States ``(T+1, B, n)`` from ``x0`` under ``actions`` ``(T, B, m)``."""
    xs = [x0]
    for u in actions:
        xs.append(system.step(xs[-1], u))
    return torch.stack(xs)


def zoh_reference(rhs, y0, actions, hold):
    """DOP853 (rtol = atol = 1e-11) of ``y' = rhs(y, u)`` with each action held for ``hold`` seconds, one solve
    per hold so no solve straddles a jump in ``u``; the states at the hold boundaries, ``(len(actions) + 1, n)``."""
    ys = [np.asarray(y0, dtype=float)]
    for u in actions:
        sol = solve_ivp(lambda t, y: rhs(y, u), (0.0, hold), ys[-1], method="DOP853", rtol=1e-11, atol=1e-11)
        assert sol.success
        ys.append(sol.y[:, -1])
    return np.stack(ys)


def np_contact(gap: float, rate: float, k: float, c: float, w: float) -> tuple[float, float]:
    """Smoothed penetration and its rate, written here: d = w log(1 + exp(-g / w)), d' = -g' / (1 + exp(g / w))."""
    return w * np.logaddexp(0.0, -gap / w), -rate / (1.0 + np.exp(gap / w))


# ---------------------------------------------------------------------------------------------------------------
# the contact law
# ---------------------------------------------------------------------------------------------------------------
# (stiffness N/m, damping N s/m, mass kg, impact speed m/s): elastic, lightly damped (zeta 0.025), a soft ball
# (zeta 0.1) and a dead, foot-like landing (zeta 0.5); one row each, integrated together as a batch.
BOUNCE_CASES = torch.tensor([[1e3, 0.0, 1.0, 1.0], [1e4, 5.0, 1.0, 2.0], [200.0, 0.6, 0.05, 4.0],
                             [3000.0, 30.0, 0.3, 0.5]], dtype=F64)
# Tolerances on the kinetic-energy ratio, relative, measured at w = 1e-5 m and w_max dt = 0.01: RK4 at most 4.7e-4
# (the smoothed onset itself, w / max penetration ~ 1e-3, not the time step), semi-implicit Euler at most 1.1e-2
# at w dt = 0.01 and 5.5e-3 at 0.005 (first order in dt; the zeta = 0.5 row). A 10 % error in zeta moves e^2 by
# 4 % (zeta 0.1) to 40 % (zeta 0.5), and a lost damping term turns the elastic row's 1 into e^2.
BOUNCE_TOL = {"rk4": (0.01, 1.5e-3), "semi_implicit_euler": (0.005, 1e-2)}  # (w_max dt, rtol)


@pytest.mark.parametrize("integrator", sorted(INTEGRATORS))
def test_bouncing_mass_energy_matches_kelvin_voigt_restitution(integrator):
    # A mass falls onto a fixed surface at speed v0 without gravity; after the contact it leaves at e v0, so its
    # kinetic energy is scaled by e^2 whatever v0 is (linear model: the restitution is speed-independent).
    k, c, m, v0 = BOUNCE_CASES.T
    w_dt, rtol = BOUNCE_TOL[integrator]
    smoothing = 1e-5  # sharp onset: at most 1/500 of the peak penetration (v0 / w_n >= 5e-3 m)
    omega = torch.sqrt(k / m)
    dt = w_dt / float(omega.max())
    accel = lambda q, qd, u: (normal_force(q[:, 0], qd[:, 0], k, c, smoothing) / m).unsqueeze(-1)
    q = torch.full((4, 1), 1e-3, dtype=F64)  # 1 mm above the surface, approaching
    qd = -v0[:, None]
    u = torch.zeros(4, 1, dtype=F64)
    # long enough for the slowest row to arrive, bounce (half a damped period) and move clear
    steps = int((1e-3 / float(v0.min()) + 1.5 * math.pi / float(omega.min())) / dt)
    for _ in range(steps):
        q, qd = INTEGRATORS[integrator](accel, q, qd, u, dt)
    assert (q[:, 0] > 10 * smoothing).all() and (qd[:, 0] > 0).all()  # every mass has left the surface
    zeta = c / (2 * torch.sqrt(k * m))
    e = torch.exp(-zeta * math.pi / torch.sqrt(1 - zeta ** 2))  # written here, independently of envs.contact
    torch.testing.assert_close((qd[:, 0] / v0) ** 2, e ** 2, rtol=rtol, atol=0.0)
    # ... and the library's closed form is the same formula (exactly, up to float64 rounding)
    torch.testing.assert_close(kelvin_voigt_restitution(k, c, m), e, rtol=1e-14, atol=0.0)
    assert kelvin_voigt_restitution(1e3, 80.0, 1.0) == 0.0  # overdamped (zeta 1.26): never released


def test_normal_force_is_tiny_but_nonzero_before_contact_and_linear_inside():
    k, c, w = 1500.0, 20.0, 1e-3
    gap = torch.tensor([10 * w, 5 * w, 0.0, -0.05, -0.1], dtype=F64, requires_grad=True)
    rate = torch.tensor([-1.0, -1.0, 0.0, -0.5, 0.5], dtype=F64)
    n = normal_force(gap, rate, k, c, w)
    (dn_dgap,) = torch.autograd.grad(n.sum(), gap)
    # Closed form of the smoothed model, N = k w log(1 + e^(-g/w)) - c s g' with s = sigmoid(-g/w), and its slope
    # dN/dg = -k s + c g' s (1 - s) / w. Ahead of contact (g = 5w, 10w) both are nonzero but bounded by
    # e^(-g/w) (k w + c |g'|) and e^(-g/w) (k + c |g'| / w) (as s < e^(-g/w)): at g = 10 w, 1e-3 N and 1 N/m,
    # against the 15 N and 1500 N/m of a 1 cm squash. (rtol 1e-12: the same quantities in another arithmetic.)
    g_, s = gap.detach(), torch.sigmoid(-gap.detach() / w)
    torch.testing.assert_close(n.detach(), k * w * torch.log1p(torch.exp(-g_ / w)) - c * s * rate, rtol=1e-12,
                               atol=0.0)
    torch.testing.assert_close(dn_dgap, -k * s + c * rate * s * (1 - s) / w, rtol=1e-12, atol=0.0)
    ahead = torch.exp(-g_[:2] / w)
    assert (n[:2] > 0).all() and (n[:2] < ahead * (k * w + c * rate[:2].abs())).all()
    assert (dn_dgap[:2] < 0).all() and (dn_dgap[:2].abs() < ahead * (k + c * rate[:2].abs() / w)).all()
    assert dn_dgap[0].abs() < 1e-3 * k
    # deep inside (|g| >= 50 w) it is the Kelvin-Voigt law k d + c d' with d = -g (rtol 1e-12: the softplus
    # correction w e^(-|g|/w) is below 1e-24 m there)
    d, dd = -gap.detach()[3:], -rate[3:]
    torch.testing.assert_close(n.detach()[3:], k * d + c * dd, rtol=1e-12, atol=0.0)
    torch.testing.assert_close(dn_dgap[3:], torch.full((2,), -k, dtype=F64), rtol=1e-12, atol=0.0)
    # the penetration tends to max(-g, 0) as w -> 0, never negative (atol: w log 2 at the onset)
    g = torch.linspace(-0.01, 0.01, 101, dtype=F64)
    for width in (1e-3, 1e-5):
        pen = smooth_penetration(g, width)
        assert (pen >= 0).all()
        torch.testing.assert_close(pen, torch.relu(-g), rtol=0.0, atol=width * math.log(2) * 1.0001)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_friction_never_leaves_the_cone_and_opposes_slip(dtype):
    g = torch.Generator().manual_seed(0)
    n = 10 ** (4 * torch.rand(10_000, generator=g, dtype=dtype) - 2) * torch.sign(torch.randn(10_000, generator=g,
                                                                                                 dtype=dtype))
    v = 10 ** (6 * torch.rand(10_000, generator=g, dtype=dtype) - 4) * torch.sign(torch.randn(10_000, generator=g,
                                                                                                 dtype=dtype))
    mu = 2 * torch.rand(10_000, generator=g, dtype=dtype)
    eps = 10 ** (2 * torch.rand(10_000, generator=g, dtype=dtype) - 3)
    ft = friction_force(n, v, mu, eps)
    assert ft.dtype == dtype and torch.isfinite(ft).all()
    # Coulomb's cone |F_t| <= mu N for a compressive N; a tensile N (the Kelvin-Voigt pull just before release)
    # carries none. Exact: |tanh| <= 1 in floating point, and the product is rounded once more (1 ulp margin).
    bound = mu * torch.relu(n) * (1 + torch.finfo(dtype).eps)
    assert (ft.abs() <= bound).all()
    assert (ft[n <= 0] == 0).all()
    assert (ft * v <= 0).all()  # it never pushes along the slip
    # far from stick it is Coulomb's mu N (tanh(20) = 1 - 8e-18), within v_eps it is viscous, mu N v / v_eps
    fast, slow = v.abs() > 20 * eps, v.abs() < 1e-3 * eps
    torch.testing.assert_close(ft[fast & (n > 0)].abs(), (mu * n)[fast & (n > 0)], rtol=1e-6, atol=0.0)
    torch.testing.assert_close(ft[slow & (n > 0)], (-mu * n * v / eps)[slow & (n > 0)], rtol=1e-5, atol=0.0)


def test_contact_force_gradcheck_away_from_at_and_across_onset():
    w = 1e-3
    gaps = torch.tensor([20 * w, 3 * w, 0.4 * w, 0.0, -0.5 * w, -3 * w, -0.02], dtype=F64, requires_grad=True)
    rates = torch.tensor([-1.0, -0.3, -0.1, 0.2, 0.05, 0.4, -2.0], dtype=F64, requires_grad=True)
    k = torch.full((7,), 1500.0, dtype=F64, requires_grad=True)
    c = torch.full((7,), 20.0, dtype=F64, requires_grad=True)
    width = torch.full((7,), w, dtype=F64, requires_grad=True)
    assert gradcheck(normal_force, (gaps, rates, k, c, width), **GC)
    # friction: slip speeds around stick (|v| ~ v_eps) and in the Coulomb regime; normal forces compressive only
    # (relu's kink at N = 0 is where the friction vanishes; gradcheck would straddle it)
    normal = torch.tensor([0.5, 3.0, 20.0, 60.0, 1.0, 8.0, 0.1], dtype=F64, requires_grad=True)
    slip = torch.tensor([-0.3, -0.05, 0.0, 0.01, 0.2, 2.0, -5.0], dtype=F64, requires_grad=True)
    mu = torch.full((7,), 0.8, dtype=F64, requires_grad=True)
    v_eps = torch.full((7,), 0.2, dtype=F64, requires_grad=True)
    assert gradcheck(friction_force, (normal, slip, mu, v_eps), **GC)


# ---------------------------------------------------------------------------------------------------------------
# the pogo robot
# ---------------------------------------------------------------------------------------------------------------
def pogo_stance(params: PogoParams, x: float = 0.0) -> torch.Tensor:
    """The standing equilibrium, derived here: the leg vertical and shortened by the body's weight,
    ``l = l0 - M g / k_l``; the foot's smoothed penetration carrying the whole weight, ``k_c d = (M + m) g``, so
    its gap solves ``w log(1 + exp(-g / w)) = d``: ``g = -w log(expm1(d / w))``."""
    p = params
    d = (p.body_mass + p.foot_mass) * p.gravity / p.contact_stiffness
    foot_z = -p.contact_smoothing * math.log(math.expm1(d / p.contact_smoothing))
    leg = p.leg_rest_length - p.body_mass * p.gravity / p.leg_stiffness
    return torch.tensor([[x, foot_z + leg, 0.0, -leg, 0.0, 0.0, 0.0, 0.0]], dtype=F64)


@pytest.mark.parametrize("params", [PogoParams(), PogoParams(body_mass=3.0, leg_stiffness=900.0,
                                                                 contact_smoothing=1e-4, gravity=3.7)],
                         ids=["default", "heavy-low-gravity"])
def test_pogo_standing_is_an_equilibrium(params):
    system = Pogo(params)
    x = pogo_stance(params, x=0.7)
    # atol 1e-9 m/s^2: the residual is float64 rounding of forces ~20 N over masses ~1 kg (plus the body's
    # contact force, k w exp(-0.35 / w) ~ 0); a wrong sign or a missing weight term leaves >= 1 m/s^2
    torch.testing.assert_close(system.derivative(x, torch.zeros(1, 2, dtype=F64)), torch.zeros(1, 8, dtype=F64),
                               rtol=0.0, atol=1e-9)
    # the record's sharp-contact standing height agrees up to the smoothing (a few widths)
    assert abs(float(x[0, 1]) - float(params.standing_height)) < 3 * params.contact_smoothing
    # ... and from there a leg thrust lifts the body and a positive swing force pushes it forward (+x)
    xx = x.expand(2, -1)
    a = system.acceleration(xx[:, :4], xx[:, 4:], torch.tensor([[5.0, 0.0], [0.0, 2.0]], dtype=F64))
    # at the equilibrium with the foot at rest (zero slip: no friction yet) the body feels exactly u / M
    torch.testing.assert_close(a[:, :2], torch.tensor([[0.0, 5.0], [2.0, 0.0]], dtype=F64) / params.body_mass,
                               rtol=0.0, atol=1e-9)


def test_pogo_lying_on_the_mat_is_an_equilibrium_and_not_a_success():
    # Fallen over: the body's disc and the foot each rest on the mat carrying their own weight (gaps from
    # k d = M g and k d = m g as above), the leg at its rest length so it pushes nowhere; and the body, at the
    # mark but only a disc radius high, has not succeeded.
    system = envs.build("pogo")
    p = system.params

    def rest_gap(weight: float) -> float:
        return -p.contact_smoothing * math.log(math.expm1(weight / p.contact_stiffness / p.contact_smoothing))

    body_z, foot_z = p.body_radius + rest_gap(p.body_mass * p.gravity), rest_gap(p.foot_mass * p.gravity)
    dz = foot_z - body_z
    x = torch.tensor([[system.task.mark, body_z, math.sqrt(p.leg_rest_length ** 2 - dz ** 2), dz, 0.0, 0.0, 0.0,
                       0.0]], dtype=F64)
    # atol 1e-9 m/s^2: rounding of ~15 N forces, as for standing; a body disc of the wrong radius leaves ~10 m/s^2
    torch.testing.assert_close(system.derivative(x, torch.zeros(1, 2, dtype=F64)), torch.zeros(1, 8, dtype=F64),
                               rtol=0.0, atol=1e-9)
    states = x.expand(round(1.0 / system.dt), 1, 8)
    assert system.success(states, torch.zeros(states.shape[0] - 1, 1, 2, dtype=F64)).tolist() == [False]


@pytest.mark.parametrize("integrator", sorted(INTEGRATORS))
def test_pogo_flight_is_ballistic_whatever_the_actions(integrator):
    # In flight only gravity acts on the pair from outside: the centre of mass follows
    # c(t) = c0 + v0 t - g t^2 / 2 e_z exactly (Newton's third law makes leg forces cancel in the sum). RK4
    # integrates constant acceleration exactly; semi-implicit Euler gives c0 + v0 t - g t (t + dt) / 2 (sum the
    # velocity updates: v_n = v0 - n g dt, x_n = x0 + dt sum_{i=1..n} v_i).
    system = envs.build("pogo", integrator=integrator)
    g = torch.Generator().manual_seed(3)
    x0 = torch.tensor([[0.0, 2.0, 0.05, -0.5, 0.8, 3.0, 0.0, 0.0],
                       [1.0, 2.5, -0.1, -0.45, -0.5, 2.0, 0.5, -0.3]], dtype=F64)
    steps = int(0.6 / system.dt)
    lim = torch.tensor(system.action_high, dtype=F64)
    actions = lim * (2 * torch.rand(steps, 2, 2, generator=g, dtype=F64) - 1)  # full-range random actions
    xs = rollout(system, x0, actions)
    assert (xs[:, :, 1] + xs[:, :, 3] > 0.3).all()  # the foot never came near the mat
    com = system.centre_of_mass(xs)  # (T+1, B, 2)
    frac = system.params.foot_mass / (system.params.body_mass + system.params.foot_mass)
    c0, v0 = x0[:, 0:2] + frac * x0[:, 2:4], x0[:, 4:6] + frac * x0[:, 6:8]
    t = system.dt * torch.arange(steps + 1, dtype=F64)[:, None, None]
    drop = t * (t + system.dt) if integrator == "semi_implicit_euler" else t ** 2
    expected = c0 + v0 * t - 0.5 * system.params.gravity * drop * torch.tensor([0.0, 1.0], dtype=F64)
    # atol 1e-10 m: float64 rounding of ~200 steps of forces up to 40 N that cancel between the two masses
    torch.testing.assert_close(com, expected, rtol=0.0, atol=1e-10)
    # the actions did do something: the leg moved relative to the body
    assert (xs[-1, :, 2:4] - x0[:, 2:4]).abs().max() > 0.05


def test_pogo_leg_oscillates_at_the_two_body_frequency_in_flight():
    # Without leg damping, in flight the leg length obeys mu l'' = -k_l (l - l0) with the reduced mass
    # mu = M m / (M + m) (two bodies on a spring): l(t) = l0 + a cos(w t), w = sqrt(k_l / mu).
    params = PogoParams(leg_damping=0.0)
    system = Pogo(params, dt=0.001)
    amp = 0.02
    x0 = torch.tensor([[0.0, 3.0, 0.0, -(params.leg_rest_length + amp), 0.0, 0.0, 0.0, 0.0]], dtype=F64)
    steps = 400
    xs = rollout(system, x0, torch.zeros(steps, 1, 2, dtype=F64))
    length = torch.hypot(xs[:, 0, 2], xs[:, 0, 3])
    mu = params.body_mass * params.foot_mass / (params.body_mass + params.foot_mass)
    t = system.dt * torch.arange(steps + 1, dtype=F64)
    expected = params.leg_rest_length + amp * torch.cos(math.sqrt(params.leg_stiffness / mu) * t)
    # atol 5e-9 m: RK4's phase error on an oscillator is ~(w dt)^5 / 120 per step, 3e-10 rad at w dt = 0.033,
    # 1.2e-7 rad after 400 steps, times the 2 cm amplitude: 2.5e-9 m (measured 2.1e-9). A wrong mass in the leg
    # equation shifts the frequency by >= 10 % and the length by ~1e-2 m.
    torch.testing.assert_close(length, expected, rtol=0.0, atol=5e-9)


def pogo_rhs_absolute(p: PogoParams):
    """The pogo robot in absolute coordinates (body b, foot f), written here from the module docstring's model: the
    leg's spring, damper and thrust act along e = (b - f) / |b - f| with magnitude
    k_l (l0 - l) - c_l l' + u_1, the swing actuator along (e_z, -e_x), foot and body on the mat through the
    smoothed Kelvin-Voigt force and tanh friction."""
    def mat(height, vx, vz):
        d, dd = np_contact(height, vz, p.contact_stiffness, p.contact_damping, p.contact_smoothing)
        n = p.contact_stiffness * d + p.contact_damping * dd
        return -p.friction_coefficient * max(n, 0.0) * np.tanh(vx / p.friction_smoothing), n

    def rhs(y, u):
        b, f, vb, vf = y[0:2], y[2:4], y[4:6], y[6:8]
        r = b - f
        l = np.linalg.norm(r)
        e = r / l
        l_rate = e @ (vb - vf)
        leg = (p.leg_stiffness * (p.leg_rest_length - l) - p.leg_damping * l_rate + u[0]) * e
        leg = leg + u[1] * np.array([e[1], -e[0]])
        tb, nb = mat(b[1] - p.body_radius, vb[0], vb[1])
        tf, nf = mat(f[1], vf[0], vf[1])
        ab = (leg + np.array([tb, nb])) / p.body_mass - np.array([0.0, p.gravity])
        af = (-leg + np.array([tf, nf])) / p.foot_mass - np.array([0.0, p.gravity])
        return np.concatenate([vb, vf, ab, af])

    return rhs


def pogo_landing(dt: float, integrator: str = "rk4") -> tuple[torch.Tensor, torch.Tensor]:
    """Dropped 4 cm onto the mat with the leg leaning and the body drifting, then 0.45 s of random actions held
    for 15 ms each: touch-down, slipping and sticking, thrusts that may lift it off again. Returns the
    trajectory of envs and of the reference, both in absolute coordinates ``(31, 8)``: body, foot, their rates."""
    hold, pieces = 0.015, 30
    per_hold = round(hold / dt)
    system = envs.build("pogo", dt=hold / per_hold, integrator=integrator)
    g = torch.Generator().manual_seed(5)
    actions = torch.tensor(system.action_high, dtype=F64) * (2 * torch.rand(pieces, 2, generator=g,
                                                                           dtype=F64) - 1)
    x0 = torch.tensor([[0.0, 0.51, 0.06, -0.467, 0.3, -0.2, 0.1, 0.0]], dtype=F64)
    xs = rollout(system, x0, actions.repeat_interleave(per_hold, 0)[:, None, :])[::per_hold, 0]
    absolute = torch.cat([xs[:, 0:2], xs[:, 0:2] + xs[:, 2:4], xs[:, 4:6], xs[:, 4:6] + xs[:, 6:8]], dim=-1)
    ref = zoh_reference(pogo_rhs_absolute(system.params), absolute[0].numpy(), actions.numpy(), hold)
    return absolute, torch.from_numpy(ref)


def test_pogo_landing_and_push_off_match_independent_equations():
    absolute, ref = pogo_landing(dt=2.5e-4)
    assert ref[:, 3].min() < -5e-3 and ref[:, 3].max() > 0  # it did land and squash the mat
    # atol 2e-6 (m, m/s): RK4 at 0.25 ms, measured 8.1e-7 (1.5e-7 at half the step: about second order, not
    # fourth, because friction has a kink where the normal force changes sign, see envs.contact). Measured for
    # deliberate mistakes: a foot damping on the wrong velocity, a friction on the relative slip or a swapped
    # swing direction differ by 0.5 to 1.8.
    torch.testing.assert_close(absolute, ref, rtol=0.0, atol=2e-6)


@pytest.mark.parametrize("integrator", sorted(INTEGRATORS))
def test_pogo_step_gradcheck_across_touchdown(integrator):
    # Rows: foot well clear (0.2 m), 3 widths above the mat, at the onset, and squashed 1 cm, with slip speeds
    # inside and outside the friction smoothing; the falling rows reach the mat during the step. Derivatives
    # w.r.t. the state, the actions and the contact parameters (as (B,) tensors, for smoothing schedules).
    system = envs.build("pogo", integrator=integrator)
    p = system.params
    w = p.contact_smoothing
    foot_z = torch.tensor([0.2, 3 * w, 0.0, -0.01], dtype=F64)
    x = torch.tensor([[0.0, 0.47, 0.02, -0.47, 0.3, -1.0, 0.0, 0.0]], dtype=F64).repeat(4, 1)
    x[:, 1] = foot_z - x[:, 3]
    x[:, 4] = torch.tensor([0.3, 0.05, -0.1, 0.5], dtype=F64)  # body (and, with zero relative rate, foot) slip
    v = torch.tensor([[0.2, -0.5], [1.0, 0.3], [-0.4, 0.9], [0.6, -1.0]], dtype=F64)
    lim = torch.tensor(system.action_high, dtype=F64)
    ones = torch.ones(4, dtype=F64)

    def step(x, v, k, c, s, mu):
        s_ = system.replace(params=dataclasses.replace(p, contact_stiffness=p.contact_stiffness * k,
                                                       contact_damping=p.contact_damping * c,
                                                       contact_smoothing=w * s, friction_coefficient=mu))
        return s_.step(x, lim * v)

    args = [t.clone().requires_grad_(True) for t in (x, v, ones, ones, ones, ones)]
    assert gradcheck(step, tuple(args), **GC)


# ---------------------------------------------------------------------------------------------------------------
# the paddle
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("params", [PaddleParams(), PaddleParams(ball_mass=0.2, contact_smoothing=1e-3,
                                                                 contact_stiffness=800.0)],
                         ids=["default", "heavy-ball-soft-onset"])
def test_paddle_ball_resting_on_the_paddle_is_an_equilibrium(params):
    # At rest the contact carries the ball's weight, k d = m g, so the gap solves w log(1 + exp(-g / w)) = d,
    # g = -w log(expm1(d / w)); the motor then holds the paddle up against the ball: u = m g (the paddle itself
    # is counterbalanced).
    system = Paddle(params)
    d = params.ball_mass * params.gravity / params.contact_stiffness
    gap = -params.contact_smoothing * math.log(math.expm1(d / params.contact_smoothing))
    x = torch.tensor([[0.1 + params.ball_radius + gap, 0.1, 0.0, 0.0]], dtype=F64)
    u = torch.tensor([[params.ball_mass * params.gravity]], dtype=F64)
    # atol 1e-12 m/s^2: float64 rounding of ~0.5 N over ~0.05 kg; without the motor the paddle sinks at
    # m g / M ~ 1 m/s^2, with a wrong squash the ball accelerates at >= 1e-2 m/s^2
    torch.testing.assert_close(system.derivative(x, u), torch.zeros(1, 4, dtype=F64), rtol=0.0, atol=1e-12)
    xs = rollout(system, x, u.expand(200, 1, 1))
    torch.testing.assert_close(xs[-1], x, rtol=0.0, atol=1e-12)  # and it stays there (0.8 s)
    assert float(system.derivative(x, torch.zeros(1, 1, dtype=F64))[0, 3]) < -0.5  # unheld, the paddle sinks


def paddle_rhs(p: PaddleParams):
    """The paddle and ball, written here: m zdd = N - m g, M pdd = u - b pd - N, N the smoothed Kelvin-Voigt force
    of the gap z - r - p."""
    def rhs(y, u):
        z, pz, vz, vp = y
        d, dd = np_contact(z - p.ball_radius - pz, vz - vp, p.contact_stiffness, p.contact_damping,
                           p.contact_smoothing)
        n = p.contact_stiffness * d + p.contact_damping * dd
        return [vz, vp, n / p.ball_mass - p.gravity, (u[0] - p.guide_friction * vp - n) / p.paddle_mass]

    return rhs


def test_paddle_bounce_matches_independent_equations():
    # The ball falls 3 cm onto the paddle, which random forces held for 20 ms drive; two bounces in 0.6 s.
    hold, per_hold, pieces = 0.02, 80, 30
    system = envs.build("paddle", dt=hold / per_hold)  # 0.25 ms: resolves the 0.2 mm onset at ~1 m/s
    g = torch.Generator().manual_seed(6)
    actions = system.params.force_limit * (2 * torch.rand(pieces, 1, generator=g, dtype=F64) - 1)
    x0 = torch.tensor([[system.params.ball_radius + 0.03, 0.0, -0.5, 0.2]], dtype=F64)
    xs = rollout(system, x0, actions.repeat_interleave(per_hold, 0)[:, None, :])[::per_hold, 0]
    ref = torch.from_numpy(zoh_reference(paddle_rhs(system.params), x0[0].numpy(), actions.numpy(), hold))
    gap = ref[:, 0] - system.params.ball_radius - ref[:, 1]
    assert gap.min() < -5e-3 and gap.max() > 0.01  # in contact and in flight
    # atol 2e-5 (m, m/s): RK4 at 0.25 ms, measured 4.4e-6 (1.8e-4 at 0.5 ms: the onset is then unresolved);
    # leaving out the paddle's reaction or the guide friction moves the paddle by 0.17 m and 0.31 m (measured).
    torch.testing.assert_close(xs, ref, rtol=0.0, atol=2e-5)


@pytest.mark.parametrize("integrator", sorted(INTEGRATORS))
def test_default_time_steps_resolve_the_contacts(integrator):
    # The default steps are what training uses: check they are fine enough for the contact stiffness.
    # Paddle: restitution of a free paddle-ball impact (closed form, as above) at 1 to 5 m/s and eight phases of
    # the onset within a step; measured within 1.6 % (RK4) and 2.8 % (semi-implicit Euler) at 4 ms. Bound 5 %.
    params = PaddleParams(guide_friction=0.0, gravity=1e-9)
    system = Paddle(params, integrator=integrator)
    speeds = torch.tensor([1.0, 3.0, 5.0], dtype=F64).repeat_interleave(8)
    phase = torch.arange(8, dtype=F64).repeat(3) / 8
    x0 = torch.stack([params.ball_radius + 0.01 + phase * speeds * system.dt, torch.zeros_like(speeds), -speeds,
                      torch.zeros_like(speeds)], dim=-1)
    xs = rollout(system, x0, torch.zeros(round(0.15 / system.dt), 24, 1, dtype=F64))
    assert (system.gap(xs[-1]) > 0).all()
    e = (xs[-1, :, 2] - xs[-1, :, 3]) / speeds
    torch.testing.assert_close(e, torch.full_like(e, params.restitution), rtol=0.05, atol=0.0)
    # Pogo: the landing above at the default 3 ms against the reference; measured 7.8e-6 m (RK4) and 3.7e-3 m
    # (semi-implicit Euler, first order) in position. Bounds 1e-4 m and 1e-2 m, about 10x and 3x the measurements.
    absolute, ref = pogo_landing(dt=envs.system_class("pogo").default_dt, integrator=integrator)
    torch.testing.assert_close(absolute[:, :4], ref[:, :4], rtol=0.0, atol=1e-4 if integrator == "rk4" else 1e-2)


@pytest.mark.parametrize("integrator", sorted(INTEGRATORS))
def test_paddle_free_flight_and_free_paddle_match_closed_forms(integrator):
    # Ball far above the paddle: z(t) = z0 + v0 t - g t^2 / 2 (semi-implicit Euler: g t (t + dt) / 2, as for the
    # pogo robot). Paddle under a constant force u with guide friction b: M p'' = u - b p', so
    # p'(t) = u / b + (p'0 - u / b) e^(-b t / M), p(t) = p0 + u t / b + (p'0 - u / b) M / b (1 - e^(-b t / M)).
    system = envs.build("paddle", integrator=integrator)
    p = system.params
    x0 = torch.tensor([[2.0, -0.3, 4.0, 0.2], [3.0, 0.0, -1.0, -0.1]], dtype=F64)
    force = torch.tensor([[12.0], [-7.0]], dtype=F64)
    steps = int(0.5 / system.dt)
    xs = rollout(system, x0, force.expand(steps, 2, 1))
    assert (system.gap(xs) > 0.5).all()  # never near contact
    t = system.dt * torch.arange(steps + 1, dtype=F64)[:, None]
    drop = t * (t + system.dt) if integrator == "semi_implicit_euler" else t ** 2
    torch.testing.assert_close(xs[:, :, 0], x0[:, 0] + x0[:, 2] * t - 0.5 * p.gravity * drop, rtol=0.0, atol=1e-12)
    if integrator == "rk4":
        # atol 1e-9 m: RK4's global error at (b / M) dt = 0.008 is ~(b dt / M)^4 / 120 relative per unit time
        # (~1e-11), the rounding of 125 steps smaller; a missing friction term is off by ~0.1 m
        u, b, m = force[:, 0], p.guide_friction, p.paddle_mass
        decay = torch.exp(-b * t / m)
        vel = u / b + (x0[:, 3] - u / b) * decay
        pos = x0[:, 1] + u * t / b + (x0[:, 3] - u / b) * m / b * (1 - decay)
        torch.testing.assert_close(xs[:, :, 1], pos, rtol=0.0, atol=1e-9)
        torch.testing.assert_close(xs[:, :, 3], vel, rtol=0.0, atol=1e-9)


@pytest.mark.parametrize("integrator", sorted(INTEGRATORS))
def test_paddle_impact_conserves_momentum_and_has_the_closed_form_restitution(integrator):
    # A free paddle (no motor, no guide friction) and gravity negligible: the contact is internal, so
    # m z' + M p' is conserved exactly by both integrators (they preserve linear invariants), and the relative
    # velocity reverses scaled by the Kelvin-Voigt restitution of the reduced mass (sharp onset, small dt).
    params = PaddleParams(guide_friction=0.0, gravity=1e-9, contact_smoothing=1e-6)
    omega = math.sqrt(params.contact_stiffness / params.effective_mass)
    system = Paddle(params, dt=0.005 / omega, integrator=integrator)
    x0 = torch.tensor([[params.ball_radius + 1e-3, 0.0, -3.0, 0.5]], dtype=F64)
    steps = int((1e-3 / 3.5 + 1.3 * math.pi / omega) / system.dt)
    xs = rollout(system, x0, torch.zeros(steps, 1, 1, dtype=F64))
    momentum = params.ball_mass * xs[:, 0, 2] + params.paddle_mass * xs[:, 0, 3]
    t = system.dt * torch.arange(steps + 1, dtype=F64)
    expected = momentum[0] - params.ball_mass * params.gravity * t  # the (3e-12 kg m/s) impulse of the weight
    # atol 1e-14 kg m/s: rounding only (the momentum is ~0.1 kg m/s)
    torch.testing.assert_close(momentum, expected, rtol=0.0, atol=1e-14)
    assert system.gap(xs[-1]) > 0  # separated again
    rel0, rel1 = float(x0[0, 2] - x0[0, 3]), float(xs[-1, 0, 2] - xs[-1, 0, 3])
    # rtol: at w dt = 0.005 measured 1.2e-4 (RK4) and 3.0e-4 (semi-implicit Euler); the restitution of the wrong
    # mass (the ball's instead of the pair's) is 1 % off, a missing damping term 23 %
    tol = 5e-4 if integrator == "rk4" else 1e-3
    assert -rel1 / rel0 == pytest.approx(params.restitution, rel=tol)


def test_paddle_success_predicate_on_synthetic_trajectories():
    # Ballistic arcs drawn here (no simulation): a ball bouncing off a still paddle at z = r with apex h, the
    # paddle at home; the predicate must accept h = target and reject a low bounce, a ball lying on the paddle,
    # a paddle lifted out of its travel, and a good bounce that only starts in the last half of the window.
    system = envs.build("paddle")
    t, p = system.task, system.params
    dt, n = system.dt, round(3.0 / system.dt)

    def bouncing(apex: float, paddle: float = 0.0) -> torch.Tensor:
        rise = apex - p.ball_radius  # the ball leaves the paddle top at sqrt(2 g rise)
        period = 2 * math.sqrt(2 * rise / p.gravity)
        tau = torch.remainder(dt * torch.arange(n, dtype=F64), period)
        v0 = math.sqrt(2 * p.gravity * rise)
        z = paddle + p.ball_radius + 1e-4 + v0 * tau - 0.5 * p.gravity * tau ** 2
        vz = v0 - p.gravity * tau
        return torch.stack([z, torch.full_like(z, paddle), vz, torch.zeros_like(z)], dim=-1)

    good = bouncing(t.target)
    low = bouncing(t.target - 0.3)
    resting = torch.tensor([p.ball_radius - 2e-3, 0.0, 0.0, 0.0], dtype=F64).expand(n, 4)
    lifted = bouncing(t.target + 0.3, paddle=0.3)  # apex 1.3 m above home, 1.0 m above the lifted paddle
    late = torch.cat([resting[: n - round(0.8 / dt)], good[: round(0.8 / dt)]])
    states = torch.stack([good, low, resting, lifted, late], dim=1)  # (n, 5, 4)
    ok = system.success(states, torch.zeros(n - 1, 5, 1, dtype=F64))
    assert ok.tolist() == [True, False, False, False, False]


def test_paddle_gradcheck_through_a_bounce():
    # A multi-step gradient across the whole impact: 30 steps (0.12 s) from 2 mm above the paddle at 2 m/s, so
    # contact starts in the first step and ends inside the window; derivatives w.r.t. the initial state, the
    # action sequence and the contact smoothing. Both rows bounce; they differ in impact speed and paddle motion.
    system = envs.build("paddle")
    p = system.params
    x0 = torch.tensor([[p.ball_radius + 2e-3, 0.0, -2.0, 0.3], [p.ball_radius + 4e-3, 0.01, -3.0, -0.2]], dtype=F64)
    v = 0.5 * torch.ones(30, 2, 1, dtype=F64)

    def final(x0, v, s):
        s_ = system.replace(params=dataclasses.replace(p, contact_smoothing=p.contact_smoothing * s))
        return rollout(s_, x0, p.force_limit * v)[-1]

    with torch.no_grad():
        xs = rollout(system, x0, p.force_limit * v)
    assert (system.gap(xs) < -5e-3).any(dim=0).all() and (system.gap(xs[-1]) > 0).all()  # in and out again
    args = (x0.clone().requires_grad_(True), v.clone().requires_grad_(True),
            torch.ones(2, dtype=F64, requires_grad=True))
    assert gradcheck(final, args, **GC)
