"""The gradient-estimator interface: its settings record, its result and its contract, stated once.

:class:`GradientEstimator` is what the trainer calls; :class:`EstimatorSettings` is the record
``configs/estimator/*.yaml`` fill; :class:`Estimate` is what one call returns. The helpers at the end are shared
by more than one estimator family: :func:`_bptt` (the gradient of a loss with respect to every policy parameter)
and the batched rollouts of several copies of the minibatch (:func:`_tile_system`, :func:`_noisy_rollout`).
"""

from __future__ import annotations

import abc
import copy
import dataclasses
from dataclasses import dataclass
from typing import Callable, ClassVar

import torch
from torch import Tensor, nn

from apg.rollout import ActionNoise, RolloutOptions, Trajectory, rollout
from envs.base import System, check_record

BASELINES = ("leave_one_out", "none")


def _registry() -> dict[str, type[GradientEstimator]]:
    """:data:`apg.estimators.ESTIMATORS`, looked up when a record is checked: the registry imports this module,
    so importing it here at load time would be a cycle."""
    from apg.estimators import ESTIMATORS

    return ESTIMATORS


@dataclass(frozen=True)
class EstimatorSettings:
    """Which estimator to use and its settings; ``configs/estimator/*.yaml`` fill this record."""

    name: str = "analytic"  # analytic | terminal_value | es | likelihood_ratio | alpha_order
    pairs: int = 16  # es: antithetic perturbation pairs per estimate (2 x pairs rollouts of every initial state)
    sigma: float = 0.02  # es: standard deviation of the parameter perturbation (parameter units)
    rank_shaping: bool = False  # es: centred-rank fitness shaping (Salimans et al. 2017); biased, scale-free
    samples: int = 4  # likelihood_ratio, alpha_order: noisy rollouts per initial state
    action_noise: float = 0.1  # likelihood_ratio, alpha_order: noise std as a fraction of each action's half-range
    baseline: str = "leave_one_out"  # likelihood_ratio, alpha_order: leave_one_out | none
    alpha: float = 0.5  # alpha_order: weight of the first-order term (1: pathwise only, 0: likelihood ratio only)
    window: int = 0  # analytic, terminal_value: steps per truncated-BPTT window, state detached between (0: none)
    critic_hidden: tuple[int, ...] = (64, 64)  # terminal_value: widths of the value network (tanh)
    critic_lr: float = 1.0e-3  # terminal_value: Adam learning rate of the value network
    critic_iterations: int = 16  # terminal_value: value-regression steps per estimate

    def __post_init__(self) -> None:
        estimators = _registry()
        if self.name not in estimators:
            raise ValueError(f"name must be one of {', '.join(sorted(estimators))}; got {self.name!r}")
        if self.baseline not in BASELINES:
            raise ValueError(f"baseline must be one of {', '.join(BASELINES)}; got {self.baseline!r}")
        check_record(self, positive=("pairs", "sigma", "samples", "action_noise", "critic_lr", "critic_iterations"),
                     nonnegative=("window",))
        if any(int(h) < 1 for h in self.critic_hidden):
            raise ValueError(f"critic_hidden widths must be >= 1, got {list(self.critic_hidden)}")
        if self.name == "terminal_value" and self.window < 1:
            raise ValueError("estimator terminal_value needs window >= 1 (steps per short horizon), e.g. "
                             "estimator.window=32")
        if not 0.0 <= self.alpha <= 1.0:
            raise ValueError(f"alpha must be in [0, 1], got {self.alpha}")
        if self.baseline == "leave_one_out" and self.samples < 2 and "baseline" in estimators[self.name].uses:
            raise ValueError(f"baseline=leave_one_out needs samples >= 2 (got {self.samples}); raise samples or "
                             f"set baseline=none")

    def ignored(self) -> list[str]:
        """Options set away from their defaults that the chosen estimator does not use."""
        used = _registry()[self.name].uses
        default = EstimatorSettings()
        return [f.name for f in dataclasses.fields(self)
                if f.name != "name" and f.name not in used and getattr(self, f.name) != getattr(default, f.name)]


