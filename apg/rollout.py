"""Batched closed-loop rollouts: ``x_{t+1} = step(x_t, pi(observe(x_t)))`` for a fixed horizon."""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor, nn

from envs.base import System


@dataclass(frozen=True)
class Trajectory:
    """A batch of closed-loop trajectories.

    ``states`` is ``(T+1, B, state_dim)``, ``actions`` ``(T, B, action_dim)``, ``costs`` the running costs
    ``(T, B)`` and ``terminal`` the terminal cost ``(B,)``.
    """

    states: Tensor
    actions: Tensor
    costs: Tensor
    terminal: Tensor

    @property
    def total_cost(self) -> Tensor:
        """Summed running cost plus terminal cost per trajectory, ``(B,)``."""
        return self.costs.sum(0) + self.terminal

    @property
    def horizon(self) -> int:
        return self.actions.shape[0]

    def detach(self) -> "Trajectory":
        return Trajectory(self.states.detach(), self.actions.detach(), self.costs.detach(), self.terminal.detach())


def rollout(system: System, policy: nn.Module, x0: Tensor, horizon: int) -> Trajectory:
    """Roll ``policy`` out on ``system`` from ``x0`` ``(B, state_dim)`` for ``horizon`` steps, differentiably."""
    if horizon < 1:
        raise ValueError(f"horizon must be >= 1 step, got {horizon}")
    x = x0
    states, actions, costs = [x0], [], []
    for _ in range(horizon):
        u = policy(system.observe(x))
        costs.append(system.running_cost(x, u))
        x = system.step(x, u)
        states.append(x)
        actions.append(u)
    return Trajectory(torch.stack(states), torch.stack(actions), torch.stack(costs), system.terminal_cost(x))


@dataclass(frozen=True)
class Evaluation:
    """Held-out performance: mean total cost, success rate, and the per-trajectory values behind them."""

    mean_cost: float
    success_rate: float
    costs: Tensor  # (B,)
    success: Tensor  # (B,) bool
    trajectory: Trajectory


@torch.no_grad()
def evaluate(system: System, policy: nn.Module, x0: Tensor, horizon: int) -> Evaluation:
    """Closed-loop evaluation without autograd."""
    was_training = policy.training
    policy.eval()
    try:
        traj = rollout(system, policy, x0, horizon)
    finally:
        policy.train(was_training)
    costs = traj.total_cost
    success = system.success(traj.states, traj.actions)
    return Evaluation(float(costs.mean()), float(success.float().mean()), costs, success, traj)
