"""Proximal policy optimisation: the model-free baseline a practitioner would otherwise pick.

PPO with the clipped surrogate objective (Schulman, Wolski, Dhariwal, Radford, Klimov 2017) and generalised
advantage estimation (Schulman et al., ICLR 2016). It never differentiates the simulator.
The actor is the project's own :class:`~apg.policies.Policy` (the same class, size and initial weights as the
other methods) used as the mean of a Gaussian with a learned, state-independent standard deviation; the critic
is a separate MLP that also sees the fraction of the horizon left, because every task here has a fixed horizon
and a terminal cost. Rewards are negative costs; the terminal cost is paid on the last step.

Noisy actions are clipped to the limits before the simulator sees them (the clip counts as part of the system,
so the log-probability is of the unclipped draw: common practice). Simulator steps are counted as for every
other method: ``batch_size x horizon`` per iteration. Held-out evaluation uses the deterministic mean policy,
on the same held-out set, in the same training loop, so races compare like with like.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import torch
from torch import Tensor, nn

from apg.optim import OptimSettings, make_optimiser
from apg.policies import ACTIVATIONS, Policy, mlp
from apg.rollout import SampledActionNoise, rollout
from apg.updates.base import NonFiniteError, StepResult, Update
from envs.base import System, check_record

if TYPE_CHECKING:
    from apg.distributed import Shard
    from apg.runs import TrainSettings


@dataclass(frozen=True)
class PPOSettings:
    """PPO's own settings; the optimiser (Adam, its rate and schedule) comes from the usual ``optim`` record."""

    epochs: int = 10  # passes over each batch of rollouts
    minibatches: int = 8  # minibatches per pass (of batch_size x horizon transitions)
    clip_ratio: float = 0.2  # clip range of the probability ratio (Schulman et al. 2017)
    gamma: float = 0.99  # discount of the advantage and the value targets (the race still scores undiscounted cost)
    gae_lambda: float = 0.95  # GAE lambda (Schulman et al. 2016)
    value_loss_weight: float = 0.5  # weight of the critic's squared error in the joint loss
    entropy_weight: float = 0.0  # weight of the entropy bonus (0: none)
    initial_action_std: float = 0.3  # initial action standard deviation, as a fraction of each action's half-range
    critic_hidden: tuple[int, ...] = (64, 64)
    critic_activation: str = "tanh"

    def __post_init__(self) -> None:
        check_record(self, positive=("epochs", "minibatches", "clip_ratio", "initial_action_std"),
                     nonnegative=("value_loss_weight", "entropy_weight"))
        for key in ("gamma", "gae_lambda"):
            if not 0.0 <= getattr(self, key) <= 1.0:
                raise ValueError(f"{key} must be in [0, 1], got {getattr(self, key)}")
        if self.critic_activation not in ACTIVATIONS:
            raise ValueError(f"critic_activation must be one of {', '.join(ACTIVATIONS)}; got {self.critic_activation!r}")


class _Critic(nn.Module):
    """``V(obs, fraction of horizon left)`` in units of ``scale`` (fixed from the first batch's returns)."""

    def __init__(self, obs_dim: int, settings: PPOSettings) -> None:
        super().__init__()
        self.net = mlp([obs_dim + 1, *settings.critic_hidden, 1], settings.critic_activation)

    def forward(self, obs: Tensor, left: Tensor) -> Tensor:
        return self.net(torch.cat([obs, left.unsqueeze(-1)], dim=-1)).squeeze(-1)


def _gaussian_logp(u: Tensor, mu: Tensor, log_std: Tensor) -> Tensor:
    """Log density of a diagonal Gaussian, summed over the last axis."""
    z = (u - mu) * torch.exp(-log_std)
    return (-0.5 * z ** 2 - log_std - 0.5 * math.log(2 * math.pi)).sum(-1)


def advantages(rewards: Tensor, values: Tensor, gamma: float, lam: float) -> tuple[Tensor, Tensor]:
    """GAE for fixed-horizon episodes: ``rewards`` and ``values`` are ``(T, B)``; the value after the last step
    is zero (the episode ends there, its terminal cost already in the last reward). Returns the advantages
    and the value targets ``advantage + value`` (Schulman et al. 2016, eqs. 11-16)."""
    adv = torch.zeros_like(rewards)
    running = torch.zeros_like(rewards[0])
    for t in reversed(range(rewards.shape[0])):
        next_value = values[t + 1] if t + 1 < rewards.shape[0] else torch.zeros_like(values[t])
        delta = rewards[t] + gamma * next_value - values[t]
        running = delta + gamma * lam * running
        adv[t] = running
    return adv, adv + values