@dataclass(frozen=True)
class Estimate:
    """One gradient estimate: ``grads`` align with ``[p for p in policy.parameters()]``."""

    loss: Tensor  # scalar, the minibatch objective (detached); for smoothed estimators, of the smoothed one
    grads: tuple[Tensor, ...]
    sim_steps: int  # simulator steps spent on this estimate (batch x horizon x evaluations)
    trajectory: Trajectory | None = None  # the rollouts it made, detached (all of them, batched along dim 1)


class GradientEstimator(abc.ABC):
    """Contract: ``estimate(system, policy, x0, horizon, generator) -> Estimate``.

    ``x0`` is ``(B, state_dim)``; the objective is the batch mean of ``Trajectory.total_cost``. The estimator
    must not change the policy's parameters, and must draw any randomness from ``generator`` only.
    ``reference_gradient`` returns the gradient of the objective the estimator is unbiased for, computed by a
    low-variance route (for studies); ``steps_per_estimate`` says what one estimate costs in simulator steps.
    """

    name: ClassVar[str]
    title: ClassVar[str] = ""  # a few words for tables and reports
    objective: ClassVar[str] = "exact minibatch objective"  # what reference_gradient differentiates
    uses: ClassVar[tuple[str, ...]] = ()  # the EstimatorSettings fields it reads (others warn when set)
    sample_field: ClassVar[str | None] = None  # the field that sets its number of samples per estimate
    stateful: ClassVar[bool] = False  # learns across iterations (state_dict is not empty)
    rollout_options: RolloutOptions = RolloutOptions()  # how differentiable rollouts run (memory, compilation)

    def state_dict(self) -> dict:
        """What the estimator learns across iterations (a critic, say), for checkpoints; empty for most."""
        return {}

    def load_state_dict(self, state: dict) -> None:
        """Restore :meth:`state_dict` (from a checkpoint)."""

    def with_rollout_options(self, options: RolloutOptions) -> "GradientEstimator":
        """A copy of this estimator whose differentiable rollouts run with ``options``."""
        new = copy.copy(self)
        new.rollout_options = options
        return new

    @abc.abstractmethod
    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        ...

    def steps_per_estimate(self, batch: int, horizon: int) -> int:
        """Simulator steps one ``estimate`` spends on ``batch`` initial states."""
        return batch * horizon

    def reference_gradient(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                           generator: torch.Generator, samples: int) -> tuple[Tensor, ...] | None:
        """The gradient of :attr:`objective` at the policy's parameters (``samples`` sets its precision where
        it is itself an average); ``None`` where the estimator is not unbiased for any objective."""
        return _bptt(rollout(system, policy, x0, horizon).total_cost.mean(), policy)


def _bptt(loss: Tensor, policy: nn.Module) -> tuple[Tensor, ...]:
    """``d loss / d theta`` for every policy parameter, zeros where the loss does not depend on one."""
    params = list(policy.parameters())
    grads = torch.autograd.grad(loss, params, allow_unused=True)
    return tuple(torch.zeros_like(p) if g is None else g for g, p in zip(grads, params))


# ---- batched rollouts of several copies of the minibatch (parameter vectors or noise draws) ---------------------
def _tile_system(system: System, k: int) -> System:
    """A copy whose per-batch tensor parameters are repeated ``k`` times, to match ``x0.repeat(k, 1)``."""
    def tiled(record: object) -> object:
        changes = {f.name: getattr(record, f.name).repeat(k) for f in dataclasses.fields(record)
                   if isinstance(getattr(record, f.name), Tensor) and getattr(record, f.name).dim() == 1}
        return dataclasses.replace(record, **changes) if changes else record

    if k == 1:
        return system
    params, task = tiled(system.params), tiled(system.task)
    return system if params is system.params and task is system.task else system.replace(params=params, task=task)


def _noisy_rollout(system: System, act: Callable[[Tensor], Tensor], x0: Tensor, horizon: int,
                   noise: Tensor | None = None) -> Trajectory:
    """:func:`apg.rollout.rollout` of ``act`` from ``x0`` ``(K, n)``; with ``noise`` ``(T, K, action_dim)``
    (already scaled) added to every action and the sum clipped to the limits."""
    return rollout(system, act, x0, horizon, departure=None if noise is None else ActionNoise(noise, system))
