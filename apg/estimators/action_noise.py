"""Estimators of the action-smoothed objective: likelihood ratio (REINFORCE) and alpha-order (Suh et al. 2022).

Both roll the minibatch out ``samples`` times with Gaussian noise on every action and share
:meth:`_ActionNoise._blend`, which mixes the pathwise and the score-function gradient of those rollouts.
"""

from __future__ import annotations

import torch
from torch import Tensor, nn

from apg.estimators.base import Estimate, EstimatorSettings, GradientEstimator, _bptt, _noisy_rollout, _tile_system
from envs.base import System


class _ActionNoise(GradientEstimator):
    """Shared machinery of the estimators of the action-smoothed objective (module docstring)."""

    objective = "action-smoothed objective E[J | Gaussian action noise]"
    uses = ("samples", "action_noise", "baseline")
    sample_field = "samples"
    alpha: float  # weight of the pathwise term

    def __init__(self, settings: EstimatorSettings | None = None) -> None:
        self.settings = settings or EstimatorSettings(name=self.name)

    def steps_per_estimate(self, batch: int, horizon: int) -> int:
        return self.settings.samples * batch * horizon

    def _scale(self, system: System, dtype: torch.dtype) -> Tensor:
        lo = torch.tensor(system.action_low, dtype=dtype)
        hi = torch.tensor(system.action_high, dtype=dtype)
        return self.settings.action_noise * (hi - lo) / 2  # (action_dim,) noise std in action units

    def _blend(self, system: System, policy: nn.Module, x0: Tensor, horizon: int, generator: torch.Generator,
               alpha: float, samples: int) -> Estimate:
        n, b = samples, x0.shape[0]
        k = n * b  # rollouts, index i * b + j: noise draw i of initial state j
        sigma = self._scale(system, x0.dtype)
        xi = torch.randn(horizon, k, system.action_dim, generator=generator, dtype=x0.dtype)  # standard normal
        with torch.set_grad_enabled(alpha > 0):
            traj = _noisy_rollout(_tile_system(system, n), policy, x0.repeat(n, 1), horizon, xi * sigma)
        loss = traj.total_cost.mean()
        total = alpha * loss if alpha > 0 else torch.zeros((), dtype=x0.dtype)
        if alpha < 1:
            # Score-function term: grad log N(u; mu, sigma^2) = (xi / sigma) dmu/dtheta, weighted by the
            # cost-to-go from the same step (earlier costs do not depend on this action) minus a baseline.
            to_go = traj.costs.detach().flip(0).cumsum(0).flip(0) + traj.terminal.detach()  # (T, K)
            if self.settings.baseline == "leave_one_out":
                per_state = to_go.reshape(horizon, n, b)
                others = (per_state.sum(1, keepdim=True) - per_state) / (n - 1)  # mean of the other draws
                to_go = (per_state - others).reshape(horizon, k)
            states = traj.states[:-1].detach()  # (T, K, n): the score needs d mu / d theta at fixed states
            mu_re = policy(system.observe(states).reshape(horizon * k, -1)).reshape(horizon, k, -1)
            surrogate = (to_go.unsqueeze(-1) * (xi / sigma) * mu_re).sum((0, 2)).mean()
            total = total + (1 - alpha) * surrogate
        grads = _bptt(total, policy)
        return Estimate(loss.detach(), grads, k * horizon, traj.detach())

    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        return self._blend(system, policy, x0, horizon, generator, self.alpha, self.settings.samples)

    def reference_gradient(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                           generator: torch.Generator, samples: int) -> tuple[Tensor, ...] | None:
        """The pathwise gradient averaged over ``samples`` noise draws per initial state: unbiased for the
        action-smoothed objective (reparameterisation; the clip is Lipschitz) and far less noisy than the score."""
        return self._blend(system, policy, x0, horizon, generator, 1.0, samples).grads


class LikelihoodRatio(_ActionNoise):
    """Score-function (REINFORCE) estimate with Gaussian action noise; no derivative of the simulator is used.

    Costs ``samples * B * horizon`` simulator steps; with ``baseline=leave_one_out`` each rollout's cost-to-go
    is compared with the mean of the other ``samples - 1`` rollouts from the same initial state.
    """

    name = "likelihood_ratio"
    title = "likelihood ratio"
    alpha = 0.0


class AlphaOrder(_ActionNoise):
    """``alpha * pathwise + (1 - alpha) * likelihood ratio`` on one set of noisy rollouts (Suh et al. 2022)."""

    name = "alpha_order"
    title = "alpha-order"
    uses = (*_ActionNoise.uses, "alpha")

    @property
    def alpha(self) -> float:  # type: ignore[override]
        return self.settings.alpha