class PPOUpdate(Update):
    """One PPO iteration: ``batch_size`` rollouts of the stochastic policy, then ``epochs`` passes of
    clipped-surrogate steps over shuffled minibatches of their transitions (shuffled with the run's stream)."""

    name = "ppo"
    differentiable = False

    def __init__(self, settings: PPOSettings | None = None) -> None:
        self.settings = settings or PPOSettings()
        self.scale: float | None = None  # value targets in units of the first batch's return spread

    @property
    def title(self) -> str:
        return "PPO + GAE (model-free)"

    def check(self, settings: "TrainSettings", shard: "Shard") -> None:
        if settings.horizon_start or settings.continuation_param:
            raise ValueError("PPO does not use train.horizon_start or train.continuation_param (the long-horizon "
                             "switches of the gradient methods); remove them for a PPO run")
        if shard.parallel:
            raise ValueError("PPO does not support data-parallel training; run it in one process")

    def prepare(self, system: System, policy: Policy, optim: OptimSettings, settings: "TrainSettings", seed: int,
                shard: "Shard") -> None:
        dtype = next(policy.parameters()).dtype
        self.critic = _Critic(system.obs_dim, self.settings).to(dtype)
        lo = torch.tensor(system.action_low, dtype=dtype)
        hi = torch.tensor(system.action_high, dtype=dtype)
        self.log_std = nn.Parameter(torch.log(self.settings.initial_action_std * (hi - lo) / 2))
        self.params = [*policy.parameters(), self.log_std, *self.critic.parameters()]
        self._optimiser = make_optimiser(optim, self.params)
        self.generator = torch.Generator().manual_seed(seed + 2)
        self.grad_clip, self.optim = settings.grad_clip, optim

    @property
    def optimiser(self) -> torch.optim.Optimizer:
        return self._optimiser

    def steps_per_iteration(self, batch: int, horizon: int) -> int:
        return batch * horizon

    def step(self, system: System, policy: Policy, x0: Tensor, horizon: int,
             generator: torch.Generator) -> StepResult:
        p, dtype, b = self.settings, x0.dtype, x0.shape[0]
        left = (1.0 - torch.arange(horizon, dtype=dtype) / horizon).unsqueeze(1).expand(horizon, b)  # (T, B)
        # ---- collect: the stochastic policy in the closed loop ------------------------------------------
        with torch.no_grad():
            noise = SampledActionNoise(torch.exp(self.log_std), self.generator, system)
            traj = rollout(system, policy, x0, horizon, departure=noise)
            obs_t = system.observe(traj.states[:-1])  # (T, B, obs)
            act_t = torch.stack(noise.draws)  # the unclipped Gaussian draws
            logp_t = _gaussian_logp(act_t, traj.commanded, self.log_std)
            cost = traj.costs.clone()
            cost[-1] = cost[-1] + traj.terminal
            rew_t = -cost
            if not torch.isfinite(rew_t).all():
                raise NonFiniteError(f"non-finite cost in the PPO rollouts; check system.dt ({system.dt} s) and "
                                     f"the action limits")
            if self.scale is None:
                first_returns = rew_t.flip(0).cumsum(0).flip(0)
                self.scale = float(first_returns.std().clamp_min(1e-6))
            values = self.critic(obs_t, left) * self.scale
            adv, targets = advantages(rew_t, values, p.gamma, p.gae_lambda)
        # ---- update: epochs of clipped-surrogate steps on shuffled minibatches ----------------------------
        n = horizon * b
        flat = [v.reshape(n, *v.shape[2:]) for v in (obs_t, act_t, logp_t, adv, targets, left)]
        size = max(1, n // p.minibatches)
        grad_norm = torch.zeros(())
        for _ in range(p.epochs):
            order = torch.randperm(n, generator=generator)
            for start in range(0, n - size + 1, size):
                idx = order[start:start + size]
                o, a, old_logp, ad, tg, lf = (v[idx] for v in flat)
                ad = (ad - ad.mean()) / (ad.std() + 1e-8)  # per-minibatch normalisation: common practice
                new_logp = _gaussian_logp(a, policy(o), self.log_std)
                ratio = torch.exp(new_logp - old_logp)
                surrogate = torch.min(ratio * ad, torch.clamp(ratio, 1 - p.clip_ratio, 1 + p.clip_ratio) * ad).mean()
                value_loss = ((self.critic(o, lf) - tg / self.scale) ** 2).mean()
                entropy = (self.log_std + 0.5 * math.log(2 * math.pi * math.e)).sum()
                loss = -surrogate + p.value_loss_weight * value_loss - p.entropy_weight * entropy
                self._optimiser.zero_grad(set_to_none=True)
                loss.backward()
                grad_norm = torch.nn.utils.clip_grad_norm_(self.params, self.grad_clip or float("inf"))
                if not torch.isfinite(grad_norm):
                    raise NonFiniteError(f"non-finite PPO gradient; lower optim.lr (now {self.optim.lr})")
                self._optimiser.step()
        return StepResult(float(-rew_t.sum(0).mean()), float(grad_norm), b * horizon, None,
                          {"action_std": float(torch.exp(self.log_std.detach()).mean())})

    def state_dict(self) -> dict[str, Any]:
        return {"optimiser": self._optimiser.state_dict(), "generator": self.generator.get_state(),
                "critic": self.critic.state_dict(), "log_std": self.log_std.detach().clone(),
                "value_scale": self.scale}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        self.critic.load_state_dict(state["critic"])
        with torch.no_grad():
            self.log_std.copy_(state["log_std"])
        self._optimiser.load_state_dict(state["optimiser"])
        self.generator.set_state(state["generator"])
        self.scale = state["value_scale"]
