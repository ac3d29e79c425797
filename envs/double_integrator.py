"""Linear double integrator ``m * xdd = u`` with a quadratic cost: the linear-quadratic reference case.

With the action held over a step (zero-order hold) the exact discrete model is
``x' = A x + B u``, ``A = [[1, dt], [0, 1]]``, ``B = [[dt^2 / (2 m)], [dt / m]]`` (RK4 reproduces it exactly);
semi-implicit Euler gives ``B = [[dt^2 / m], [dt / m]]``. Following the systems' convention the running cost is
``(x'Qx + u'Ru) dt``, so the discrete LQ problem has the per-step weights ``Q dt`` and ``R dt``; the terminal
cost is ``x'Px`` with ``P`` from the discrete algebraic Riccati equation of those weights, so the finite-horizon
problem has the infinite-horizon LQR gain as its optimal time-invariant policy (Bertsekas, *Dynamic Programming
and Optimal Control*, vol. 1, sec. 4.1). Scaling both weights by ``dt`` scales ``P`` by ``dt`` and leaves the
gain ``(R + B'PB)^-1 B'PA`` unchanged.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Sequence

import numpy as np
import scipy.linalg
import torch
from torch import Tensor

from envs.base import Quantity, System, check_record, unit
from envs.sketch import Box, Ground, Push, Segment


@dataclass(frozen=True)
class DoubleIntegratorParams:
    mass: float = unit("kg", 1.0, positive=True)
    force_limit: float = unit("N", 10.0, positive=True)

    def __post_init__(self) -> None:
        check_record(self)


@dataclass(frozen=True)
class DoubleIntegratorTask:
    q_position: float = unit("1/m^2", 1.0, positive=True)  # Q = diag(q_position, q_velocity)
    q_velocity: float = unit("s^2/m^2", 0.1, nonnegative=True)
    r_force: float = unit("1/N^2", 0.1, positive=True)  # R
    init_low: tuple[float, ...] = (-2.0, -1.0)  # position (m), velocity (m/s)
    init_high: tuple[float, ...] = (2.0, 1.0)
    tolerance: float = unit("m", 0.05, positive=True)  # success: |position| and |velocity| below this at the end

    def __post_init__(self) -> None:
        check_record(self)


class DoubleIntegrator(System):
    name = "double_integrator"
    state = (Quantity("position", "m"), Quantity("velocity", "m/s"))
    action = (Quantity("force", "N"),)
    Params = DoubleIntegratorParams
    Task = DoubleIntegratorTask
    default_dt = 0.1
    action_limits = ("force_limit",)  # the Params field bounding each action, +-limit
    robustness_params = ("mass",)  # the only physical parameter besides the force limit

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        return (u[..., 0] / self.params.mass).unsqueeze(-1)  # a (B,) mass divides row-wise

    # ---- linear-quadratic structure ---------------------------------------------------------------------
    def linear_model(self) -> tuple[np.ndarray, np.ndarray]:
        """Exact discrete ``(A, B)`` of this system's step with its integrator (nominal mass)."""
        dt, m = self.dt, float(torch.as_tensor(self.params.mass, dtype=torch.float64).mean())
        a = np.array([[1.0, dt], [0.0, 1.0]])
        b_pos = dt * dt / m if self.integrator == "semi_implicit_euler" else dt * dt / (2 * m)
        return a, np.array([[b_pos], [dt / m]])

    @property
    def Q(self) -> np.ndarray:
        """Per-step state weight of the discrete LQ problem, ``diag(q_position, q_velocity) * dt``."""
        return np.diag([self.task.q_position, self.task.q_velocity]) * self.dt

    @property
    def R(self) -> np.ndarray:
        """Per-step action weight of the discrete LQ problem, ``r_force * dt``."""
        return np.array([[self.task.r_force]]) * self.dt

    @cached_property
    def riccati(self) -> np.ndarray:
        """``P`` of the discrete algebraic Riccati equation; ``x'Px`` is the infinite-horizon cost-to-go."""
        a, b = self.linear_model()
        return scipy.linalg.solve_discrete_are(a, b, self.Q, self.R)

    def stage_cost(self, x: Tensor) -> Tensor:
        t = self.task
        return t.q_position * x[..., 0] ** 2 + t.q_velocity * x[..., 1] ** 2

    def effort_cost(self, u: Tensor) -> Tensor:
        return self.task.r_force * u[..., 0] ** 2

    def terminal_cost(self, x: Tensor) -> Tensor:
        """``x'Px``: the cost-to-go of the LQR policy, in place of the stage cost."""
        p = torch.as_tensor(self.riccati, dtype=x.dtype)
        return torch.einsum("bi,ij,bj->b", x, p, x)

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        return (states[-1].abs() < self.task.tolerance).all(dim=-1)

    @property
    def success_criterion(self) -> str:
        return f"final |position| < {self.task.tolerance} m and |velocity| < {self.task.tolerance} m/s"

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """A 10 m test track, ``|position| <= 5 m``: over twice the initial box, so only a wild policy leaves."""
        return {"position": (-5.0, 5.0)}

    def sketch(self, x: Sequence[float]) -> list:
        return [Ground(-3.0, 3.0, -0.15), Segment((0.0, -0.15), (0.0, -0.3), 0.03, "goal"),
                Box((x[0], 0.0), 0.4, 0.3), Push((x[0], 0.0), (1.0, 0.0), 1.0, 0, clearance=0.2)]

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        lim = max(3.0, max(abs(s[0]) for s in states) + 0.5)
        return (-lim, lim, -1.0, 1.0)
