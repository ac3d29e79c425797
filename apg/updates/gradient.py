"""The update of every gradient method: ask an estimator for ``dJ/dtheta``, clip it, step the optimiser."""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING, Any

import torch
from torch import Tensor

from apg import distributed
from apg.estimators import GradientEstimator
from apg.optim import OptimSettings, make_optimiser
from apg.policies import Policy
from apg.rollout import RolloutOptions
from apg.updates.base import NonFiniteError, StepResult, Update
from envs.base import System

if TYPE_CHECKING:
    from apg.distributed import Shard
    from apg.runs import TrainSettings


def _first_nonfinite_step(states: Tensor) -> int | None:
    bad = ~torch.isfinite(states).reshape(states.shape[0], -1).all(dim=1)  # (T+1,)
    idx = torch.nonzero(bad)
    return int(idx[0]) if len(idx) else None


class GradientUpdate(Update):
    """A :class:`~apg.estimators.GradientEstimator` (BPTT, truncated BPTT, terminal value, ES, likelihood ratio,
    alpha-order) driving the optimiser. After each step a ``running`` normaliser absorbs the rollouts' states."""

    name = "gradient"

    def __init__(self, estimator: GradientEstimator) -> None:
        self.estimator = estimator
        self.settings = getattr(estimator, "settings", None)

    @property
    def title(self) -> str:
        return self.estimator.title or self.estimator.name

    def check(self, settings: "TrainSettings", shard: "Shard") -> None:
        if shard.parallel and self.estimator.stateful:
            raise ValueError(f"estimator {self.estimator.name} learns across iterations (its critic would differ "
                             f"between processes); it does not support data-parallel training. Run it in one process")

    def prepare(self, system: System, policy: Policy, optim: OptimSettings, settings: "TrainSettings", seed: int,
                shard: "Shard") -> None:
        options = RolloutOptions(settings.recompute_every, settings.compile_step)
        if options != RolloutOptions():
            self.estimator = self.estimator.with_rollout_options(options)
        self._optimiser = make_optimiser(optim, policy.parameters())
        self.generator = torch.Generator().manual_seed(seed + 2)
        self.params = list(policy.parameters())
        self.grad_clip, self.shard, self.train_settings, self.optim = settings.grad_clip, shard, settings, optim

    @property
    def optimiser(self) -> torch.optim.Optimizer:
        return self._optimiser

    def steps_per_iteration(self, batch: int, horizon: int) -> int:
        return self.estimator.steps_per_estimate(batch, horizon)

    def step(self, system: System, policy: Policy, x0: Tensor, horizon: int,
             generator: torch.Generator) -> StepResult:
        shard = self.shard
        est = self.estimator.estimate(system, policy, x0, horizon, self.generator)
        if shard.parallel:
            grads, loss, sim_steps = distributed.reduce_gradient(est.grads, est.loss, est.sim_steps, x0.shape[0],
                                                                 self.train_settings.batch_size, shard)
            est = dataclasses.replace(est, grads=grads, loss=loss, sim_steps=sim_steps)
        grad_norm = torch.linalg.vector_norm(torch.stack([torch.linalg.vector_norm(g) for g in est.grads]))
        if not (torch.isfinite(est.loss) and torch.isfinite(grad_norm)):
            where = ""
            if est.trajectory is not None:
                step = _first_nonfinite_step(est.trajectory.states)
                if step is not None:
                    where = f" The state first became non-finite at step {step} of {horizon}."
            raise NonFiniteError(
                f"non-finite {'cost' if not torch.isfinite(est.loss) else 'gradient'}.{where} Likely causes: a "
                f"learning rate too high for this system (optim.lr={self.optim.lr}), a time step too large for the "
                f"dynamics (system.dt={system.dt}, integrator={system.integrator}), or gradients exploding over a "
                f"long horizon ({horizon} steps this iteration; try train.grad_clip, a shorter horizon, truncated "
                f"windows estimator.window=<steps>, or a horizon schedule train.horizon_start=<steps>).")
        for p, g in zip(self.params, est.grads):
            p.grad = g
        if self.grad_clip > 0:
            torch.nn.utils.clip_grad_norm_(self.params, self.grad_clip)
        self._optimiser.step()
        if policy.settings.normalise == "running" and est.trajectory is not None:
            policy.normaliser.update(system.observe(distributed.gather_batch(est.trajectory.states, 1, shard)))
        return StepResult(float(est.loss), float(grad_norm), est.sim_steps, est.trajectory)

    def state_dict(self) -> dict[str, Any]:
        return {"optimiser": self._optimiser.state_dict(), "generator": self.generator.get_state(),
                "estimator": self.estimator.state_dict()}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        self._optimiser.load_state_dict(state["optimiser"])
        self.generator.set_state(state["generator"])
        self.estimator.load_state_dict(state.get("estimator") or {})
