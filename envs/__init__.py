"""Differentiable planar systems and their registry.

>>> import envs
>>> sys = envs.build("pendulum", params={"torque_limit": 2.0})
>>> envs.available()
('acrobot', 'cartpole', 'crane', 'double_integrator', 'paddle', 'pendulum', 'pogo', 'quadrotor')
"""

from __future__ import annotations

from typing import Any, Mapping

from envs.acrobot import Acrobot
from envs.base import Quantity, System, make_record
from envs.cartpole import CartPole
from envs.crane import Crane
from envs.double_integrator import DoubleIntegrator
from envs.pogo import Pogo
from envs.integrators import INTEGRATORS
from envs.paddle import Paddle
from envs.pendulum import Pendulum
from envs.quadrotor import Quadrotor

SYSTEMS: dict[str, type[System]] = {cls.name: cls for cls in (DoubleIntegrator, Pendulum, CartPole, Acrobot,
                                                                 Quadrotor, Crane, Pogo, Paddle)}


def available() -> tuple[str, ...]:
    """Names accepted by :func:`build`."""
    return tuple(sorted(SYSTEMS))


def system_class(name: str) -> type[System]:
    """The class registered as ``name``; an unknown name lists the valid ones."""
    try:
        return SYSTEMS[name]
    except KeyError:
        raise ValueError(f"unknown system {name!r}; choose one of {', '.join(available())}") from None


def build(name: str, params: Mapping[str, Any] | None = None, task: Mapping[str, Any] | None = None,
         dt: float | None = None, integrator: str = "rk4") -> System:
    """Build a system by name, overriding any physical parameter or task setting by keyword.

    Raises:
        ValueError: unknown name or key, or a value out of range (the message names it).
    """
    cls = system_class(name)
    return cls(params=make_record(cls.Params, params, "params"), task=make_record(cls.Task, task, "task"), dt=dt,
               integrator=integrator)


__all__ = ["System", "Quantity", "SYSTEMS", "INTEGRATORS", "available", "build", "system_class", "Acrobot", "CartPole",
           "Crane", "DoubleIntegrator", "Pogo", "Paddle", "Pendulum", "Quadrotor"]
