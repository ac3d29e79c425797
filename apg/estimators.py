"""Gradient estimators of the rollout objective ``J(theta) = E_x0[ sum_t c(x_t, u_t) + c_T(x_T) ]``.

Every estimator answers the same question: given a policy, a minibatch of initial states and a seeded
generator, what is (an estimate of) ``dJ/dtheta``, and how many simulator steps did that cost? The trainer
takes any of them, so adding one is adding a class here and a YAML file in ``configs/estimator``.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass
from typing import ClassVar

import torch
from torch import Tensor, nn

from apg.rollout import Trajectory, rollout
from envs.base import System


@dataclass(frozen=True)
class EstimatorSettings:
    """Which estimator to use; ``configs/estimator/*.yaml`` fill this record."""

    name: str = "analytic"


@dataclass(frozen=True)
class Estimate:
    """One gradient estimate: ``grads`` align with ``[p for p in policy.parameters()]``."""

    loss: Tensor  # scalar, the minibatch objective (detached)
    grads: tuple[Tensor, ...]
    sim_steps: int  # simulator steps spent on this estimate (batch x horizon x evaluations)
    trajectory: Trajectory | None = None  # the nominal rollout, detached, when the estimator made one


class GradientEstimator(abc.ABC):
    """Contract: ``estimate(system, policy, x0, horizon, generator) -> Estimate``.

    ``x0`` is ``(B, state_dim)``; the objective is the batch mean of ``Trajectory.total_cost``. The estimator
    must not change the policy's parameters, and must draw any randomness from ``generator`` only.
    """

    name: ClassVar[str]

    @abc.abstractmethod
    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        ...


class Analytic(GradientEstimator):
    """The exact gradient of the minibatch objective by backpropagation through time."""

    name = "analytic"

    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        traj = rollout(system, policy, x0, horizon)
        loss = traj.total_cost.mean()
        grads = torch.autograd.grad(loss, list(policy.parameters()), allow_unused=True)
        grads = tuple(torch.zeros_like(p) if g is None else g for g, p in zip(grads, policy.parameters()))
        return Estimate(loss.detach(), grads, x0.shape[0] * horizon, traj.detach())


ESTIMATORS: dict[str, type[GradientEstimator]] = {cls.name: cls for cls in (Analytic,)}


def make_estimator(settings: EstimatorSettings) -> GradientEstimator:
    """The estimator named in ``settings``; an unknown name lists the valid ones."""
    try:
        cls = ESTIMATORS[settings.name]
    except KeyError:
        raise ValueError(f"unknown estimator {settings.name!r}; choose one of {', '.join(sorted(ESTIMATORS))}") from None
    return cls()
