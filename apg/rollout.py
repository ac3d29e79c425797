"""Batched closed-loop rollouts: ``x_{t+1} = step(x_t, pi(observe(x_t)))`` for a fixed horizon.

Two options change how a differentiable rollout runs, never what it computes (beyond float rounding):
``checkpoint_every=k`` keeps only the state at every k-th step for the backward pass and recomputes each window
of k steps when it is needed (activation checkpointing, Chen, Xu, Zhang, Guestrin 2016, "Training deep nets
with sublinear memory cost"; ``torch.utils.checkpoint``), and ``compile=True`` runs the closed-loop step
through ``torch.compile``. :func:`truncated_rollout` is different: it detaches the state between windows, which
does change the gradient (truncated BPTT).
"""

from __future__ import annotations

import functools
from dataclasses import asdict, dataclass
from typing import Any, Callable

import torch
from torch import Tensor, nn
from torch.utils.checkpoint import checkpoint

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


@dataclass(frozen=True)
class RolloutOptions:
    """How :func:`rollout` runs (its keyword options as one record, for estimators to carry)."""

    checkpoint_every: int = 0  # steps per activation-checkpointing window; 0 keeps every activation
    compile: bool = False  # run the closed-loop step through torch.compile

    def __post_init__(self) -> None:
        if not isinstance(self.checkpoint_every, int) or self.checkpoint_every < 0:
            raise ValueError(f"checkpoint_every must be a whole number of steps >= 0, got {self.checkpoint_every!r}")

    def as_kwargs(self) -> dict[str, Any]:
        return asdict(self)


StepFn = Callable[[System, nn.Module, Tensor], "tuple[Tensor, Tensor, Tensor]"]


def _closed_loop_step(system: System, policy: nn.Module, x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    """One step: ``(x_next, u, running_cost)`` from ``x`` ``(B, state_dim)``."""
    u = policy(system.observe(x))
    return system.step(x, u), u, system.running_cost(x, u)


@functools.cache
def _compiled_step() -> StepFn:
    # One compiled function per process: torch.compile caches graphs per input shape and guards, so every
    # rollout of the same system and policy reuses them.
    return torch.compile(_closed_loop_step)


def _window(step: StepFn, system: System, policy: nn.Module, x: Tensor, steps: int) -> tuple[Tensor, Tensor, Tensor]:
    """``steps`` steps from ``x``: states after each step ``(steps, B, state_dim)``, actions, running costs."""
    states, actions, costs = [], [], []
    for _ in range(steps):
        x, u, c = step(system, policy, x)
        states.append(x)
        actions.append(u)
        costs.append(c)
    return torch.stack(states), torch.stack(actions), torch.stack(costs)


def rollout(system: System, policy: nn.Module, x0: Tensor, horizon: int, *, checkpoint_every: int = 0,
            compile: bool = False) -> Trajectory:
    """Roll ``policy`` out on ``system`` from ``x0`` ``(B, state_dim)`` for ``horizon`` steps, differentiably.

    Args:
        checkpoint_every: if > 0 and autograd is recording, keep for the backward pass only the states at the
            boundaries of windows of this many steps (plus the trajectory itself) and recompute each window's
            intermediate values during backward: activation memory falls from O(horizon) to
            O(horizon / k + k) per trajectory for about one extra forward pass. The gradient is unchanged.
        compile: run the closed-loop step through ``torch.compile`` (the first call compiles: seconds to minutes).

    Raises:
        ValueError: ``horizon < 1`` or ``checkpoint_every < 0``.
    """
    if horizon < 1:
        raise ValueError(f"horizon must be >= 1 step, got {horizon}")
    RolloutOptions(checkpoint_every, compile)  # validates
    step = _compiled_step() if compile else _closed_loop_step
    if checkpoint_every and checkpoint_every < horizon and torch.is_grad_enabled():
        parts, x, done = [], x0, 0
        while done < horizon:
            k = min(checkpoint_every, horizon - done)
            part = checkpoint(_window, step, system, policy, x, k, use_reentrant=False)
            parts.append(part)
            x, done = part[0][-1], done + k
        states = torch.cat([x0[None], *(p[0] for p in parts)])  # (T+1, B, state_dim)
        actions = torch.cat([p[1] for p in parts])
        costs = torch.cat([p[2] for p in parts])
    else:
        after, actions, costs = _window(step, system, policy, x0, horizon)
        states, x = torch.cat([x0[None], after]), after[-1]  # (T+1, B, state_dim)
    return Trajectory(states, actions, costs, system.terminal_cost(x))


def truncated_rollout(system: System, policy: nn.Module, x0: Tensor, horizon: int, window: int,
                      **options: Any) -> tuple[Trajectory, list[Tensor]]:
    """:func:`rollout` in windows of ``window`` steps with the state detached at every window boundary.

    Truncated backpropagation through time (Williams & Peng 1990, "An efficient gradient-based algorithm for
    on-line training of recurrent network trajectories"): the gradient of a cost reaches only the actions of its
    own window, so products of step Jacobians never span more than ``window`` steps. That bounds their growth on
    chaotic or stiff dynamics, at the price of a biased (myopic) gradient. Returns the whole trajectory (its costs
    carry the truncated graph) and the state at the end of each window except the last, still attached to its
    own window's graph, for a terminal value to be added there (:class:`apg.estimators.TerminalValue`).
    ``options`` go to :func:`rollout`.
    """
    if window < 1:
        raise ValueError(f"window must be >= 1 step, got {window}")
    parts, ends, x, done = [], [], x0, 0
    while done < horizon:
        k = min(window, horizon - done)
        part = rollout(system, policy, x.detach() if done else x, k, **options)
        parts.append(part)
        x, done = part.states[-1], done + k
        if done < horizon:
            ends.append(x)
    states = torch.cat([x0[None], *(p.states[1:] for p in parts)])
    traj = Trajectory(states, torch.cat([p.actions for p in parts]), torch.cat([p.costs for p in parts]),
                      parts[-1].terminal)
    return traj, ends


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
