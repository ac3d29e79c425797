"""BPTT: the exact gradient of the minibatch objective, or with ``window > 0`` its truncated version."""

from __future__ import annotations

import torch
from torch import Tensor, nn

from apg.estimators.base import Estimate, EstimatorSettings, GradientEstimator, _bptt
from apg.rollout import rollout
from envs.base import System


class Analytic(GradientEstimator):
    """The exact gradient of the minibatch objective by backpropagation through time; with ``window`` > 0 the
    truncated gradient (state detached every ``window`` steps: :func:`apg.rollout.rollout`'s ``window``)."""

    name = "analytic"
    title = "BPTT (exact gradient)"
    uses = ("window",)

    def __init__(self, settings: EstimatorSettings | None = None) -> None:
        self.settings = settings or EstimatorSettings()
        if self.settings.window:
            self.title = f"BPTT truncated to {self.settings.window}-step windows"
            self.objective = "none (truncated gradient: biased)"

    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        window = self.settings.window if self.settings.window < horizon else 0
        traj = rollout(system, policy, x0, horizon, window=window, **self.rollout_options.as_kwargs())
        loss = traj.total_cost.mean()
        return Estimate(loss.detach(), _bptt(loss, policy), x0.shape[0] * horizon, traj.detach())

    def reference_gradient(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                           generator: torch.Generator, samples: int) -> tuple[Tensor, ...] | None:
        return None if self.settings.window and self.settings.window < horizon else super().reference_gradient(
            system, policy, x0, horizon, generator, samples)
