"""Physics checks of the simulators in :mod:`envs` against independent formulations and known results.

Every reference below is either a closed-form textbook result or an equation of motion written here, in numpy,
independently of ``envs`` and integrated with scipy's DOP853 at tight tolerances. Reference values derived in a
comment are derived there; sources named "from memory" were not re-checked against the printed page.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.special
import torch
from scipy.integrate import solve_ivp
from torch.autograd.functional import jacobian

import envs
from envs.acrobot import Acrobot, AcrobotParams
from envs.cartpole import CartPole, CartPoleParams
from envs.crane import Crane, CraneParams
from envs.double_integrator import DoubleIntegrator, DoubleIntegratorParams
from envs.pendulum import Pendulum, PendulumParams
from envs.quadrotor import Quadrotor, QuadrotorParams

F64 = torch.float64


# ---------------------------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------------------------
def rollout(system, x0, actions) -> torch.Tensor:
    """States ``(T+1, B, n)`` of ``system.step`` from ``x0`` under ``actions`` of shape ``(T, B, m)``."""
    xs = [x0]
    for u in actions:
        xs.append(system.step(xs[-1], u))
    return torch.stack(xs)


def rollout_const(system, x0, u, n_steps) -> torch.Tensor:
    return rollout(system, x0, u.expand(n_steps, *u.shape))


def zoh_reference(rhs, x0, forces, dt) -> np.ndarray:
    """Integrate ``y' = rhs(y, F)`` with ``F`` held constant over each step of length ``dt`` (zero-order hold,
    exactly what ``System.step`` assumes), one DOP853 solve per step so no step straddles a jump in ``F``.
    Returns the states at the step boundaries, shape ``(len(forces) + 1, n)``."""
    ys = [np.asarray(x0, dtype=float)]
    for f in forces:
        sol = solve_ivp(lambda t, y: rhs(y, f), (0.0, dt), ys[-1], method="DOP853", rtol=1e-10, atol=1e-10)
        assert sol.success
        ys.append(sol.y[:, -1])
    return np.stack(ys)


def zero_crossing_period(t: np.ndarray, y: np.ndarray) -> float:
    """Period of an oscillation from its zero crossings (linear interpolation between samples; at a zero
    crossing of a near-sinusoid the curvature vanishes, so the interpolation error is third order in dt)."""
    i = np.nonzero(np.sign(y[:-1]) != np.sign(y[1:]))[0]
    tc = t[i] - y[i] * (t[i + 1] - t[i]) / (y[i + 1] - y[i])
    assert len(tc) >= 5, "too few zero crossings to measure a period"
    return 2.0 * (tc[-1] - tc[0]) / (len(tc) - 1)


def linearisation(system, x_eq, u_eq) -> np.ndarray:
    """``d(dx/dt)/dx`` of the continuous-time model at ``(x_eq, u_eq)`` by autograd, float64."""
    jac = jacobian(lambda x: system.derivative(x, u_eq), x_eq)  # (1, n, 1, n)
    return jac[0, :, 0, :].numpy()


# ---------------------------------------------------------------------------------------------------------------
# pendulum
# ---------------------------------------------------------------------------------------------------------------
PENDULUM_CASES = [PendulumParams(damping=0.0), PendulumParams(mass=2.5, length=0.4, gravity=3.7, damping=0.0)]


@pytest.mark.parametrize("params", PENDULUM_CASES, ids=["default", "short-light-gravity"])
def test_pendulum_small_angle_period(params):
    # Small-angle period T0 = 2 pi sqrt(l / g) about the hanging equilibrium (th = pi here, angles from
    # upright): Halliday, Resnick & Walker, Fundamentals of Physics, ch. 15 (simple pendulum; chapter from
    # memory); Strogatz, Nonlinear Dynamics and Chaos, sec. 6.7. Mass must not enter.
    dt, n_steps, amp = 0.01, 1100, 0.01
    system = Pendulum(params, dt=dt, integrator="rk4")
    x0 = torch.tensor([[math.pi + amp, 0.0]], dtype=F64)
    xs = rollout_const(system, x0, torch.zeros(1, 1, dtype=F64), n_steps)
    t = dt * np.arange(n_steps + 1)
    measured = zero_crossing_period(t, (xs[:, 0, 0] - math.pi).numpy())
    expected = 2 * math.pi * math.sqrt(params.length / params.gravity)
    # rtol 1e-4: the finite-amplitude correction is T0 * amp^2 / 16 = 6e-6 relative (series
    # T = T0 (1 + th0^2/16 + ...), Landau & Lifshitz, Mechanics, sec. 11, problem 1; from memory); RK4's phase
    # error at w dt = 0.03 is ~(w dt)^4 / 120 ~ 1e-8 and the zero-crossing interpolation error is smaller still.
    # A wrong g/l factor or sign shows up at the 1e-1 level.
    torch.testing.assert_close(torch.tensor(measured, dtype=F64), torch.tensor(expected, dtype=F64), rtol=1e-4,
                               atol=0.0)


AMPLITUDES = (0.1, 1.0, 2.0)  # rad from hanging
# The energy checks use a fixed 1 m, frictionless pendulum (not the defaults), so their measured bounds stay put.
ENERGY_PARAMS = PendulumParams(mass=1.0, length=1.0, damping=0.0)


def pendulum_period(p: PendulumParams, amplitude: float) -> float:
    """Exact period of the undamped pendulum, 4 sqrt(l / g) K(sin^2(amplitude / 2)) with K the complete elliptic
    integral of the first kind (parameter m = k^2, scipy's convention): Landau & Lifshitz, Mechanics, sec. 11,
    problem 1 (from memory)."""
    return 4.0 * math.sqrt(p.length / p.gravity) * float(scipy.special.ellipk(math.sin(amplitude / 2) ** 2))


def _pendulum_energy_errors(integrator: str, dt: float, periods: float) -> torch.Tensor:
    """Relative energy error ``|E(t) - E(0)| / E(0)`` after each step, for each of AMPLITUDES, released from rest
    with zero torque and damping, over ``periods`` periods of the slowest (largest) swing. Shape (steps, 3)."""
    params = ENERGY_PARAMS
    system = Pendulum(params, dt=dt, integrator=integrator)
    amps = torch.tensor(AMPLITUDES, dtype=F64)
    x0 = torch.stack([math.pi - amps, torch.zeros_like(amps)], dim=-1)
    seconds = periods * pendulum_period(params, max(AMPLITUDES))  # 50 periods of the 2-rad swing: 132 s
    xs = rollout_const(system, x0, torch.zeros(3, 1, dtype=F64), int(math.ceil(seconds / dt)))
    e = system.energy(xs)
    return ((e[1:] - e[0]) / e[0]).abs()


def test_pendulum_rk4_energy_drift_over_50_periods():
    err = _pendulum_energy_errors("rk4", dt=0.02, periods=50)
    # RK4 is not symplectic: its energy error grows secularly (Hairer, Lubich & Wanner, Geometric Numerical
    # Integration, 2006, sec. I.1 and ch. IX). Measured: at most 5.6e-6 relative after 50 periods at dt = 0.02,
    # growing roughly linearly in time. Bound 1e-5 (about 2x the measurement) catches a change in the
    # dynamics or the integrator that does not conserve this energy (a first-order integrator gives ~1e-2 here).
    torch.testing.assert_close(err.max(), torch.tensor(0.0, dtype=F64), rtol=0.0, atol=1e-5)
    # ... and it is a drift, not an oscillation: the last tenth is well above the first tenth.
    n = err.shape[0] // 10
    assert (err[-n:].max(dim=0).values > 3 * err[:n].max(dim=0).values).all()


@pytest.mark.parametrize("dt", [0.05, 0.02])
def test_pendulum_semi_implicit_euler_energy_error_is_bounded(dt):
    # Semi-implicit (symplectic) Euler has a bounded energy error with no secular drift: backward error analysis,
    # Hairer, Lubich & Wanner (2006), ch. IX (long-time energy conservation; chapter from memory). The bound used
    # is derived here for the linear oscillator qdd = -w^2 q: the map p' = p - h w^2 q, q' = q + h p' conserves
    # H~ = p^2 + w^2 q^2 - h w^2 p q exactly (substitute and expand). Released from rest, H~ = H(0), and
    # |h w^2 p q| <= (h w / 2) (p^2 + w^2 q^2), so H(t) / H(0) lies in [1 / (1 + c), 1 / (1 - c)] with c = h w / 2:
    # |H / H(0) - 1| <= c / (1 - c). Larger swings oscillate more slowly and stay below it (measured).
    err = _pendulum_energy_errors("semi_implicit_euler", dt=dt, periods=50)
    c = dt * math.sqrt(ENERGY_PARAMS.gravity / ENERGY_PARAMS.length) / 2
    bound = c / (1 - c)
    # 2% slack on the derived bound: the 0.1-rad swing is not exactly linear (its frequency is lower by ~6e-4)
    # and the sampled phase decides how close the extreme of pq is approached. Measured: 0.0849 against a bound
    # of 0.0850 at dt = 0.05, 0.0323 against 0.0323 at dt = 0.02.
    assert err.max() <= 1.02 * bound, (err.max().item(), bound)
    # No secular growth over ~50 periods: the worst error in the last tenth is no larger than in the first tenth
    # (1% slack for where the samples fall on the error's oscillation). Explicit Euler would grow by orders of
    # magnitude here.
    n = err.shape[0] // 10
    torch.testing.assert_close(err[-n:].max(dim=0).values, err[:n].max(dim=0).values, rtol=1e-2, atol=0.0)


# ---------------------------------------------------------------------------------------------------------------
# comparisons against independent equations of motion (scipy DOP853, rtol = atol = 1e-10)
# ---------------------------------------------------------------------------------------------------------------
def cartpole_rhs_lagrangian(p: CartPoleParams):
    """Cart-pole from its Lagrangian, written independently of envs (uniform pole, l = half length, th from
    upright, positive towards +x). Pole centre at (x + l sin th, l cos th):
    T = 1/2 (M + m) xd^2 + m l cos(th) xd thd + 1/2 (m l^2 + m (2l)^2 / 12) thd^2,  V = m g l cos th, so
        [[M + m,       m l cos th ],   [xdd ]   [F + m l thd^2 sin th]
         [m l cos th, (4/3) m l^2 ]] * [thdd] = [m g l sin th        ]
    (derived here; the total mass M + m sits in the top-left entry). Eliminating xdd gives the explicit form of
    Barto, Sutton & Anderson (1983) and Florian (2007) that envs/cartpole.py implements. Rod inertia m (2l)^2 / 12
    about its centre: any mechanics text (Halliday, Resnick & Walker, Fundamentals of Physics, table of
    rotational inertias in ch. 10; from memory)."""
    mc, mp, l, g = p.cart_mass, p.pole_mass, p.half_length, p.gravity

    def rhs(y, f):
        x, th, xd, thd = y
        s, c = math.sin(th), math.cos(th)
        mass = np.array([[mc + mp, mp * l * c], [mp * l * c, 4.0 / 3.0 * mp * l * l]])
        rhs_ = np.array([f + mp * l * thd * thd * s, mp * g * l * s])
        xdd, thdd = np.linalg.solve(mass, rhs_)
        return [xd, thd, xdd, thdd]

    return rhs


def acrobot_rhs_spong(p: AcrobotParams):
    """Acrobot in manipulator form M(q) qdd + C(q, qd) qd + G(q) = [0, tau] (Spong, IEEE Control Systems 15(1),
    1995; the two-link arm's M and C as in Spong, Hutchinson & Vidyasagar, Robot Modeling and Control, 2006,
    ch. 7; section numbers from memory),
    derived here with th1 from hanging straight down and th2 relative to link 1. Centres of mass
    p1 = lc1 (sin th1, -cos th1),  p2 = l1 (sin th1, -cos th1) + lc2 (sin(th1 + th2), -cos(th1 + th2)),
    V = -m1 g lc1 cos th1 - m2 g (l1 cos th1 + lc2 cos(th1 + th2)), link inertias I1, I2 about the centres:
      M11 = m1 lc1^2 + m2 (l1^2 + lc2^2 + 2 l1 lc2 cos th2) + I1 + I2
      M12 = M21 = m2 (lc2^2 + l1 lc2 cos th2) + I2,   M22 = m2 lc2^2 + I2
      with h = m2 l1 lc2 sin th2 (Christoffel symbols of M):  C qd = [-h (2 th1d th2d + th2d^2), h th1d^2]
      G = dV/dq = [(m1 lc1 + m2 l1) g sin th1 + m2 lc2 g sin(th1 + th2),  m2 lc2 g sin(th1 + th2)].
    (Spong's paper measures q1 from the horizontal, so his gravity terms carry cos q1; from memory.)"""
    m1, m2, l1, lc1, lc2, i1, i2, g = (p.link_mass_1, p.link_mass_2, p.link_length_1, p.com_1, p.com_2,
                                       p.inertia_1, p.inertia_2, p.gravity)

    def rhs(y, tau):
        th1, th2, d1, d2 = y
        c2, h = math.cos(th2), m2 * l1 * lc2 * math.sin(th2)
        m11 = m1 * lc1 ** 2 + m2 * (l1 ** 2 + lc2 ** 2 + 2 * l1 * lc2 * c2) + i1 + i2
        m12 = m2 * (lc2 ** 2 + l1 * lc2 * c2) + i2
        m22 = m2 * lc2 ** 2 + i2
        cqd = np.array([-h * (2 * d1 * d2 + d2 * d2), h * d1 * d1])
        grav = np.array([(m1 * lc1 + m2 * l1) * g * math.sin(th1) + m2 * lc2 * g * math.sin(th1 + th2),
                         m2 * lc2 * g * math.sin(th1 + th2)])
        qdd = np.linalg.solve(np.array([[m11, m12], [m12, m22]]), np.array([0.0, tau]) - cqd - grav)
        return [d1, d2, qdd[0], qdd[1]]

    return rhs


def crane_rhs_mass_matrix(p: CraneParams):
    """Trolley (M) with a point load (m) on a rigid massless rope (L), phi from hanging, rolling resistance b.
    Load at (x + L sin phi, -L cos phi): T = 1/2 (M + m) xd^2 + m L cos(phi) xd phid + 1/2 m L^2 phid^2,
    V = -m g L cos phi, so, by Lagrange's equations (derived here; the same point-mass cart-pole, angle from
    hanging, appears in Tedrake, Underactuated Robotics, ch. 3; from memory):
        [[M + m,      m L cos phi],   [xdd  ]   [F - b xd + m L phid^2 sin phi]
         [m L cos phi, m L^2     ]] * [phidd] = [-m g L sin phi              ]"""
    mt, ml, length, g, b = p.trolley_mass, p.load_mass, p.rope_length, p.gravity, p.rolling_resistance

    def rhs(y, f):
        x, phi, xd, phid = y
        s, c = math.sin(phi), math.cos(phi)
        mass = np.array([[mt + ml, ml * length * c], [ml * length * c, ml * length ** 2]])
        rhs_ = np.array([f - b * xd + ml * length * phid * phid * s, -ml * g * length * s])
        xdd, phidd = np.linalg.solve(mass, rhs_)
        return [xd, phid, xdd, phidd]

    return rhs


# (system, independent rhs, dt, steps, x0, open-loop force F(t), bound on max |state error| over the trajectory)
# Bounds: the measured maxima (in the comments) times 4-6, leaving room for platform rounding while staying
# orders of magnitude below the O(1e-2..1) differences any wrong term in the equations produces over these
# large-angle trajectories. The residual is RK4's own O(dt^4) global error, not a model difference: halving dt
# divides each measured error by 15-20 (checked when choosing the bounds). The reference's own error
# (DOP853, rtol = atol = 1e-10 per step) is below 1e-9 of that.
_CP_HEAVY = CartPoleParams(cart_mass=1.3, pole_mass=0.7, half_length=0.35, gravity=9.81)
_AC_UNEQUAL = AcrobotParams(link_mass_1=1.4, link_mass_2=0.6, link_length_1=0.9, link_length_2=1.2, com_1=0.35,
                            com_2=0.7, inertia_1=0.1, inertia_2=0.08, gravity=9.81)  # ~ m l^2 / 12: rods
REFERENCE_CASES = {
    # measured 2.0e-8 and 1.0e-7: the pole falls over and whirls round (|th| reaches 10 and 4 rad).
    "cartpole-default": (CartPole(dt=0.005), cartpole_rhs_lagrangian(CartPoleParams()), 0.005, 400,
                         [0.1, 0.5, -0.2, 0.3], lambda t: 5.0 * math.sin(2.0 * t), 1e-7),
    "cartpole-heavy-pole": (CartPole(_CP_HEAVY, dt=0.005), cartpole_rhs_lagrangian(_CP_HEAVY), 0.005, 400,
                            [0.0, 2.5, 0.4, -1.0], lambda t: 5.0 * math.sin(2.0 * t), 5e-7),
    # measured 2.4e-9 (textbook, |th2d| up to 3 rad/s) and 3.3e-7 (slender unequal links, |th2d| up to 7 rad/s).
    "acrobot-textbook": (Acrobot(dt=0.005), acrobot_rhs_spong(AcrobotParams()), 0.005, 400, [0.3, -0.5, 1.0, -2.0],
                         lambda t: 1.0 * math.sin(2.0 * t), 1e-8),
    "acrobot-unequal": (Acrobot(_AC_UNEQUAL, dt=0.005), acrobot_rhs_spong(_AC_UNEQUAL), 0.005, 400,
                        [1.0, 0.5, 0.0, 0.5], lambda t: 1.0 * math.sin(2.0 * t), 2e-6),
    # measured 1.4e-8: 5 s of the yard crane pushed with half its force limit (x up to 2.7 m, sway 0.22 rad).
    "crane-default": (Crane(dt=0.01), crane_rhs_mass_matrix(CraneParams()), 0.01, 500, [0.0, 0.1, 0.5, -0.1],
                      lambda t: 7500.0 * math.sin(1.5 * t), 1e-7),
}


@pytest.mark.parametrize("case", sorted(REFERENCE_CASES))
def test_trajectory_matches_independent_equations(case):
    system, rhs, dt, n_steps, x0, force, bound = REFERENCE_CASES[case]
    assert system.integrator == "rk4" and system.dt == dt
    forces = [force(k * dt) for k in range(n_steps)]  # sampled at the start of each step, held over it
    xs = rollout(system, torch.tensor([x0], dtype=F64), torch.tensor(forces, dtype=F64).reshape(n_steps, 1, 1))
    ref = zoh_reference(rhs, x0, forces, dt)
    err = np.abs(xs[:, 0].numpy() - ref).max()
    # The trajectory must actually go somewhere (otherwise the comparison says little).
    assert np.abs(ref - ref[0]).max() > 0.1
    torch.testing.assert_close(xs[:, 0], torch.from_numpy(ref), rtol=0.0, atol=bound,
                               msg=lambda m: f"{m}\nmax |error| {err:.3g} (bound {bound:g})")


@pytest.mark.parametrize("params", [CraneParams(rolling_resistance=0.0),
                                    CraneParams(trolley_mass=2000.0, load_mass=500.0, rope_length=3.0,
                                                rolling_resistance=0.0)], ids=["default", "light-short"])
def test_crane_small_oscillation_period(params):
    # Linearising the Lagrange equations (phi small, F = b = 0): (M + m) xdd + m L phidd = 0 and
    # xdd + L phidd + g phi = 0, so phidd = -g (M + m) / (M L) phi: period 2 pi / sqrt(g (M + m) / (M L))
    # (derived here; the free cart-pendulum result, e.g. Tedrake, Underactuated Robotics, ch. 3; from memory).
    dt, n_steps = 0.02, 800
    system = Crane(params, dt=dt)
    xs = rollout_const(system, torch.tensor([[0.0, 0.01, 0.0, 0.0]], dtype=F64), torch.zeros(1, 1, dtype=F64),
                       n_steps)
    t = dt * np.arange(n_steps + 1)
    omega = math.sqrt(params.gravity * (params.trolley_mass + params.load_mass)
                      / (params.trolley_mass * params.rope_length))
    measured = zero_crossing_period(t, xs[:, 0, 1].numpy())
    # rtol 1e-4: amplitude 0.01 rad gives a nonlinear correction of order phi0^2 / 16 ~ 1e-5; RK4 phase error at
    # w dt <= 0.07 is ~(w dt)^4 / 120 < 2e-7. Forgetting the trolley's recoil (period 2 pi sqrt(L / g)) is off by
    # a factor sqrt((M + m) / M) >= 1.1.
    torch.testing.assert_close(torch.tensor(measured, dtype=F64), torch.tensor(2 * math.pi / omega, dtype=F64),
                               rtol=1e-4, atol=0.0)
    # the system's own documented helper agrees (same formula; only rounding differs)
    torch.testing.assert_close(torch.tensor(system.sway_frequency(), dtype=F64), torch.tensor(omega, dtype=F64),
                               rtol=1e-14, atol=0.0)


def _sorted(e) -> torch.Tensor:
    """Eigenvalues in a canonical order: by real part (rounded, so rounding noise cannot reorder), then imaginary."""
    e = np.asarray(e, dtype=complex)
    return torch.from_numpy(e[np.lexsort((e.imag, np.round(e.real, 6)))])


def _sorted_eigs(a: np.ndarray) -> torch.Tensor:
    return _sorted(np.linalg.eigvals(a))


# Eigenvalue tolerance: the zero eigenvalues of these Jacobians are double and defective (a free coordinate and
# its velocity form a Jordan block), which LAPACK may return perturbed by up to ~sqrt(machine eps) * |J| ~ 1e-7;
# the nonzero ones are simple and accurate to ~1e-14. atol 1e-6 still separates sqrt(g / l)-type errors (> 1e-2).
EIG_ATOL = 1e-6


def test_crane_linearised_eigenvalues():
    # Linearisation of the free crane at rest (F = b = 0): eigenvalues {0, 0, +-i w}, w = sqrt(g (M + m) / (M L))
    # (derived as in test_crane_small_oscillation_period).
    p = CraneParams(rolling_resistance=0.0)
    system = Crane(p)
    a = linearisation(system, torch.zeros(1, 4, dtype=F64), torch.zeros(1, 1, dtype=F64))
    w = math.sqrt(p.gravity * (p.trolley_mass + p.load_mass) / (p.trolley_mass * p.rope_length))
    expected = _sorted([0.0, 0.0, 1j * w, -1j * w])
    torch.testing.assert_close(_sorted_eigs(a), expected, rtol=0.0, atol=EIG_ATOL)


@pytest.mark.parametrize("params", [PendulumParams(damping=0.0),
                                    PendulumParams(mass=0.3, length=2.0, gravity=1.62, damping=0.0)],
                         ids=["default", "long-moon"])
def test_pendulum_linearised_eigenvalues_at_upright(params):
    # thdd = (g / l) th near th = 0 (upright): eigenvalues +-sqrt(g / l) (Strogatz, sec. 6.7: a saddle).
    system = Pendulum(params)
    a = linearisation(system, torch.zeros(1, 2, dtype=F64), torch.zeros(1, 1, dtype=F64))
    lam = math.sqrt(params.gravity / params.length)
    torch.testing.assert_close(_sorted_eigs(a), torch.tensor([-lam, lam], dtype=torch.complex128), rtol=0.0,
                               atol=1e-12)  # simple eigenvalues of a 2x2: accurate to rounding


@pytest.mark.parametrize("params", [CartPoleParams(), CartPoleParams(cart_mass=0.5, pole_mass=0.8, half_length=0.3)],
                         ids=["default", "heavy-pole"])
def test_cartpole_linearised_eigenvalues_at_upright(params):
    # Linearised Lagrangian at th = 0 (see cartpole_rhs_lagrangian), F = 0:
    #   (M + m) xdd + m l thdd = 0,   m l xdd + (4/3) m l^2 thdd = m g l th.
    # The first gives xdd = -m l thdd / (M + m); substituting, l thdd (4/3 - m / (M + m)) = g th, so
    # thdd = lam^2 th with lam^2 = g / (l (4/3 - m / (M + m))); x is a free coordinate: eigenvalues {0, 0, +-lam}.
    system = CartPole(params)
    a = linearisation(system, torch.zeros(1, 4, dtype=F64), torch.zeros(1, 1, dtype=F64))
    lam = math.sqrt(params.gravity / (params.half_length * (4 / 3 - params.pole_mass
                                                            / (params.cart_mass + params.pole_mass))))
    expected = torch.tensor([-lam, 0.0, 0.0, lam], dtype=torch.complex128)
    torch.testing.assert_close(_sorted_eigs(a), expected, rtol=0.0, atol=EIG_ATOL)


# ---------------------------------------------------------------------------------------------------------------
# quadrotor
# ---------------------------------------------------------------------------------------------------------------
QUAD_CASES = [QuadrotorParams(), QuadrotorParams(mass=1.37, arm_length=0.23, inertia=0.031, gravity=9.80665)]


@pytest.mark.parametrize("params", QUAD_CASES, ids=["default", "heavier"])
def test_quadrotor_hover_thrust_is_half_the_weight(params):
    # Level hover needs T1 = T2 = m g / 2 (Tedrake, Underactuated Robotics, ch. 3, planar quadrotor).
    system = Quadrotor(params)
    # rtol 1e-15: both sides are one double multiplication and a halving; anything looser hides a silent
    # round trip through float32 (7e-9 relative).
    torch.testing.assert_close(torch.tensor(system.hover_thrust, dtype=F64),
                               torch.tensor(params.mass * params.gravity / 2, dtype=F64), rtol=1e-15, atol=0.0)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("params", QUAD_CASES, ids=["default", "heavier"])
def test_quadrotor_hover_is_an_equilibrium(params, dtype):
    system = Quadrotor(params)
    x = torch.tensor([[0.3, 1.2, 0.0, 0.0, 0.0, 0.0], [-1.0, 2.0, 0.0, 0.0, 0.0, 0.0]], dtype=dtype)
    h = system.hover_thrust
    u = torch.full((2, 2), h, dtype=dtype)
    acc = system.derivative(x, u)[:, 3:]
    # Zero up to rounding: (2 h) / m - g is exact in real arithmetic; in floating point it is a few ulps of g
    # (4 eps g: 1e-14 m/s^2 in float64, 4e-6 in float32). A wrong factor (e.g. T1 + T2 vs T) gives ~g.
    eps = torch.finfo(dtype).eps
    torch.testing.assert_close(acc, torch.zeros_like(acc), rtol=0.0, atol=4 * eps * params.gravity)


@pytest.mark.parametrize("params", QUAD_CASES, ids=["default", "heavier"])
def test_quadrotor_thrust_difference_and_tilt(params):
    # I thdd = r (T2 - T1); m xdd = -(T1 + T2) sin th; m zdd = (T1 + T2) cos th - m g (Tedrake, ch. 3).
    system = Quadrotor(params)
    th = 0.3
    x = torch.tensor([[0.0, 1.0, th, 0.4, -0.2, 0.7]], dtype=F64)
    t1, t2 = 2.5, 4.0
    acc = system.derivative(x, torch.tensor([[t1, t2]], dtype=F64))[0, 3:]
    m, r, inertia, g = params.mass, params.arm_length, params.inertia, params.gravity
    expected = torch.tensor([-(t1 + t2) * math.sin(th) / m, (t1 + t2) * math.cos(th) / m - g,
                             r * (t2 - t1) / inertia], dtype=F64)
    torch.testing.assert_close(acc, expected, rtol=1e-14, atol=1e-14)  # the same formula: rounding only


# ---------------------------------------------------------------------------------------------------------------
# integrator order
# ---------------------------------------------------------------------------------------------------------------
@pytest.mark.parametrize("integrator, dts, low, high", [
    ("rk4", [0.02, 0.01, 0.005, 0.0025], 3.7, 4.3),
    ("semi_implicit_euler", [0.02, 0.01, 0.005, 0.0025], 0.8, 1.2),
])
def test_integrator_observed_order(integrator, dts, low, high):
    # Global error of RK4 is O(dt^4), of semi-implicit Euler O(dt) (Hairer, Norsett & Wanner, Solving Ordinary
    # Differential Equations I, ch. II; Hairer, Lubich & Wanner 2006, ch. I; chapters from memory). Bounds
    # 3.7..4.3 and 0.8..1.2 are common practice for an observed order from four halvings. Measured slopes: 3.92
    # and 1.00.
    p = PendulumParams()  # default damping 0.01 kept, plus a constant torque: a generic, nonlinear swing
    tau, seconds, y0 = 0.5, 2.0, [math.pi - 1.5, 0.3]

    def rhs(t, y):  # pendulum, m l^2 thdd = m g l sin th - b thd + u (Strogatz, sec. 6.7), th from upright
        th, om = y
        return [om, p.gravity / p.length * math.sin(th) + (tau - p.damping * om) / (p.mass * p.length ** 2)]

    ref = solve_ivp(rhs, (0.0, seconds), y0, method="DOP853", rtol=1e-12, atol=1e-12).y[:, -1]
    errors = []
    for dt in dts:
        system = Pendulum(p, dt=dt, integrator=integrator)
        xs = rollout_const(system, torch.tensor([y0], dtype=F64), torch.full((1, 1), tau, dtype=F64),
                           int(round(seconds / dt)))
        errors.append(np.abs(xs[-1, 0].numpy() - ref).max())
    slope = np.polyfit(np.log(dts), np.log(errors), 1)[0]
    assert min(errors) > 100 * 1e-12, "reference not accurate enough to measure this order"
    assert low <= slope <= high, (slope, errors)


# ---------------------------------------------------------------------------------------------------------------
# double integrator: exact discrete model and Riccati equation
# ---------------------------------------------------------------------------------------------------------------
def double_integrator_ab(integrator: str, dt: float, m: float) -> tuple[np.ndarray, np.ndarray]:
    """Zero-order-hold discretisation of m xdd = u, derived here: with u constant over the step,
    x(t + dt) = x + dt v + dt^2 u / (2 m) and v(t + dt) = v + dt u / m (exact; Franklin, Powell & Workman,
    Digital Control of Dynamic Systems, ch. 4; from memory). Semi-implicit Euler: v' = v + dt u / m,
    x' = x + dt v' = x + dt v + dt^2 u / m."""
    a = np.array([[1.0, dt], [0.0, 1.0]])
    b = np.array([[dt * dt / m if integrator == "semi_implicit_euler" else dt * dt / (2 * m)], [dt / m]])
    return a, b


DI_CASES = [("rk4", 0.1, 1.0), ("semi_implicit_euler", 0.1, 1.0), ("rk4", 0.037, 1.3),
            ("semi_implicit_euler", 0.037, 1.3)]


@pytest.mark.parametrize("integrator, dt, mass", DI_CASES)
def test_double_integrator_step_jacobians_are_the_zoh_model(integrator, dt, mass):
    system = DoubleIntegrator(DoubleIntegratorParams(mass=mass), dt=dt, integrator=integrator)
    x = torch.tensor([[0.4, -0.7]], dtype=F64)
    u = torch.tensor([[1.5]], dtype=F64)
    ja, jb = jacobian(system.step, (x, u))
    a, b = double_integrator_ab(integrator, dt, mass)
    # rtol/atol 1e-14: the step is linear, so the Jacobian is exact up to rounding of dt, m.
    torch.testing.assert_close(ja[0, :, 0, :], torch.from_numpy(a), rtol=1e-14, atol=1e-14)
    torch.testing.assert_close(jb[0, :, 0, :], torch.from_numpy(b), rtol=1e-14, atol=1e-14)
    # and the step is affine with exactly these matrices (not just locally)
    x1 = system.step(x, u)[0].numpy()
    torch.testing.assert_close(torch.from_numpy(x1), torch.from_numpy(a @ x[0].numpy() + b @ u[0].numpy()),
                               rtol=1e-14, atol=1e-14)
    # the system's own documented model agrees
    a_sys, b_sys = system.linear_model()
    torch.testing.assert_close(torch.from_numpy(a_sys), torch.from_numpy(a), rtol=1e-14, atol=1e-14)
    torch.testing.assert_close(torch.from_numpy(b_sys), torch.from_numpy(b), rtol=1e-14, atol=1e-14)


@pytest.mark.parametrize("integrator, dt, mass", DI_CASES)
def test_double_integrator_riccati_solves_the_dare(integrator, dt, mass):
    # DARE: P = A'PA - A'PB (R + B'PB)^-1 B'PA + Q (Bertsekas, Dynamic Programming and Optimal Control, vol. 1,
    # sec. 4.1); reference solution scipy.linalg.solve_discrete_are on the A, B derived in this file. The running
    # cost is (x'Qx + u'Ru) dt, so the discrete problem's weights are Q dt and R dt.
    system = DoubleIntegrator(DoubleIntegratorParams(mass=mass), dt=dt, integrator=integrator)
    a, b = double_integrator_ab(integrator, dt, mass)
    q_rate, r_rate = np.diag([system.task.q_position, system.task.q_velocity]), np.array([[system.task.r_force]])
    q, r = q_rate * dt, r_rate * dt
    p = system.riccati
    # the running cost is the quadrature of the cost rate with these weights
    x0, u0 = torch.tensor([[0.4, -0.7]], dtype=F64), torch.tensor([[1.5]], dtype=F64)
    expected_running = float(x0[0] @ torch.from_numpy(q) @ x0[0] + u0[0] @ torch.from_numpy(r) @ u0[0])
    assert float(system.running_cost(x0, u0)) == pytest.approx(expected_running, rel=1e-14)
    residual = a.T @ p @ a - a.T @ p @ b @ np.linalg.solve(r + b.T @ p @ b, b.T @ p @ a) + q - p
    scale = np.abs(p).max()
    # 1e-10 relative to |P|: the DARE solver is backward stable (~1e-13); a model rounded through float32 or a
    # wrong B leaves a residual of 1e-8 or more.
    torch.testing.assert_close(torch.from_numpy(residual / scale), torch.zeros(2, 2, dtype=F64), rtol=0.0,
                               atol=1e-10)
    torch.testing.assert_close(torch.from_numpy(p), torch.from_numpy(scipy.linalg.solve_discrete_are(a, b, q, r)),
                               rtol=1e-10, atol=1e-12)
    # Scaling Q and R by dt scales the DARE's P by dt and leaves the LQR gain (R + B'PB)^-1 B'PA unchanged.
    p_rate = scipy.linalg.solve_discrete_are(a, b, q_rate, r_rate)
    torch.testing.assert_close(torch.from_numpy(p), torch.from_numpy(dt * p_rate), rtol=1e-10, atol=1e-12)
    gain = np.linalg.solve(r + b.T @ p @ b, b.T @ p @ a)
    gain_rate = np.linalg.solve(r_rate + b.T @ p_rate @ b, b.T @ p_rate @ a)
    torch.testing.assert_close(torch.from_numpy(gain), torch.from_numpy(gain_rate), rtol=1e-9, atol=1e-12)
    # P is symmetric positive definite (the LQR value function is a positive quadratic form)
    assert np.allclose(p, p.T) and (np.linalg.eigvalsh(p) > 0).all()
    # the terminal cost is x'Px
    x = torch.tensor([[0.4, -0.7], [1.0, 2.0]], dtype=F64)
    expected = torch.from_numpy(np.einsum("bi,ij,bj->b", x.numpy(), p, x.numpy()))
    torch.testing.assert_close(system.terminal_cost(x), expected, rtol=1e-14, atol=0.0)


# ---------------------------------------------------------------------------------------------------------------
# per-batch parameters
# ---------------------------------------------------------------------------------------------------------------
B = 3


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("integrator", ["rk4", "semi_implicit_euler"])
@pytest.mark.parametrize("name", envs.available())
def test_per_batch_parameters_step_like_separate_systems(name, integrator, dtype):
    base = envs.build(name, integrator=integrator)
    fields = [f.name for f in dataclasses.fields(base.params)]
    # every numeric field gets a different value per row (and per field), 7% to 30% away from the default
    values = {f: [float(getattr(base.params, f)) * (1.0 + 0.07 * (i + 1) + 0.01 * j) for i in range(B)]
              for j, f in enumerate(fields) if isinstance(getattr(base.params, f), float)}
    batched = base.replace(params=dataclasses.replace(
        base.params, **{f: torch.tensor(v, dtype=dtype) for f, v in values.items()}))
    g = torch.Generator().manual_seed(1)
    x = base.sample_initial(B, g, dtype) + 0.3 * torch.randn(B, base.state_dim, generator=g, dtype=dtype)
    lo, hi = torch.tensor(base.action_low, dtype=dtype), torch.tensor(base.action_high, dtype=dtype)
    u = lo + (hi - lo) * torch.rand(B, base.action_dim, generator=g, dtype=dtype)
    out = batched.step(x, u)
    assert out.shape == x.shape and out.dtype == dtype
    rows = []
    for i in range(B):
        single = base.replace(params=dataclasses.replace(base.params, **{f: v[i] for f, v in values.items()}))
        rows.append(single.step(x[i:i + 1], u[i:i + 1])[0])
    # Equal up to rounding: the scalar system folds parameter arithmetic in Python doubles, the batched one in
    # tensor arithmetic of `dtype` (float32 rounding ~1e-7 relative, amplified a little by one step); float64
    # agrees to the last bits. Rows mixed up or broadcast wrongly differ by >= 1e-3 since parameters differ by 7%.
    tol = dict(rtol=1e-5, atol=1e-5) if dtype == torch.float32 else dict(rtol=1e-13, atol=1e-13)
    torch.testing.assert_close(out, torch.stack(rows), **tol)
