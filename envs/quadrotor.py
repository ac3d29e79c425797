"""Planar quadrotor: a rigid body in the vertical plane with two rotors, flown onto a docking pad.

``m xdd = -(T1 + T2) sin(th)``, ``m zdd = (T1 + T2) cos(th) - m g``, ``I thdd = r (T2 - T1)``, with ``th`` the
pitch (counter-clockwise positive), ``T1`` the left and ``T2`` the right rotor's thrust and ``r`` the arm from
the centre to each rotor; a common textbook model (e.g. Tedrake, *Underactuated Robotics*, ch. 3, planar
quadrotor). Hover needs ``T1 = T2 = m g / 2``. The task: from a random start, reach the hover point above the
inspection drone's pad and stay there.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from envs.base import Quantity, System, bounded, check_record, scalar, unit
from envs.sketch import Box, Disc, Ground, Push, Segment, Trace


@dataclass(frozen=True)
class QuadrotorParams:
    mass: float = unit("kg", 0.8, positive=True)
    arm_length: float = unit("m", 0.15, positive=True)
    inertia: float = unit("kg m^2", 0.01, positive=True)
    gravity: float = unit("m/s^2", 9.81, positive=True)
    thrust_limit: float = unit("N", 8.0, positive=True)  # per rotor; two rotors give about twice the weight

    def __post_init__(self) -> None:
        check_record(self)


@dataclass(frozen=True)
class QuadrotorTask:
    target: tuple[float, ...] = (0.0, 1.0)  # hover point above the pad: x (m), z (m)
    w_position: float = unit("1/m^2", 1.0, nonnegative=True)
    w_pitch: float = unit("1/rad^2", 0.1, nonnegative=True)
    w_velocity: float = unit("s^2/m^2", 0.1, nonnegative=True)
    w_pitch_rate: float = unit("s^2/rad^2", 0.01, nonnegative=True)
    w_thrust: float = bounded(0.01, nonnegative=True)  # weight on ((T - hover) / thrust_limit)^2 per rotor
    init_low: tuple[float, ...] = (-2.0, 0.5, -0.3, -0.5, -0.5, -0.5)  # x, z (m), th (rad), rates (m/s, rad/s)
    init_high: tuple[float, ...] = (2.0, 2.5, 0.3, 0.5, 0.5, 0.5)
    hold_time: float = unit("s", 1.0, positive=True)  # success: for the last hold_time seconds ...
    position_tolerance: float = unit("m", 0.1, positive=True)  # ... within this distance of the hover point
    speed_tolerance: float = unit("m/s", 0.2, positive=True)  # ... and slower than this

    def __post_init__(self) -> None:
        if len(self.target) != 2:
            raise ValueError(f"target must be (x, z) in m, got {self.target}")
        check_record(self)


class Quadrotor(System):
    name = "quadrotor"
    state = (Quantity("x", "m"), Quantity("z", "m"), Quantity("pitch", "rad", angle=True),
             Quantity("x_velocity", "m/s"), Quantity("z_velocity", "m/s"), Quantity("pitch_rate", "rad/s"))
    action = (Quantity("left_thrust", "N"), Quantity("right_thrust", "N"))
    Params = QuadrotorParams
    Task = QuadrotorTask
    default_dt = 0.04
    action_limits = ("thrust_limit", "thrust_limit")  # each rotor: from 0 to its thrust limit
    one_sided = True
    robustness_params = ("mass", "inertia", "arm_length")  # model error; not gravity or limits

    @property
    def hover_thrust(self) -> float:
        """Per-rotor thrust that holds the craft level and still (N)."""
        return float(torch.as_tensor(self.params.mass * self.params.gravity, dtype=torch.float64).mean()) / 2

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        p = self.params
        th, t1, t2 = q[..., 2], u[..., 0], u[..., 1]
        total = t1 + t2
        xdd = -total * torch.sin(th) / p.mass
        zdd = total * torch.cos(th) / p.mass - p.gravity
        thdd = p.arm_length * (t2 - t1) / p.inertia
        return torch.stack([xdd, zdd, thdd], dim=-1)

    def stage_cost(self, x: Tensor) -> Tensor:
        t = self.task
        ex, ez = x[..., 0] - t.target[0], x[..., 1] - t.target[1]
        return (t.w_position * (ex ** 2 + ez ** 2) + t.w_pitch * (1 - torch.cos(x[..., 2])) * 2
                + t.w_velocity * (x[..., 3] ** 2 + x[..., 4] ** 2) + t.w_pitch_rate * x[..., 5] ** 2)

    def effort_cost(self, u: Tensor) -> Tensor:
        p = self.params
        hover = p.mass * p.gravity / 2  # per row when the parameters are per-batch tensors
        if isinstance(hover, Tensor):
            hover = hover.unsqueeze(-1)
        limit = p.thrust_limit.unsqueeze(-1) if isinstance(p.thrust_limit, Tensor) else p.thrust_limit
        return self.task.w_thrust * (((u - hover) / limit) ** 2).sum(dim=-1)

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        t = self.task
        w = self.final_window(states, t.hold_time)
        dist = torch.hypot(w[..., 0] - t.target[0], w[..., 1] - t.target[1])
        speed = torch.hypot(w[..., 3], w[..., 4])
        return ((dist < t.position_tolerance) & (speed < t.speed_tolerance)).all(dim=0)

    @property
    def success_criterion(self) -> str:
        t = self.task
        return (f"within {t.position_tolerance} m of the hover point and slower than {t.speed_tolerance} m/s "
                f"for the last {t.hold_time} s")

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """The envelope of a sensible craft: never below its pad (``z >= 0``) and never upside down
        (``|pitch| <= pi / 2``)."""
        return {"z": (0.0, math.inf), "pitch": (-math.pi / 2, math.pi / 2)}

    def sketch(self, x: Sequence[float]) -> list:
        arm = 2 * scalar(self.params.arm_length)  # drawn at twice the true size so the craft reads at this zoom
        tx, tz = self.task.target
        cx, cz, th = x[0], x[1], x[2]
        axis, normal = (math.cos(th), math.sin(th)), (-math.sin(th), math.cos(th))
        rotors = [(cx + s * arm * axis[0], cz + s * arm * axis[1]) for s in (-1, 1)]  # left, right
        out = [Ground(tx - 3, tx + 3, 0.0), Box((tx, 0.025), 0.7, 0.05, role="goal"),
               Segment((tx - 0.07, tz), (tx + 0.07, tz), 0.01, "goal"),
               Segment((tx, tz - 0.07), (tx, tz + 0.07), 0.01, "goal"), Trace((cx, cz)),
               Segment(rotors[0], rotors[1], 0.018), Disc((cx, cz), 0.3 * arm)]
        for i, (rx, rz) in enumerate(rotors):
            blade = 0.35 * arm
            out += [Segment((rx - blade * axis[0], rz - blade * axis[1]), (rx + blade * axis[0], rz + blade * axis[1]),
                            0.01),
                    Push((rx, rz), normal, 0.7, i, one_sided=True, base=0.1)]
        return out

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        tx, tz = self.task.target
        xs, zs = [s[0] for s in states], [s[1] for s in states]
        return (min(min(xs), tx) - 0.6, max(max(xs), tx) + 0.6, -0.3, max(max(zs), tz) + 0.6)
