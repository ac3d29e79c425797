"""The closed loop ``x_{t+1} = step(x_t, pi(observe(x_t)))``: the one rollout every part of apg runs.

Training (every estimator), PPO's data collection, held-out evaluation, the robustness sweeps and the gradient
diagnostics all call :func:`rollout`. Its options:

* ``window=k`` detaches the state every ``k`` steps (truncated BPTT, Williams & Peng 1990, "An efficient
  gradient-based algorithm for on-line training of recurrent network trajectories"): the gradient of a cost
  reaches only the actions of its own window. This changes the gradient.
* ``recompute_every=k`` keeps, for the backward pass, only the state at every k-th step and recomputes each
  stretch of k steps when it is needed (activation checkpointing, Chen, Xu, Zhang, Guestrin 2016, "Training
  deep nets with sublinear memory cost"; ``torch.utils.checkpoint``), and ``compile=True`` runs the step
  through ``torch.compile``. Neither changes what is computed (beyond float rounding).
* ``departure``: how the plant departs from the ideal loop at each step (:class:`Departure`): what the
  policy sees, what the actuator applies, what happens to the state after the step. Action noise for the
  sampled estimators and PPO, and the sensor noise, delay, actuator gain and pushes of apg-eval are all
  departures.

Per step, in this order: ``seen = sense(x)``, ``mu = pi(observe(seen))``, ``u = saturate(actuate(mu))`` (the
actuators hold every action within its limits, whatever the policy commands), cost ``c(x, u)``,
``x' = perturb(step(x, u))``. The terminal cost is taken at the last state.
"""

from __future__ import annotations

import functools
from dataclasses import asdict, dataclass, field
from typing import Any, Callable

import torch
from torch import Tensor, nn
from torch.utils.checkpoint import checkpoint

from envs.base import System

Act = Callable[[Tensor], Tensor]


@dataclass(frozen=True)
class Trajectory:
    """A batch of closed-loop trajectories.

    ``states`` is ``(T+1, B, state_dim)``; ``actions`` ``(T, B, action_dim)`` are the actions the plant
    received and ``commanded`` those the policy computed (the same tensor without a departure); ``costs`` the
    running costs ``(T, B)`` and ``terminal`` the terminal cost ``(B,)``. ``window_ends`` holds, for truncated
    rollouts, the state at the end of every window but the last, still attached to its own window's graph.
    ``visited`` holds, when asked for, the very state and action tensors of the loop (for gradients with
    respect to intermediate states).
    """

    states: Tensor
    actions: Tensor
    costs: Tensor
    terminal: Tensor
    commanded: Tensor | None = None
    window_ends: tuple[Tensor, ...] = ()
    visited: tuple[tuple[Tensor, ...], tuple[Tensor, ...]] = ((), ())

    def __post_init__(self) -> None:
        if self.commanded is None:
            object.__setattr__(self, "commanded", self.actions)

    @property
    def total_cost(self) -> Tensor:
        """Summed running cost plus terminal cost per trajectory, ``(B,)``."""
        return self.costs.sum(0) + self.terminal

    @property
    def horizon(self) -> int:
        return self.actions.shape[0]

    def detach(self) -> "Trajectory":
        return Trajectory(self.states.detach(), self.actions.detach(), self.costs.detach(), self.terminal.detach(),
                          None if self.commanded is self.actions else self.commanded.detach())


@dataclass(frozen=True)
class RolloutOptions:
    """How :func:`rollout` runs without changing what it computes (its speed options, for estimators to carry)."""

    recompute_every: int = 0  # steps per recomputation stretch; 0 keeps every activation
    compile: bool = False  # run the closed-loop step through torch.compile

    def __post_init__(self) -> None:
        if not isinstance(self.recompute_every, int) or self.recompute_every < 0:
            raise ValueError(f"recompute_every must be a whole number of steps >= 0, got {self.recompute_every!r}")

    def as_kwargs(self) -> dict[str, Any]:
        return asdict(self)


class Departure:
    """How the plant departs from the ideal closed loop at step ``k`` (each method defaults to no departure).

    Set ``random = True`` when a method draws random numbers: such a departure cannot be recomputed in the
    backward pass, so it is refused with ``recompute_every``.
    """

    random: bool = False

    def sense(self, x: Tensor, k: int) -> Tensor:
        """The state the policy observes."""
        return x

    def actuate(self, u: Tensor, k: int) -> Tensor:
        """The action the plant receives, from the one the policy commanded."""
        return u

    def perturb(self, x: Tensor, k: int) -> Tensor:
        """The state after the step (an impulsive push, say)."""
        return x


class ActionNoise(Departure):
    """Given noise ``(T, B, action_dim)`` (in action units) added to every action, the sum clipped to the limits."""

    def __init__(self, noise: Tensor, system: System) -> None:
        self.noise = noise
        self.low = torch.tensor(system.action_low, dtype=noise.dtype)
        self.high = torch.tensor(system.action_high, dtype=noise.dtype)

    def actuate(self, u: Tensor, k: int) -> Tensor:
        return torch.clamp(u + self.noise[k], self.low, self.high)


class SampledActionNoise(Departure):
    """Gaussian action noise of standard deviation ``std`` ``(action_dim,)`` drawn step by step from
    ``generator``, the sum clipped to the limits; the unclipped draws are kept in ``draws`` (PPO's actions)."""

    random = True

    def __init__(self, std: Tensor, generator: torch.Generator, system: System) -> None:
        self.std, self.generator = std, generator
        self.low = torch.tensor(system.action_low, dtype=std.dtype)
        self.high = torch.tensor(system.action_high, dtype=std.dtype)
        self.draws: list[Tensor] = []

    def actuate(self, u: Tensor, k: int) -> Tensor:
        drawn = u + self.std * torch.randn(u.shape, generator=self.generator, dtype=u.dtype)
        self.draws.append(drawn)
        return torch.clamp(drawn, self.low, self.high)


