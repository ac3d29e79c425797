"""Acrobot: a two-link planar arm actuated only at the elbow, swung up from hanging.

Equations and the parameter set (unit masses and lengths, centres of mass at mid-link, unit link inertias,
``g = 9.8``, torque ``|tau| <= 1``) follow Sutton & Barto, *Reinforcement Learning: An Introduction* (1998),
sec. 11.3, after Spong, *The swing up control problem for the acrobot* (IEEE Control Systems 1995).
``th1`` is the shoulder angle from hanging straight down, ``th2`` the elbow angle relative to the first link.
The task is the textbook one: raise the tip one link length above the shoulder. The start box is the invented
Larkspur Science Hall robotics club's two-link gymnast: a club member steadies it by hand under the bar and lets
go, so it hangs within 0.15 rad of vertical, hip bent up to 0.2 rad either way, swaying at up to 0.1 rad/s at
the shoulder and 0.15 rad/s at the hip. Sutton & Barto also clip velocities (4 pi and 9 pi rad/s); that is not
differentiable and is left out here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from envs.base import Quantity, System, bounded, check_record, scalar, unit
from envs.sketch import Disc, Segment, Trace, Twist


@dataclass(frozen=True)
class AcrobotParams:
    link_mass_1: float = unit("kg", 1.0, positive=True)
    link_mass_2: float = unit("kg", 1.0, positive=True)
    link_length_1: float = unit("m", 1.0, positive=True)
    link_length_2: float = unit("m", 1.0, positive=True)
    com_1: float = unit("m", 0.5, positive=True)  # shoulder to centre of mass of link 1
    com_2: float = unit("m", 0.5, positive=True)  # elbow to centre of mass of link 2
    inertia_1: float = unit("kg m^2", 1.0, positive=True)  # about the centre of mass
    inertia_2: float = unit("kg m^2", 1.0, positive=True)
    gravity: float = unit("m/s^2", 9.8, positive=True)
    torque_limit: float = unit("N m", 1.0, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


@dataclass(frozen=True)
class AcrobotTask:
    w_height: float = bounded(1.0, nonnegative=True)  # weight on (l1 + l2 - tip height) / (l1 + l2)
    w_velocity: float = unit("s^2/rad^2", 0.001, nonnegative=True)
    w_torque: float = bounded(0.01, nonnegative=True)  # weight on (tau / torque_limit)^2
    init_low: tuple[float, ...] = (-0.15, -0.2, -0.1, -0.15)  # th1, th2 (rad), th1d, th2d (rad/s)
    init_high: tuple[float, ...] = (0.15, 0.2, 0.1, 0.15)
    # success: tip height above the shoulder exceeds this at some time
    goal_height: float = unit("m", 1.0, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


class Acrobot(System):
    name = "acrobot"
    state = (Quantity("shoulder_angle", "rad", angle=True), Quantity("elbow_angle", "rad", angle=True),
             Quantity("shoulder_velocity", "rad/s"), Quantity("elbow_velocity", "rad/s"))
    action = (Quantity("elbow_torque", "N m"),)
    Params = AcrobotParams
    Task = AcrobotTask
    default_dt = 0.05
    action_limits = ("torque_limit",)  # the Params field bounding each action, +-limit
    robustness_params = ("link_mass_1", "link_mass_2", "link_length_1", "link_length_2")  # not gravity or limits

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        p = self.params
        m1, m2, l1, lc1, lc2, i1, i2, g = (p.link_mass_1, p.link_mass_2, p.link_length_1, p.com_1, p.com_2,
                                           p.inertia_1, p.inertia_2, p.gravity)
        th1, th2, d1th, d2th, tau = q[..., 0], q[..., 1], qd[..., 0], qd[..., 1], u[..., 0]
        # Sutton & Barto (1998), sec. 11.3.
        d1 = m1 * lc1 ** 2 + m2 * (l1 ** 2 + lc2 ** 2 + 2 * l1 * lc2 * torch.cos(th2)) + i1 + i2
        d2 = m2 * (lc2 ** 2 + l1 * lc2 * torch.cos(th2)) + i2
        phi2 = m2 * lc2 * g * torch.cos(th1 + th2 - math.pi / 2)
        phi1 = (-m2 * l1 * lc2 * d2th ** 2 * torch.sin(th2) - 2 * m2 * l1 * lc2 * d2th * d1th * torch.sin(th2)
                + (m1 * lc1 + m2 * l1) * g * torch.cos(th1 - math.pi / 2) + phi2)
        dd2 = (tau + d2 / d1 * phi1 - m2 * l1 * lc2 * d1th ** 2 * torch.sin(th2) - phi2) / (
            m2 * lc2 ** 2 + i2 - d2 ** 2 / d1)
        dd1 = -(d2 * dd2 + phi1) / d1
        return torch.stack([dd1, dd2], dim=-1)

    def tip_height(self, x: Tensor) -> Tensor:
        """Height of the tip above the shoulder (m)."""
        p = self.params
        return -p.link_length_1 * torch.cos(x[..., 0]) - p.link_length_2 * torch.cos(x[..., 0] + x[..., 1])

    def stage_cost(self, x: Tensor) -> Tensor:
        p = self.params
        reach = p.link_length_1 + p.link_length_2
        return self.task.w_height * (reach - self.tip_height(x)) / reach + self.task.w_velocity * (
            x[..., 2] ** 2 + x[..., 3] ** 2)

    def effort_cost(self, u: Tensor) -> Tensor:
        return self.task.w_torque * (u[..., 0] / self.params.torque_limit) ** 2

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        return (self.tip_height(states) > self.task.goal_height).any(dim=0)

    @property
    def success_criterion(self) -> str:
        return f"tip rises more than {self.task.goal_height} m above the shoulder within the horizon"

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """The velocity bounds of Sutton and Barto's acrobot (1998, sec. 11.3):
        4 pi rad/s at the shoulder and 9 pi rad/s at the elbow."""
        return {"shoulder_velocity": (-4 * math.pi, 4 * math.pi), "elbow_velocity": (-9 * math.pi, 9 * math.pi)}

    def sketch(self, x: Sequence[float]) -> list:
        l1, l2 = scalar(self.params.link_length_1), scalar(self.params.link_length_2)
        goal, reach = self.task.goal_height, l1 + l2
        elbow = (l1 * math.sin(x[0]), -l1 * math.cos(x[0]))
        tip = (elbow[0] + l2 * math.sin(x[0] + x[1]), elbow[1] - l2 * math.cos(x[0] + x[1]))
        return [Segment((-reach, goal), (reach, goal), 0.017, "goal", dashed=True), Trace(tip),
                Segment((0.0, 0.0), elbow, 0.045), Segment(elbow, tip, 0.045), Disc((0.0, 0.0), 0.05, "hollow"),
                Disc(elbow, 0.05, "accent"), Twist(elbow, 0.25, 0)]

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        r = 1.15 * (scalar(self.params.link_length_1) + scalar(self.params.link_length_2))
        return (-r, r, -r, r)
