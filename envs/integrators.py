"""Fixed-step integrators for second-order systems ``qdd = f(q, qd, u)`` with the action held over the step.

* ``semi_implicit_euler``: velocity first, then position with the new velocity (symplectic Euler; first order,
  bounded energy error on conservative systems; Hairer, Lubich, Wanner, *Geometric Numerical Integration*, 2006).
* ``rk4``: the classical fourth-order Runge-Kutta method on the first-order system ``(q, qd)``.
"""

from __future__ import annotations

from typing import Callable

from torch import Tensor

Accel = Callable[[Tensor, Tensor, Tensor], Tensor]


def semi_implicit_euler(f: Accel, q: Tensor, qd: Tensor, u: Tensor, dt: float) -> tuple[Tensor, Tensor]:
    qd1 = qd + dt * f(q, qd, u)
    return q + dt * qd1, qd1


def rk4(f: Accel, q: Tensor, qd: Tensor, u: Tensor, dt: float) -> tuple[Tensor, Tensor]:
    k1q, k1v = qd, f(q, qd, u)
    k2q, k2v = qd + 0.5 * dt * k1v, f(q + 0.5 * dt * k1q, qd + 0.5 * dt * k1v, u)
    k3q, k3v = qd + 0.5 * dt * k2v, f(q + 0.5 * dt * k2q, qd + 0.5 * dt * k2v, u)
    k4q, k4v = qd + dt * k3v, f(q + dt * k3q, qd + dt * k3v, u)
    q1 = q + dt / 6.0 * (k1q + 2 * k2q + 2 * k3q + k4q)
    qd1 = qd + dt / 6.0 * (k1v + 2 * k2v + 2 * k3v + k4v)
    return q1, qd1


INTEGRATORS: dict[str, Callable[..., tuple[Tensor, Tensor]]] = {
    "semi_implicit_euler": semi_implicit_euler,
    "rk4": rk4,
}


def integrator_step(name: str, f: Accel, q: Tensor, qd: Tensor, u: Tensor, dt: float) -> tuple[Tensor, Tensor]:
    """One step of the integrator called ``name`` (a key of :data:`INTEGRATORS`)."""
    return INTEGRATORS[name](f, q, qd, u, dt)
