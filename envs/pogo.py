"""One-legged pogo robot: a body on a springy telescopic leg that must hop along the floor to a painted mark.

Two point masses in the vertical plane: the body ``M`` at ``(x, z)`` and the foot ``m`` at ``(x + fx, z + fz)``
(the state stores the foot relative to the body, so ``fz ~ -leg length``). The leg between them is massless:

* along the leg, a spring-damper in parallel with the thrust actuator pushes body and foot apart with
  ``F_a = k_l (l0 - l) - c_l l' + u_thrust``, ``l = |(fx, fz)|``;
* across the leg, the swing actuator pushes the body with ``u_swing`` along ``t = (n_z, -n_x)`` and the foot
  with as much along ``-t`` (``n`` the unit vector from foot to body, so with the leg vertical ``t = +x``).

Both are internal forces: in flight they only move the foot relative to the body, and the centre of mass is
ballistic (the tests check this against the closed form). On the ground the foot's friction anchors it, and the
same two forces hop and steer the body, as a hip torque ``u_swing l`` would. Foot and body touch the floor
(``z = 0``; the body is a disc of radius ``r``) through :mod:`envs.contact`: a smoothed Kelvin-Voigt normal force
and regularised Coulomb friction (``N`` and ``T`` below, on body ``b`` and foot ``f``). Newton's second law:

    M (xdd, zdd)                = F_a n + u_swing t + (T_b, N_b) - M g e_z
    m (xdd + fxdd, zdd + fzdd)  = -F_a n - u_swing t + (T_f, N_f) - m g e_z

This is the spring-loaded inverted pendulum of legged locomotion (Blickhan 1989, "The spring-mass model for
running and hopping", J. Biomech. 22) with a foot mass, in the spirit of Raibert's planar one-legged machine
(Raibert, *Legged Robots That Balance*, 1986; a hip torque there, a transverse force here). The default numbers describe the
invented Larkspur Science Hall's pogo robot, which hops from its start spot to a mark 1 m away on a rubber mat.
Standing still is an equilibrium (tested), but an unstable one, as for any inverted pendulum: the policy has to
balance as well as hop, and falling over (the body's disc on the mat) is the typical failure.

Time step: the stiffest modes are the foot on the mat, ``w = sqrt(k / m) = 55 rad/s``, and the regularised
friction, which near stick is a damper with rate ``lambda = mu N / (m v_eps)``. At ``dt = 3 ms``, ``w dt = 0.16``
and ``lambda dt < 2`` (semi-implicit Euler's limit; RK4's is 2.8) up to ``N = 100 N``, five times the weight: a
landing from about 0.4 m. Harder landings make the foot's slip chatter for a few steps under semi-implicit
Euler (bounded by the friction cone). A sharper friction (smaller ``friction_smoothing``) needs a smaller step.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from envs.base import Quantity, System, bounded, check_record, scalar, unit
from envs.sketch import Box, Disc, Ground, Push, Segment, Trace
from envs.contact import friction_force, normal_force


@dataclass(frozen=True)
class PogoParams:
    body_mass: float = unit("kg", 1.5, positive=True)
    foot_mass: float = unit("kg", 0.5, positive=True)
    leg_rest_length: float = unit("m", 0.5, positive=True)
    leg_stiffness: float = unit("N/m", 400.0, positive=True)
    leg_damping: float = unit("N s/m", 1.0, nonnegative=True)
    body_radius: float = unit("m", 0.1, positive=True)
    gravity: float = unit("m/s^2", 9.81, positive=True)
    contact_stiffness: float = unit("N/m", 1500.0, positive=True)  # the mat under foot and body
    # zeta ~ 0.4 for the foot: a dead landing, little rebound
    contact_damping: float = unit("N s/m", 20.0, nonnegative=True)
    contact_smoothing: float = unit("m", 1e-3, positive=True)  # softplus width of the contact onset
    friction_coefficient: float = bounded(1.0, nonnegative=True)
    friction_smoothing: float = unit("m/s", 0.3, positive=True)  # slip speed over which friction reverses
    thrust_limit: float = unit("N", 40.0, positive=True)  # leg actuator, about twice the weight
    swing_limit: float = unit("N", 10.0, positive=True)

    def __post_init__(self) -> None:
        check_record(self)

    @property
    def standing_height(self) -> float | Tensor:
        """Body height (m) standing still on a vertical leg, sharp-contact approximation: the leg is shortened
        by the body's weight and the foot sinks into the mat under the whole weight."""
        return (self.leg_rest_length - self.body_mass * self.gravity / self.leg_stiffness
                - (self.body_mass + self.foot_mass) * self.gravity / self.contact_stiffness)


