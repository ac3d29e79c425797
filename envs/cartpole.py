"""Cart-pole: a uniform pole hinged on a cart driven by a horizontal force.

Equations of motion: Florian, *Correct equations for the dynamics of the cart-pole system* (2007), eqs. (21)-(22)
with both friction coefficients zero (they then coincide with Barto, Sutton, Anderson 1983). ``th`` is the pole
angle from upright, positive when the pole's top moves towards +x; ``l`` is the half-length of the pole.
Two tasks share this model: balance from near upright, and swing up from hanging (``configs/system``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from envs.base import Quantity, System, bounded, check_record, scalar, unit, wrap_angle
from envs.sketch import Box, Disc, Ground, Push, Segment, Trace


@dataclass(frozen=True)
class CartPoleParams:
    cart_mass: float = unit("kg", 1.0, positive=True)
    pole_mass: float = unit("kg", 0.1, positive=True)
    half_length: float = unit("m", 0.5, positive=True)
    gravity: float = unit("m/s^2", 9.8, positive=True)
    force_limit: float = unit("N", 10.0, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


@dataclass(frozen=True)
class CartPoleTask:
    w_position: float = unit("1/m^2", 0.1, nonnegative=True)
    w_angle: float = bounded(1.0, nonnegative=True)  # weight on (1 - cos th)
    w_velocity: float = unit("s^2/m^2", 0.01, nonnegative=True)
    w_angular_velocity: float = unit("s^2/rad^2", 0.01, nonnegative=True)
    w_force: float = bounded(0.01, nonnegative=True)  # weight on (u / force_limit)^2
    init_low: tuple[float, ...] = (-0.5, -0.2, -0.2, -0.2)  # x (m), th (rad), xd (m/s), thd (rad/s)
    init_high: tuple[float, ...] = (0.5, 0.2, 0.2, 0.2)
    track_limit: float = unit("m", 2.4, positive=True)  # success: the cart never leaves |x| < track_limit
    hold_time: float = unit("s", 1.0, positive=True)  # ... and the pole is upright for the last hold_time seconds
    angle_tolerance: float = unit("rad", 0.1, positive=True)
    position_tolerance: float = unit("m", 0.5, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


class CartPole(System):
    name = "cartpole"
    state = (Quantity("cart_position", "m"), Quantity("pole_angle", "rad", angle=True),
             Quantity("cart_velocity", "m/s"), Quantity("pole_angular_velocity", "rad/s"))
    action = (Quantity("force", "N"),)
    Params = CartPoleParams
    Task = CartPoleTask
    default_dt = 0.05
    action_limits = ("force_limit",)  # the Params field bounding each action, +-limit
    robustness_params = ("cart_mass", "pole_mass", "half_length")  # model error; not gravity or limits

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        p = self.params
        th, thd, f = q[..., 1], qd[..., 1], u[..., 0]
        total = p.cart_mass + p.pole_mass
        s, c = torch.sin(th), torch.cos(th)
        # Florian (2007) eq. (21) and (22) with mu_c = mu_p = 0.
        thdd = (p.gravity * s + c * (-f - p.pole_mass * p.half_length * thd ** 2 * s) / total) / (
            p.half_length * (4.0 / 3.0 - p.pole_mass * c ** 2 / total))
        xdd = (f + p.pole_mass * p.half_length * (thd ** 2 * s - thdd * c)) / total
        return torch.stack([xdd, thdd], dim=-1)

    def stage_cost(self, x: Tensor) -> Tensor:
        t = self.task
        return (t.w_position * x[..., 0] ** 2 + t.w_angle * (1 - torch.cos(x[..., 1])) + t.w_velocity * x[..., 2] ** 2
                + t.w_angular_velocity * x[..., 3] ** 2)

    def effort_cost(self, u: Tensor) -> Tensor:
        return self.task.w_force * (u[..., 0] / self.params.force_limit) ** 2

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        t = self.task
        on_track = (states[..., 0].abs() < t.track_limit).all(dim=0)
        w = self.final_window(states, t.hold_time)
        held = ((wrap_angle(w[..., 1]).abs() < t.angle_tolerance) & (w[..., 0].abs() < t.position_tolerance)).all(dim=0)
        return on_track & held

    @property
    def success_criterion(self) -> str:
        t = self.task
        return (f"cart stays within |x| < {t.track_limit} m; |pole angle| < {t.angle_tolerance} rad and "
                f"|x| < {t.position_tolerance} m for the last {t.hold_time} s")

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """The task's track, ``|x| < track_limit`` (2.4 m by default, as in Barto, Sutton and Anderson 1983)."""
        t = self.task
        return {"cart_position": (-t.track_limit, t.track_limit)}

    def sketch(self, x: Sequence[float]) -> list:
        pole = 2 * scalar(self.params.half_length)
        w, h = 0.5, 0.25  # the cart's size is drawn, not simulated
        limit = self.task.track_limit
        floor = -h / 2 - 0.05
        cx = x[0]
        tip = (cx + pole * math.sin(x[1]), pole * math.cos(x[1]))
        return [Ground(-limit - 0.4, limit + 0.4, floor),
                *(Segment((edge, floor), (edge, h), 0.012, "limit", dashed=True) for edge in (-limit, limit)),
                Segment((0.0, floor), (0.0, floor - 0.07), 0.03, "goal"), Trace(tip),
                Box((cx, 0.0), w, h), Segment((cx, 0.0), tip, 0.045), Disc((cx, 0.0), 0.04),
                Push((cx, 0.0), (1.0, 0.0), 0.8, 0, clearance=w / 2)]

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        lim = self.task.track_limit + 0.5
        return (-lim, lim, -0.6, 2 * scalar(self.params.half_length) + 0.4)