def _step(system: System, policy: Act, x: Tensor, limits: tuple[Tensor, Tensor]) -> tuple[Tensor, Tensor, Tensor]:
    """One undisturbed step: ``(x_next, u, running_cost)`` from ``x`` ``(B, state_dim)``; ``u`` is the command
    as the actuators deliver it (within ``limits``, :meth:`System.actuator_range`)."""
    u = system.saturate(policy(system.observe(x)), limits)
    return system.step(x, u), u, system.running_cost(x, u)


@functools.cache
def _compiled_step() -> Callable[..., tuple[Tensor, Tensor, Tensor]]:
    # One compiled function per process: torch.compile caches graphs per input shape and guards, so every
    # rollout of the same system and policy reuses them.
    return torch.compile(_step)


def _stretch(step: Callable, system: System, policy: Act, x: Tensor, limits: tuple[Tensor, Tensor], start: int,
             steps: int, departure: Departure | None, keep: bool) -> tuple[Tensor, ...]:
    """``steps`` steps from ``x`` at step index ``start``: the states after each step ``(steps, B, n)``, applied
    and commanded actions, running costs, and (with ``keep``) the lists of state and action tensors."""
    states, actions, commanded, costs, seen_states = [], [], [], [], []
    for k in range(start, start + steps):
        seen_states.append(x)
        if departure is None:
            x, u, c = step(system, policy, x, limits)
            mu = u
        else:
            mu = policy(system.observe(departure.sense(x, k)))
            u = system.saturate(departure.actuate(mu, k), limits)
            x, c = departure.perturb(system.step(x, u), k), system.running_cost(x, u)
        states.append(x)
        actions.append(u)
        commanded.append(mu)
        costs.append(c)
    out = (torch.stack(states), torch.stack(actions), torch.stack(commanded) if departure is not None else None,
           torch.stack(costs))
    return (*out, seen_states, actions) if keep else out


def rollout(system: System, policy: Act, x0: Tensor, horizon: int, *, window: int = 0, recompute_every: int = 0,
            compile: bool = False, departure: Departure | None = None, keep_steps: bool = False) -> Trajectory:
    """Roll ``policy`` out on ``system`` from ``x0`` ``(B, state_dim)`` for ``horizon`` steps, differentiably.

    Args:
        policy: maps ``(B, obs_dim)`` observations to ``(B, action_dim)`` actions (a module or any callable).
        window: if > 0, detach the state every ``window`` steps (truncated BPTT, module docstring).
        recompute_every: if > 0 and autograd is recording, keep only the states at the boundaries of stretches
            of this many steps and recompute each stretch during backward: activation memory falls from
            O(horizon) to O(horizon / k + k) per trajectory for about one extra forward pass; same gradient.
        compile: run the undisturbed closed-loop step through ``torch.compile`` (the first call compiles).
        departure: the plant's departures from the ideal loop (:class:`Departure`).
        keep_steps: keep the loop's own state and action tensors in ``Trajectory.visited`` (no recomputation).

    Raises:
        ValueError: ``horizon < 1``, a negative option, or a random departure with recomputation.
    """
    if horizon < 1:
        raise ValueError(f"horizon must be >= 1 step, got {horizon}")
    if not isinstance(window, int) or window < 0:
        raise ValueError(f"window must be a whole number of steps >= 0, got {window!r}")
    RolloutOptions(recompute_every, compile)  # validates
    recompute = bool(recompute_every) and torch.is_grad_enabled() and not keep_steps
    if recompute and departure is not None and departure.random:
        raise ValueError("recompute_every cannot be used with a departure that draws random numbers: the "
                         "recomputed steps would draw different ones; precompute the noise (ActionNoise)")
    step = _compiled_step() if compile and departure is None else _step
    limits = system.actuator_range(x0.shape[0], x0.dtype, x0.device)  # once per rollout, not per step
    parts, ends, x, done = [], [], x0, 0
    while done < horizon:
        # The next stretch ends at the next window boundary, recomputation boundary or the horizon.
        k = horizon - done
        if window:
            k = min(k, window - done % window)
        if recompute:
            k = min(k, recompute_every - done % recompute_every)
        if window and done and done % window == 0:
            ends.append(x)
            x = x.detach()
        if recompute and k < horizon:
            part = checkpoint(_stretch, step, system, policy, x, limits, done, k, departure, False, use_reentrant=False)
        else:
            part = _stretch(step, system, policy, x, limits, done, k, departure, keep_steps)
        parts.append(part)
        x, done = part[0][-1], done + k
    states = torch.cat([x0[None], *(p[0] for p in parts)])  # (T+1, B, state_dim)
    actions = torch.cat([p[1] for p in parts])
    commanded = torch.cat([p[2] for p in parts]) if departure is not None else None
    costs = torch.cat([p[3] for p in parts])
    visited = ((tuple(s for p in parts for s in p[4]) + (x,), tuple(a for p in parts for a in p[5]))
               if keep_steps else ((), ()))
    return Trajectory(states, actions, costs, system.terminal_cost(x), commanded, tuple(ends), visited)


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
    """The held-out evaluation: the policy in eval mode, no autograd, no departure."""
    was_training = policy.training
    policy.eval()
    try:
        traj = rollout(system, policy, x0, horizon)
    finally:
        policy.train(was_training)
    costs = traj.total_cost
    success = system.success(traj.states, traj.actions)
    return Evaluation(float(costs.mean()), float(success.float().mean()), costs, success, traj)
