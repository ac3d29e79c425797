"""Torque-limited pendulum: a point mass on a massless rod, swung up from where it is released and held upright.

``m l^2 thdd = m g l sin(th) - b thd + u`` with ``th`` measured from upright (so ``th = pi`` hangs down).
Equation: any dynamics text, e.g. Strogatz, *Nonlinear Dynamics and Chaos*, sec. 6.7.

The defaults are the invented Hollowmere Science Centre's "stand the arm up" exhibit: a 0.8 kg bob on a 0.65 m
arm, a geared hub motor with 3.2 N m peak torque (0.63 m g l: it cannot hold the arm level, nor push it over the
top from hanging at rest, which needs about 0.73 m g l, so the controller must swing it back first) and some
gearbox friction, sampled at 25 Hz. Visitors pull the bob aside or give it a shove and let go: it starts within
2.2 rad of hanging, turning at up to 1.5 rad/s.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from envs.base import Quantity, System, bounded, check_record, scalar, unit, wrap_angle
from envs.sketch import Disc, Segment, Trace, Twist


@dataclass(frozen=True)
class PendulumParams:
    mass: float = unit("kg", 0.8, positive=True)
    length: float = unit("m", 0.65, positive=True)
    gravity: float = unit("m/s^2", 9.81, positive=True)
    damping: float = unit("N m s/rad", 0.02, nonnegative=True)
    torque_limit: float = unit("N m", 3.2, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


@dataclass(frozen=True)
class PendulumTask:
    w_angle: float = bounded(1.0, nonnegative=True)  # weight on (1 - cos th)
    w_velocity: float = unit("s^2/rad^2", 0.01, nonnegative=True)
    w_torque: float = bounded(0.01, nonnegative=True)  # weight on (u / torque_limit)^2
    init_low: tuple[float, ...] = (math.pi - 2.2, -1.5)  # angle from upright (rad), angular velocity (rad/s)
    init_high: tuple[float, ...] = (math.pi + 2.2, 1.5)
    hold_time: float = unit("s", 1.0, positive=True)  # success: upright for the last hold_time seconds
    angle_tolerance: float = unit("rad", 0.1, positive=True)
    velocity_tolerance: float = unit("rad/s", 0.5, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


class Pendulum(System):
    name = "pendulum"
    state = (Quantity("angle", "rad", angle=True), Quantity("angular_velocity", "rad/s"))
    action = (Quantity("torque", "N m"),)
    Params = PendulumParams
    Task = PendulumTask
    default_dt = 0.04
    action_limits = ("torque_limit",)  # the Params field bounding each action, +-limit
    robustness_params = ("mass", "length", "damping")  # model error of a real pendulum; not gravity or limits

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        p = self.params
        ml2 = p.mass * p.length ** 2
        th, thd = q[..., 0], qd[..., 0]
        thdd = (p.gravity / p.length) * torch.sin(th) + (u[..., 0] - p.damping * thd) / ml2
        return thdd.unsqueeze(-1)

    def energy(self, x: Tensor) -> Tensor:
        """Mechanical energy (J), zero hanging at rest."""
        p = self.params
        return 0.5 * p.mass * p.length ** 2 * x[..., 1] ** 2 + p.mass * p.gravity * p.length * (1 + torch.cos(x[..., 0]))

    def stage_cost(self, x: Tensor) -> Tensor:
        t = self.task
        return t.w_angle * (1 - torch.cos(x[..., 0])) + t.w_velocity * x[..., 1] ** 2

    def effort_cost(self, u: Tensor) -> Tensor:
        return self.task.w_torque * (u[..., 0] / self.params.torque_limit) ** 2

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        w = self.final_window(states, self.task.hold_time)
        ok = (wrap_angle(w[..., 0]).abs() < self.task.angle_tolerance) & (w[..., 1].abs() < self.task.velocity_tolerance)
        return ok.all(dim=0)

    @property
    def success_criterion(self) -> str:
        t = self.task
        return (f"|angle from upright| < {t.angle_tolerance} rad and |angular velocity| < {t.velocity_tolerance} rad/s "
                f"for the last {t.hold_time} s")

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """No faster than 10 rad/s, the envelope of a sensible machine: falling from rest upright reaches
        ``2 sqrt(g / l)`` = 7.8 rad/s at the exhibit's 0.65 m arm, so a policy that needs more is whirling the bob."""
        return {"angular_velocity": (-10.0, 10.0)}

    def sketch(self, x: Sequence[float]) -> list:
        length = scalar(self.params.length)
        tip = (length * math.sin(x[0]), length * math.cos(x[0]))
        return [Disc((0.0, length), 0.06 * length, "goal", filled=False, dashed=True), Trace(tip),
                Segment((0.0, 0.0), tip, 0.02 * length), Disc(tip, 0.09 * length),
                Disc((0.0, 0.0), 0.04 * length, "hollow"), Twist((0.0, 0.0), 0.25 * length, 0)]

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        r = 1.25 * scalar(self.params.length)  # the whole circle, so the view does not follow the swing
        return (-r, r, -r, r)
