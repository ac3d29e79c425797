"""The update interface: what one training iteration does to the policy.

The training loop (:func:`apg.train.train`) owns everything every method shares: the run directory, the record,
the minibatch of initial states, the held-out evaluation, budgets, the learning-rate schedule, checkpoints and
monitors. An update owns only what differs between methods: its optimiser, its own random stream, anything it
learns beside the policy (a critic), and how it turns a minibatch into a parameter change.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar

import torch
from torch import Tensor

from apg.optim import OptimSettings
from apg.policies import Policy
from apg.rollout import Trajectory
from envs.base import System

if TYPE_CHECKING:
    from apg.distributed import Shard
    from apg.runs import TrainSettings


class NonFiniteError(RuntimeError):
    """A rollout or its gradient produced NaN or Inf."""


@dataclass(frozen=True)
class StepResult:
    """What one update did: the minibatch objective, the gradient norm before clipping, the simulator steps it
    spent, the rollouts it made (detached; ``None`` if it keeps none) and any method-specific statistics."""

    loss: float
    grad_norm: float
    sim_steps: int
    trajectory: Trajectory | None = None
    stats: dict[str, float] = field(default_factory=dict)


class Update(abc.ABC):
    """Contract: :meth:`prepare` once (after the policy is built from the run's seed), then per iteration
    :meth:`set_learning_rate` and :meth:`step`. ``step`` changes the policy's parameters, draws randomness only
    from its own generator and the ``generator`` it is given (the run's training stream), and raises
    :class:`NonFiniteError` with a diagnosis when the numbers stop being finite. :meth:`state_dict` holds
    everything that must survive a resume (optimiser state, random streams, critics)."""

    name: ClassVar[str]
    differentiable: ClassVar[bool] = True  # it differentiates the simulator (so gradient diagnostics apply)
    settings: Any  # the settings record the run records (EstimatorSettings or PPOSettings)

    def check(self, settings: "TrainSettings", shard: "Shard") -> None:
        """Refuse loop settings this method cannot honour (raise ``ValueError`` naming them)."""

    @abc.abstractmethod
    def prepare(self, system: System, policy: Policy, optim: OptimSettings, settings: "TrainSettings", seed: int,
                shard: "Shard") -> None:
        ...

    @property
    @abc.abstractmethod
    def optimiser(self) -> torch.optim.Optimizer:
        ...

    def set_learning_rate(self, lr: float) -> None:
        for group in self.optimiser.param_groups:
            group["lr"] = lr

    @abc.abstractmethod
    def step(self, system: System, policy: Policy, x0: Tensor, horizon: int,
             generator: torch.Generator) -> StepResult:
        ...

    @abc.abstractmethod
    def steps_per_iteration(self, batch: int, horizon: int) -> int:
        """Simulator steps one :meth:`step` spends on ``batch`` initial states."""

    @abc.abstractmethod
    def state_dict(self) -> dict[str, Any]:
        ...

    @abc.abstractmethod
    def load_state_dict(self, state: dict[str, Any]) -> None:
        ...

    @property
    def title(self) -> str:
        return self.name