@dataclass(frozen=True)
class PogoTask:
    mark: float = unit("m", 1.0)  # where the body must end up
    w_position: float = unit("1/m^2", 1.0, nonnegative=True)
    # on max(standing height - z, 0)^2: crouching or fallen; hopping is free
    w_sag: float = unit("1/m^2", 20.0, nonnegative=True)
    w_lean: float = unit("1/m^2", 0.5, nonnegative=True)  # on fx^2: keep the foot roughly under the body
    w_velocity: float = unit("s^2/m^2", 0.1, nonnegative=True)  # terminal only: arrive at rest
    w_effort: float = bounded(0.01, nonnegative=True)  # on the actions over their limits, squared
    # x, z, fx, fz (m), then their rates (m/s): dropped from up to 5 cm, the leg within ~0.1 rad of vertical
    init_low: tuple[float, ...] = (-0.1, 0.48, -0.05, -0.5, -0.1, -0.1, -0.1, -0.1)
    init_high: tuple[float, ...] = (0.1, 0.53, 0.05, -0.48, 0.1, 0.1, 0.1, 0.1)
    hold_time: float = unit("s", 0.5, positive=True)  # success: for the last hold_time seconds ...
    position_tolerance: float = unit("m", 0.15, positive=True)  # ... the body within this of the mark
    min_height: float = unit("m", 0.3, positive=True)  # ... and never lower than this (it has not fallen)

    def __post_init__(self) -> None:
        if len(self.init_low) != 8 or len(self.init_high) != 8:
            raise ValueError(f"init_low and init_high must have 8 entries (x, z, fx, fz and rates), got "
                             f"{len(self.init_low)} and {len(self.init_high)}")
        check_record(self)


