"""Proximal policy optimisation: the model-free baseline a practitioner would otherwise pick.

PPO with the clipped surrogate objective (Schulman, Wolski, Dhariwal, Radford, Klimov 2017) and generalised
advantage estimation (Schulman et al., ICLR 2016). It never differentiates the simulator.
The actor is the project's own :class:`~apg.policies.Policy` (the same class, size and initial weights as the
other entrants) used as the mean of a Gaussian with a learned, state-independent standard deviation; the
critic is a separate MLP that also sees the fraction of the horizon left, because every task here has a fixed
horizon and a terminal cost. Rewards are negative costs; the terminal cost is paid on the last step.

Noisy actions are clipped to the limits before the simulator sees them (the clip counts as part of the system,
so the log-probability is of the unclipped draw: common practice). Simulator steps are counted as in the
trainer: ``batch_size x horizon`` per iteration. Held-out evaluation uses the deterministic mean policy, on the
same held-out set, through the same :class:`~apg.trainer.Monitor` callbacks, so races compare like with like.
PPO runs are not resumable: an existing checkpoint in the run directory is refused.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Sequence

import torch
import yaml
from torch import Tensor, nn

from apg.checkpoint import CHECKPOINT_NAME, atomic_write_text, config_digest, save_checkpoint
from apg.optim import OptimSettings, learning_rate, make_optimiser
from apg.policies import ACTIVATIONS, Policy, PolicySettings, make_policy, mlp
from apg.rollout import evaluate
from apg.trainer import (CONFIG_NAME, DTYPES, METRICS_NAME, Monitor, NonFiniteError, RunExistsError, RunInfo,
                         TrainResult, TrainSettings)
from envs.base import System, check_record


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


def train_ppo(system: System, policy_settings: PolicySettings, optim_settings: OptimSettings,
              ppo_settings: PPOSettings, settings: TrainSettings, *, seed: int, run_dir: Path,
              config: dict[str, Any] | None = None, monitors: Sequence[Monitor] = ()) -> TrainResult:
    """Train ``system``'s policy with PPO; writes ``metrics.json`` and a final checkpoint into ``run_dir``.

    Uses from ``settings``: ``iterations``, ``batch_size`` (rollouts per iteration), ``horizon``, ``grad_clip``,
    the evaluation settings, ``dtype``, and the ``max_env_steps`` / ``max_wall_seconds`` budgets. The initial
    policy is the one :func:`apg.trainer.train` builds from the same ``seed`` and ``policy_settings``.

    Raises:
        RunExistsError: ``run_dir`` already holds a checkpoint.
        NonFiniteError: NaN/Inf in the rollouts or the update.
    """
    if settings.horizon_start or settings.continuation_param:
        raise ValueError("PPO does not use train.horizon_start or train.continuation_param (the long-horizon "
                         "switches of the gradient trainer); remove them from the PPO entrant's train block")
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    ckpt_path = run_dir / CHECKPOINT_NAME
    if ckpt_path.exists():
        raise RunExistsError(f"{run_dir} already holds a run (checkpoint.pt); PPO runs do not resume. Choose "
                             f"another directory. Nothing was changed.")
    config = dict(config or {})
    atomic_write_text(run_dir / CONFIG_NAME, yaml.safe_dump(config, sort_keys=False))
    dtype = DTYPES[settings.dtype]
    torch.manual_seed(seed)
    policy = make_policy(policy_settings, system, torch.Generator().manual_seed(seed + 1), dtype=dtype)
    critic = _Critic(system.obs_dim, ppo_settings).to(dtype)
    lo = torch.tensor(system.action_low, dtype=dtype)
    hi = torch.tensor(system.action_high, dtype=dtype)
    log_std = nn.Parameter(torch.log(ppo_settings.initial_action_std * (hi - lo) / 2))
    params = [*policy.parameters(), log_std, *critic.parameters()]
    optimiser = make_optimiser(optim_settings, params)
    train_gen = torch.Generator().manual_seed(seed)
    noise_gen = torch.Generator().manual_seed(seed + 2)
    x_eval = system.sample_initial(settings.eval_batch, torch.Generator().manual_seed(settings.eval_seed), dtype)
    b, horizon = settings.batch_size, settings.horizon
    left = (1.0 - torch.arange(horizon, dtype=dtype) / horizon).unsqueeze(1).expand(horizon, b)  # (T, B)

    for m in monitors:
        m.start(RunInfo(system, policy, settings, run_dir, 0, config))
    t_start = time.perf_counter()
    env_steps, it, scale, last_eval = 0, 0, None, None

    def elapsed() -> float:
        return time.perf_counter() - t_start

    def run_eval(iteration: int) -> None:
        nonlocal last_eval
        result = evaluate(system, policy, x_eval, settings.eval_steps)
        last_eval = {"iteration": iteration, "eval_cost": result.mean_cost, "success_rate": result.success_rate}
        for m in monitors:
            m.evaluation(iteration, result)

    def budget_spent() -> bool:
        return bool((settings.max_env_steps and env_steps >= settings.max_env_steps)
                    or (settings.max_wall_seconds and elapsed() >= settings.max_wall_seconds))

    try:
        run_eval(0)
        while it < settings.iterations and not budget_spent():
            t0 = time.perf_counter()
            lr = learning_rate(optim_settings, it, settings.iterations)
            for group in optimiser.param_groups:
                group["lr"] = lr
            # ---- collect: batch_size rollouts of the stochastic policy ---------------------------------
            with torch.no_grad():
                x = system.sample_initial(b, train_gen, dtype)
                obs, acts, logps, rewards = [], [], [], []
                for t in range(horizon):
                    o = system.observe(x)
                    mu = policy(o)
                    u = mu + torch.exp(log_std) * torch.randn(mu.shape, generator=noise_gen, dtype=dtype)
                    cost = system.running_cost(x, torch.clamp(u, lo, hi))
                    x = system.step(x, torch.clamp(u, lo, hi))
                    if t == horizon - 1:
                        cost = cost + system.terminal_cost(x)
                    obs.append(o)
                    acts.append(u)
                    logps.append(_gaussian_logp(u, mu, log_std))
                    rewards.append(-cost)
                obs_t, act_t, logp_t, rew_t = (torch.stack(v) for v in (obs, acts, logps, rewards))  # (T, B, ...)
                if not torch.isfinite(rew_t).all():
                    raise NonFiniteError(f"non-finite cost in the PPO rollouts at iteration {it}; check system.dt "
                                         f"and the action limits")
                if scale is None:  # value targets in units of the first batch's return spread
                    first_returns = rew_t.flip(0).cumsum(0).flip(0)
                    scale = float(first_returns.std().clamp_min(1e-6))
                values = critic(obs_t, left) * scale
                adv, targets = advantages(rew_t, values, ppo_settings.gamma, ppo_settings.gae_lambda)
            env_steps += b * horizon
            batch_cost = float(-rew_t.sum(0).mean())
            # ---- update: epochs of clipped-surrogate steps on shuffled minibatches ----------------------
            n = horizon * b
            flat = [v.reshape(n, *v.shape[2:]) for v in (obs_t, act_t, logp_t, adv, targets, left)]
            size = max(1, n // ppo_settings.minibatches)
            grad_norm = torch.zeros(())
            for _ in range(ppo_settings.epochs):
                order = torch.randperm(n, generator=train_gen)
                for start in range(0, n - size + 1, size):
                    idx = order[start:start + size]
                    o, a, old_logp, ad, tg, lf = (v[idx] for v in flat)
                    ad = (ad - ad.mean()) / (ad.std() + 1e-8)  # per-minibatch normalisation: common practice
                    new_logp = _gaussian_logp(a, policy(o), log_std)
                    ratio = torch.exp(new_logp - old_logp)
                    surrogate = torch.min(ratio * ad, torch.clamp(ratio, 1 - ppo_settings.clip_ratio,
                                                                   1 + ppo_settings.clip_ratio) * ad).mean()
                    value_loss = ((critic(o, lf) - tg / scale) ** 2).mean()
                    entropy = (log_std + 0.5 * math.log(2 * math.pi * math.e)).sum()
                    loss = -surrogate + ppo_settings.value_loss_weight * value_loss - ppo_settings.entropy_weight * entropy
                    optimiser.zero_grad(set_to_none=True)
                    loss.backward()
                    grad_norm = torch.nn.utils.clip_grad_norm_(params, settings.grad_clip or float("inf"))
                    if not torch.isfinite(grad_norm):
                        raise NonFiniteError(f"non-finite PPO gradient at iteration {it}; lower optim.lr "
                                             f"(now {optim_settings.lr})")
                    optimiser.step()
            it += 1
            dt_iter = time.perf_counter() - t0
            stats = {"cost": batch_cost, "grad_norm": float(grad_norm), "learning_rate": lr,
                     "iteration_seconds": dt_iter, "sim_steps_per_second": b * horizon / max(dt_iter, 1e-9),
                     "env_steps": float(env_steps), "wall_time_s": elapsed(),
                     "action_std": float(torch.exp(log_std.detach()).mean())}
            for m in monitors:
                m.iteration(it, stats)
            if it % settings.eval_every == 0 or it == settings.iterations or budget_spent():
                run_eval(it)
    except BaseException:
        for m in monitors:
            m.close()
        raise

    if last_eval is None or last_eval["iteration"] != it:
        run_eval(it)
    assert last_eval is not None
    save_checkpoint(ckpt_path, {
        "iteration": it, "policy": policy.state_dict(), "policy_settings": asdict(policy_settings),
        "optimiser": optimiser.state_dict(), "generator": train_gen.get_state(), "system": system.name,
        "critic": critic.state_dict(), "log_std": log_std.detach(), "value_scale": scale, "env_steps": env_steps,
        "wall_time_s": elapsed(), "config": config, "config_digest": config_digest(config), "method": "ppo",
    })
    metrics = {
        "system": system.name, "eval_cost": last_eval["eval_cost"], "success_rate": last_eval["success_rate"],
        "env_steps": env_steps, "wall_time_s": round(elapsed(), 3), "iterations": it, "seed": seed,
        "success_criterion": system.success_criterion, "eval_batch": settings.eval_batch,
        "eval_seed": settings.eval_seed, "config_digest": config_digest(config), "method": "ppo",
    }
    atomic_write_text(run_dir / METRICS_NAME, json.dumps(metrics, indent=2) + "\n")
    for m in monitors:
        m.end(metrics)
        m.close()
    return TrainResult(policy, metrics, run_dir)


__all__ = ["PPOSettings", "train_ppo", "advantages"]
