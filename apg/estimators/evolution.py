"""Evolution strategies: Gaussian smoothing in parameter space with antithetic pairs (Salimans et al. 2017).

The population of perturbed parameter vectors is rolled out at once: the minibatch is tiled once per vector
and :func:`_population` acts with every vector on its own block of rows.
"""

from __future__ import annotations

import math
from typing import Callable

import torch
from torch import Tensor, nn
from torch.func import functional_call, vmap

from apg.estimators.base import Estimate, EstimatorSettings, GradientEstimator, _bptt, _noisy_rollout, _tile_system
from envs.base import System


def _population(policy: nn.Module, flat: Tensor, batch: int) -> Callable[[Tensor], Tensor]:
    """Act with ``K`` parameter vectors at once: ``flat`` is ``(K, P)``, observations ``(K * batch, obs_dim)``
    in blocks of ``batch`` rows per parameter vector; buffers (the normaliser) are shared."""
    names = [n for n, _ in policy.named_parameters()]
    shapes = [p.shape for _, p in policy.named_parameters()]
    chunks = flat.split([math.prod(s) for s in shapes], dim=1)
    params = {n: c.reshape(flat.shape[0], *s) for n, c, s in zip(names, chunks, shapes)}  # (K, *shape)
    call = vmap(lambda p, o: functional_call(policy, p, (o,)))

    def act(obs: Tensor) -> Tensor:
        u = call(params, obs.reshape(flat.shape[0], batch, -1))  # (K, batch, action_dim)
        return u.reshape(flat.shape[0] * batch, -1)

    return act


def _flat_parameters(policy: nn.Module) -> Tensor:
    return torch.cat([p.reshape(-1) for p in policy.parameters()])


def _unflatten_like(flat: Tensor, policy: nn.Module) -> tuple[Tensor, ...]:
    return tuple(c.reshape(p.shape) for c, p in zip(flat.split([p.numel() for p in policy.parameters()]),
                                                     policy.parameters()))


def centred_ranks(values: Tensor) -> Tensor:
    """Ranks of ``values`` mapped linearly onto [-0.5, 0.5] (smallest -0.5), as in Salimans et al. (2017)."""
    ranks = torch.empty_like(values)
    ranks[values.argsort()] = torch.arange(values.numel(), dtype=values.dtype)
    return ranks / max(values.numel() - 1, 1) - 0.5


class EvolutionStrategies(GradientEstimator):
    """Zeroth-order Gaussian smoothing in parameter space with antithetic pairs.

    ``g = sum_i (J(theta + sigma eps_i) - J(theta - sigma eps_i)) eps_i / (2 n sigma)`` over ``n = pairs``
    directions, each evaluated on the whole minibatch (common random numbers across the pair); unbiased for the
    gradient of ``J_sigma`` (module docstring). Costs ``2 * pairs * B * horizon`` simulator steps.
    """

    name = "es"
    title = "evolution strategies"
    objective = "parameter-smoothed objective E[J(theta + sigma eps)]"
    uses = ("pairs", "sigma", "rank_shaping")
    sample_field = "pairs"

    def __init__(self, settings: EstimatorSettings | None = None) -> None:
        self.settings = settings or EstimatorSettings(name="es")
        if self.settings.rank_shaping:
            self.objective = "none (rank-shaped update, not an unbiased gradient)"

    def steps_per_estimate(self, batch: int, horizon: int) -> int:
        return 2 * self.settings.pairs * batch * horizon

    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        s, (b, _) = self.settings, x0.shape
        with torch.no_grad():
            theta = _flat_parameters(policy)
            eps = torch.randn(s.pairs, theta.numel(), generator=generator, dtype=theta.dtype)  # (n, P)
            thetas = torch.cat([theta + s.sigma * eps, theta - s.sigma * eps])  # (2n, P): all +, then all -
            k = thetas.shape[0]
            traj = _noisy_rollout(_tile_system(system, k), _population(policy, thetas, b), x0.repeat(k, 1),
                                     horizon)
            cost = traj.total_cost.reshape(k, b).mean(1)  # (2n,) minibatch objective per parameter vector
            fitness = centred_ranks(cost) if s.rank_shaping else cost
            g = ((fitness[: s.pairs] - fitness[s.pairs:]) @ eps) / (2 * s.pairs * s.sigma)  # (P,)
        return Estimate(cost.mean(), _unflatten_like(g, policy), k * b * horizon, traj)

    def reference_gradient(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                           generator: torch.Generator, samples: int) -> tuple[Tensor, ...] | None:
        """``grad J_sigma = E[grad J(theta + sigma eps)]``: the mean of ``2 * samples`` exact BPTT gradients at
        antithetic perturbed parameters (first order, so far less noisy than the estimator itself)."""
        if self.settings.rank_shaping:
            return None
        theta = _flat_parameters(policy)
        b = x0.shape[0]
        eps = torch.randn(samples, theta.numel(), generator=generator, dtype=theta.dtype)
        thetas = torch.cat([theta + self.settings.sigma * eps, theta - self.settings.sigma * eps])
        k = thetas.shape[0]
        traj = _noisy_rollout(_tile_system(system, k), _population(policy, thetas, b), x0.repeat(k, 1), horizon)
        return _bptt(traj.total_cost.mean(), policy)