class Pogo(System):
    name = "pogo"
    state = (Quantity("x", "m"), Quantity("z", "m"), Quantity("foot_dx", "m"), Quantity("foot_dz", "m"),
             Quantity("x_velocity", "m/s"), Quantity("z_velocity", "m/s"), Quantity("foot_dx_rate", "m/s"),
             Quantity("foot_dz_rate", "m/s"))
    action = (Quantity("leg_thrust", "N"), Quantity("swing_force", "N"))
    Params = PogoParams
    Task = PogoTask
    default_dt = 0.003
    action_limits = ("thrust_limit", "swing_limit")  # the Params field bounding each action, +-limit
    # Model error of the machine and its mat: the masses, the leg spring, and the mat's damping and friction, which
    # set how dead a landing is and how well the foot grips; not gravity, geometry or actuator limits.
    robustness_params = ("body_mass", "foot_mass", "leg_stiffness", "contact_damping", "friction_coefficient")

    def leg_force(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        """The force of the leg (spring, damper and both actuators) on the body, ``(B, 2)``; the foot feels the
        opposite."""
        p = self.params
        fx, fz, fxd, fzd = q[..., 2], q[..., 3], qd[..., 2], qd[..., 3]
        length = torch.hypot(fx, fz)
        nx, nz = -fx / length, -fz / length  # unit vector from foot to body
        length_rate = (fx * fxd + fz * fzd) / length
        axial = p.leg_stiffness * (p.leg_rest_length - length) - p.leg_damping * length_rate + u[..., 0]
        swing = u[..., 1]
        return torch.stack([axial * nx + swing * nz, axial * nz - swing * nx], dim=-1)

    def ground_forces(self, height: Tensor, x_velocity: Tensor, z_velocity: Tensor) -> tuple[Tensor, Tensor]:
        """Friction and normal force of the mat on a point at ``height`` above it, each ``(B,)``."""
        p = self.params
        n = normal_force(height, z_velocity, p.contact_stiffness, p.contact_damping, p.contact_smoothing)
        return friction_force(n, x_velocity, p.friction_coefficient, p.friction_smoothing), n

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        p = self.params
        leg = self.leg_force(q, qd, u)
        foot_xd, foot_zd = qd[..., 0] + qd[..., 2], qd[..., 1] + qd[..., 3]
        tb, nb = self.ground_forces(q[..., 1] - p.body_radius, qd[..., 0], qd[..., 1])
        tf, nf = self.ground_forces(q[..., 1] + q[..., 3], foot_xd, foot_zd)
        body = torch.stack([(leg[..., 0] + tb) / p.body_mass, (leg[..., 1] + nb) / p.body_mass - p.gravity], dim=-1)
        foot = torch.stack([(tf - leg[..., 0]) / p.foot_mass, (nf - leg[..., 1]) / p.foot_mass - p.gravity], dim=-1)
        return torch.cat([body, foot - body], dim=-1)

    def centre_of_mass(self, x: Tensor) -> Tensor:
        """Position of the centre of mass of body and foot (m), ``(B, 2)``."""
        p = self.params
        frac = p.foot_mass / (p.body_mass + p.foot_mass)
        if isinstance(frac, Tensor):
            frac = frac.unsqueeze(-1)
        return x[..., 0:2] + frac * x[..., 2:4]

    def stage_cost(self, x: Tensor) -> Tensor:
        t = self.task
        sag = torch.relu(self.params.standing_height - x[..., 1])  # squared below: continuously differentiable
        return t.w_position * (x[..., 0] - t.mark) ** 2 + t.w_sag * sag ** 2 + t.w_lean * x[..., 2] ** 2

    def effort_cost(self, u: Tensor) -> Tensor:
        p = self.params
        return self.task.w_effort * ((u[..., 0] / p.thrust_limit) ** 2 + (u[..., 1] / p.swing_limit) ** 2)

    def terminal_cost(self, x: Tensor) -> Tensor:
        """The stage cost plus ``w_velocity`` on the body's speed: arrive at rest."""
        return self.stage_cost(x) + self.task.w_velocity * (x[..., 4] ** 2 + x[..., 5] ** 2)

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        t = self.task
        w = self.final_window(states, t.hold_time)
        return (((w[..., 0] - t.mark).abs() < t.position_tolerance) & (w[..., 1] > t.min_height)).all(dim=0)

    @property
    def success_criterion(self) -> str:
        t = self.task
        return (f"body within {t.position_tolerance} m of the mark at {t.mark} m and higher than {t.min_height} m "
                f"for the last {t.hold_time} s")

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """The envelope of the Larkspur robot (invented, as the robot is): the body on its mat, which runs 1 m
        beyond the start spot and the mark; never lower than the task's ``min_height`` (below it the robot has
        fallen, the failure the task guards against); the foot no more than half a rest length to either side of
        the body (a lean of 30 degrees, the swing joint's travel)."""
        t, half = self.task, 0.5 * scalar(self.params.leg_rest_length)
        return {"x": (-1.0, t.mark + 1.0), "z": (t.min_height, math.inf), "foot_dx": (-half, half)}

    def sketch(self, x: Sequence[float]) -> list:
        t, radius = self.task, scalar(self.params.body_radius)
        body, foot = (x[0], x[1]), (x[0] + x[2], x[1] + x[3])
        length = max(math.hypot(x[2], x[3]), 1e-9)
        n = (-x[2] / length, -x[3] / length)  # unit vector from foot to body
        mid = (0.5 * (body[0] + foot[0]), 0.5 * (body[1] + foot[1]))
        return [Ground(-1.2, t.mark + 1.2, 0.0), Box((t.mark, 0.006), 2 * t.position_tolerance, 0.012, role="goal"),
                Trace(body), Segment(mid, foot, 0.014), Segment(body, mid, 0.03), Disc(foot, 0.022),
                Disc(body, radius), Push(body, n, 0.25, 0, clearance=radius),
                Push(body, (n[1], -n[0]), 0.2, 1, clearance=radius)]

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        xs, zs = [s[0] for s in states], [s[1] for s in states]
        return (min(-0.6, min(xs) - 0.4), max(self.task.mark + 0.6, max(xs) + 0.4), -0.15, max(0.8, max(zs) + 0.3))
