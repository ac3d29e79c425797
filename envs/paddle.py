"""Ball paddling: a paddle on a vertical linear motor keeps a ball bouncing to a target height.

Vertical motion only. The ball (mass ``m``, radius ``r``, centre height ``z``) falls under gravity and bounces on
the paddle (mass ``M``, top surface at ``p``), which is counterbalanced on its guide (gravity does not act on it
net), slowed by viscous guide friction ``b`` and driven by the motor force ``u``. They touch through the smoothed
Kelvin-Voigt contact of :mod:`envs.contact` with gap ``z - r - p``:

    m zdd = N - m g
    M pdd = u - b pd - N

The pair's coefficient of restitution is that of the linear spring-dashpot with the effective mass
``m M / (m + M)`` (:func:`envs.contact.kelvin_voigt_restitution`, about 0.81 with the defaults). Between bounces
the ball is ballistic, so its apex height ``z + zd^2 / (2 g)`` is known at every instant of flight; the cost and
the success test use it. This is the vertical one-degree-of-freedom juggler studied by Buhler & Koditschek (1990,
"From stable to chaotic juggling: theory, simulation, and experiments", IEEE ICRA; from memory) with a soft instead
of an instantaneous impact. The default numbers describe the
invented Larkspur Science Hall's paddling exhibit: a 50 g foam ball on a 0.5 kg paddle, kept bouncing 1 m high.

Time step: the contact oscillates at ``sqrt(k (1/m + 1/M)) = 66 rad/s`` (a contact lasts 48 ms); ``dt = 4 ms``
gives ``w dt = 0.27``, inside the stability regions of RK4 and semi-implicit Euler with margin, and within a few
per cent of the closed-form restitution for both (tested).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import torch
from torch import Tensor

from envs.base import Quantity, System, bounded, check_record, scalar, unit
from envs.sketch import Box, Disc, Push, Segment, Trace
from envs.contact import kelvin_voigt_restitution, normal_force


@dataclass(frozen=True)
class PaddleParams:
    ball_mass: float = unit("kg", 0.05, positive=True)
    ball_radius: float = unit("m", 0.03, positive=True)
    paddle_mass: float = unit("kg", 0.5, positive=True)
    guide_friction: float = unit("N s/m", 1.0, nonnegative=True)  # viscous friction of the paddle's guide
    gravity: float = unit("m/s^2", 9.81, positive=True)
    contact_stiffness: float = unit("N/m", 200.0, positive=True)  # a soft foam ball: 2.5 mm static squash
    contact_damping: float = unit("N s/m", 0.4, nonnegative=True)
    contact_smoothing: float = unit("m", 2e-4, positive=True)  # softplus width of the contact onset
    force_limit: float = unit("N", 20.0, positive=True)

    def __post_init__(self) -> None:
        check_record(self)

    @property
    def effective_mass(self) -> float | Tensor:
        """Reduced mass of the ball-paddle pair (kg)."""
        return self.ball_mass * self.paddle_mass / (self.ball_mass + self.paddle_mass)

    @property
    def restitution(self) -> float | Tensor:
        """Coefficient of restitution of a ball-paddle impact (linear spring-dashpot, sharp-onset limit)."""
        return kelvin_voigt_restitution(self.contact_stiffness, self.contact_damping, self.effective_mass)


@dataclass(frozen=True)
class PaddleTask:
    target: float = unit("m", 1.0, positive=True)  # apex height of the ball's centre above the paddle's home position
    w_apex: float = unit("1/m^2", 1.0, nonnegative=True)  # on (apex - target)^2
    w_paddle: float = unit("1/m^2", 1.0, nonnegative=True)  # on p^2: stay near home
    w_paddle_velocity: float = unit("s^2/m^2", 0.01, nonnegative=True)
    w_force: float = bounded(0.01, nonnegative=True)  # on (u / force_limit)^2
    # ball height, paddle height (m), ball and paddle velocity (m/s): the ball is released above the paddle
    init_low: tuple[float, ...] = (0.4, -0.05, -0.5, -0.1)
    init_high: tuple[float, ...] = (1.2, 0.05, 0.5, 0.1)
    hold_time: float = unit("s", 2.0, positive=True)  # success: over the last hold_time seconds ...
    # ... every in-flight apex estimate within this of the target,
    apex_tolerance: float = unit("m", 0.1, positive=True)
    min_flight_fraction: float = 0.5  # ... the ball in flight at least this fraction of the time,
    paddle_travel: float = unit("m", 0.2, positive=True)  # ... and the paddle within this of home

    def __post_init__(self) -> None:
        if len(self.init_low) != 4 or len(self.init_high) != 4:
            raise ValueError(f"init_low and init_high must have 4 entries (ball and paddle height and velocity), "
                             f"got {len(self.init_low)} and {len(self.init_high)}")
        if not 0.0 < self.min_flight_fraction <= 1.0:
            raise ValueError(f"min_flight_fraction must be in (0, 1], got {self.min_flight_fraction}")
        check_record(self)


class Paddle(System):
    name = "paddle"
    state = (Quantity("ball_height", "m"), Quantity("paddle_height", "m"), Quantity("ball_velocity", "m/s"),
             Quantity("paddle_velocity", "m/s"))
    action = (Quantity("paddle_force", "N"),)
    Params = PaddleParams
    Task = PaddleTask
    default_dt = 0.004
    action_limits = ("force_limit",)  # the Params field bounding each action, +-limit
    # Model error of the exhibit: both masses, and the ball's stiffness and damping, which with the masses set the
    # restitution (envs.contact.kelvin_voigt_restitution); the guide's friction; not gravity, size or the force limit.
    robustness_params = ("ball_mass", "paddle_mass", "contact_stiffness", "contact_damping", "guide_friction")

    def gap(self, x: Tensor) -> Tensor:
        """Clearance between the ball's underside and the paddle (m), ``(B,)``; negative when squashed."""
        return x[..., 0] - self.params.ball_radius - x[..., 1]

    def contact_force(self, q: Tensor, qd: Tensor) -> Tensor:
        """Normal force of the paddle on the ball (N), ``(B,)``."""
        p = self.params
        gap = q[..., 0] - p.ball_radius - q[..., 1]
        return normal_force(gap, qd[..., 0] - qd[..., 1], p.contact_stiffness, p.contact_damping,
                            p.contact_smoothing)

    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        p = self.params
        n = self.contact_force(q, qd)
        ball = n / p.ball_mass - p.gravity
        paddle = (u[..., 0] - p.guide_friction * qd[..., 1] - n) / p.paddle_mass
        return torch.stack([ball, paddle], dim=-1)

    def apex(self, x: Tensor) -> Tensor:
        """Height (m) the ball's centre would reach in free flight from ``x``: ``z + zd^2 / (2 g)``, ``(B,)``."""
        return x[..., 0] + x[..., 2] ** 2 / (2 * self.params.gravity)

    def stage_cost(self, x: Tensor) -> Tensor:
        t = self.task
        return (t.w_apex * (self.apex(x) - t.target) ** 2 + t.w_paddle * x[..., 1] ** 2
                + t.w_paddle_velocity * x[..., 3] ** 2)

    def effort_cost(self, u: Tensor) -> Tensor:
        return self.task.w_force * (u[..., 0] / self.params.force_limit) ** 2

    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        t = self.task
        w = self.final_window(states, t.hold_time)  # (k, B, 4)
        flying = self.gap(w) > 0
        on_target = (self.apex(w) - t.target).abs() < t.apex_tolerance
        in_travel = (w[..., 1].abs() < t.paddle_travel).all(dim=0)
        flight_ok = (on_target | ~flying).all(dim=0)
        return in_travel & flight_ok & (flying.float().mean(dim=0) >= t.min_flight_fraction)

    @property
    def success_criterion(self) -> str:
        t = self.task
        return (f"over the last {t.hold_time} s the ball flies at least {t.min_flight_fraction:.0%} of the time, "
                f"every in-flight apex within {t.apex_tolerance} m of {t.target} m, the paddle within "
                f"{t.paddle_travel} m of home")

    # ---- deployment facts ---------------------------------------------------------------------------------
    @property
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """The Larkspur exhibit's envelope (invented, as the exhibit is): the paddle within its motor's stroke of
        0.3 m either side of home, and the ball below the top of its clear tube, twice the target height."""
        return {"paddle_height": (-0.3, 0.3), "ball_height": (-math.inf, 2 * self.task.target)}

    def sketch(self, x: Sequence[float]) -> list:
        ball, paddle, target = x[0], x[1], self.task.target
        low, high = self.state_limits["paddle_height"]
        return [Box((0.0, low - 0.1), 0.14, 0.2, role="support"),  # the linear motor, below its stroke
                Segment((-0.3, target), (0.3, target), 0.008, "goal", dashed=True),
                *(Segment((-0.2, y), (0.2, y), 0.006, "limit", dashed=True) for y in (low, high)),
                Segment((0.0, low), (0.0, paddle - 0.02), 0.03, "support"),  # the motor's rod
                Box((0.0, paddle - 0.01), 0.3, 0.02, role="body"), Trace((0.0, ball)),
                Disc((0.0, ball), scalar(self.params.ball_radius)), Push((0.25, paddle), (0.0, 1.0), 0.3, 0)]

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        top = max(max(s[0] for s in states) + scalar(self.params.ball_radius), self.task.target) + 0.15
        bottom = min(self.state_limits["paddle_height"][0] - 0.25, min(s[1] for s in states) - 0.1)
        return (-0.6, 0.6, bottom, top)
