"""Gantry crane: a trolley on a rail carrying a payload on a rope, moved a set distance without residual sway.

Lagrange's equations for a cart with a point-mass pendulum (rope massless and rigid, ``phi`` the sway angle from
hanging, ``b`` viscous rolling resistance of the trolley):

    (M + m) xdd + m L cos(phi) phidd - m L phid^2 sin(phi) = F - b xd
    L phidd + cos(phi) xdd + g sin(phi) = 0

(the standard cart-pendulum derivation; the tests check it against the mass-matrix form of the same Lagrangian).
Default numbers describe the invented Brackwater Quay terminal's yard crane: a 5 t trolley, a 10 t container on
an 8 m hoist, moved 10 m along the rail.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from envs.base import Quantity, System, bounded, check_record, scalar, unit
from envs.sketch import Box, Ground, Polygon, Push, Segment, Trace


@dataclass(frozen=True)
class CraneParams:
    trolley_mass: float = unit("kg", 5000.0, positive=True)
    load_mass: float = unit("kg", 10000.0, positive=True)
    rope_length: float = unit("m", 8.0, positive=True)
    gravity: float = unit("m/s^2", 9.81, positive=True)
    rolling_resistance: float = unit("N s/m", 500.0, nonnegative=True)
    force_limit: float = unit("N", 15000.0, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


@dataclass(frozen=True)
class CraneTask:
    distance: float = unit("m", 10.0)  # where the trolley must stop
    w_position: float = unit("1/m^2", 0.05, nonnegative=True)
    w_sway: float = unit("1/rad^2", 10.0, nonnegative=True)
    w_velocity: float = unit("s^2/m^2", 0.05, nonnegative=True)
    w_sway_rate: float = unit("s^2/rad^2", 1.0, nonnegative=True)
    w_force: float = bounded(0.01, nonnegative=True)  # weight on (F / force_limit)^2
    init_low: tuple[float, ...] = (-0.5, -0.05, -0.1, -0.05)  # x (m), phi (rad), xd (m/s), phid (rad/s)
    init_high: tuple[float, ...] = (0.5, 0.05, 0.1, 0.05)
    hold_time: float = unit("s", 2.0, positive=True)  # success: for the last hold_time seconds ...
    position_tolerance: float = unit("m", 0.1, positive=True)  # ... the trolley within this of the target
    sway_tolerance: float = unit("rad", 0.01, positive=True)  # ... and the load swaying less than this (8 cm at 8 m)

    def __post_init__(self) -> None:
        check_record(self)


class Crane(System):
    name = "crane"
    state = (Quantity("trolley_position", "m"), Quantity("sway_angle", "rad", angle=True),
             Quantity("trolley_velocity", "m/s"), Quantity("sway_rate", "rad/s"))
    action = (Quantity("trolley_force", "N"),)
    Params = CraneParams
    Task = CraneTask
    default_dt = 0.1
    action_limits = ("force_limit",)  # the Params field bounding each action, +-limit
    robustness_params = ("load_mass", "rope_length", "trolley_mass", "rolling_resistance")  # not gravity or limits

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        p = self.params
        phi, xd, phid, f = q[..., 1], qd[..., 0], qd[..., 1], u[..., 0]
        s, c = torch.sin(phi), torch.cos(phi)
        # Eliminate phidd from the two Lagrange equations above.
        xdd = (f - p.rolling_resistance * xd + p.load_mass * s * (p.rope_length * phid ** 2 + p.gravity * c)) / (
            p.trolley_mass + p.load_mass * s ** 2)
        phidd = -(c * xdd + p.gravity * s) / p.rope_length
        return torch.stack([xdd, phidd], dim=-1)

    def sway_frequency(self) -> float:
        """Small-oscillation angular frequency (rad/s) of the free trolley and load, sqrt(g (M + m) / (M L))."""
        p = self.params
        return float((p.gravity * (p.trolley_mass + p.load_mass) / (p.trolley_mass * p.rope_length)) ** 0.5)

    def stage_cost(self, x: Tensor) -> Tensor:
        t = self.task
        return (t.w_position * (x[..., 0] - t.distance) ** 2 + t.w_sway * 2 * (1 - torch.cos(x[..., 1]))
                + t.w_velocity * x[..., 2] ** 2 + t.w_sway_rate * x[..., 3] ** 2)

    def effort_cost(self, u: Tensor) -> Tensor:
        return self.task.w_force * (u[..., 0] / self.params.force_limit) ** 2

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        t = self.task
        w = self.final_window(states, t.hold_time)
        return (((w[..., 0] - t.distance).abs() < t.position_tolerance) & (w[..., 1].abs() < t.sway_tolerance)).all(dim=0)

    @property
    def success_criterion(self) -> str:
        t = self.task
        return (f"trolley within {t.position_tolerance} m of {t.distance} m and sway below {t.sway_tolerance} rad "
                f"for the last {t.hold_time} s")

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """The envelope of the Brackwater Quay yard (invented, as the crane is): the trolley within 2 m beyond
        the start and the target, the load within 0.3 rad (2.4 m at 8 m) of hanging."""
        return {"trolley_position": (-2.0, self.task.distance + 2.0), "sway_angle": (-0.3, 0.3)}

    def sketch(self, x: Sequence[float]) -> list:
        rope, d = scalar(self.params.rope_length), self.task.distance
        floor = -rope - 2.5
        tx = x[0]
        load = (tx + rope * math.sin(x[1]), -rope * math.cos(x[1]))
        corrugations = [Segment((load[0] - 1.2 + 0.4 * k, load[1] - 1.1), (load[0] - 1.2 + 0.4 * k, load[1] - 0.1),
                                0.026, "detail") for k in range(1, 6)]  # a container, not a block
        return [Segment((-2.5, 0.3), (d + 2.5, 0.3), 0.15),  # the rail
                *(Segment((post, 0.3), (post, floor), 0.11, "support") for post in (-2.5, d + 2.5)),
                Ground(-2.5, d + 2.5, floor), Polygon(((d - 0.4, floor), (d + 0.4, floor), (d, floor + 0.6))),
                Trace(load), Box((tx, 0.3), 1.6, 0.5), Segment((tx, 0.05), load, 0.045),
                Box((load[0], load[1] - 0.6), 2.4, 1.2, role="body"), *corrugations,
                Push((tx, 0.3), (1.0, 0.0), 3.0, 0, clearance=0.8)]

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        return (-3.0, self.task.distance + 3.0, -scalar(self.params.rope_length) - 3.0, 1.5)
