"""Short-horizon actor-critic: truncated-BPTT windows that end in a learned value of the state (Xu et al. 2022)."""

from __future__ import annotations

import copy

import torch
from torch import Tensor, nn

from apg.estimators.base import Estimate, EstimatorSettings, GradientEstimator, _bptt
from apg.policies import Normaliser, mlp
from apg.rollout import rollout
from envs.base import System


class ValueNetwork(nn.Module):
    """``V(obs, time left)``: the expected cost-to-go, from normalised inputs, in the cost's own units."""

    def __init__(self, obs_dim: int, hidden: tuple[int, ...]) -> None:
        super().__init__()
        self.obs_normaliser = Normaliser(obs_dim, "running", 1e-3)
        self.target_normaliser = Normaliser(1, "running", 1e-6)
        self.net = mlp([obs_dim + 1, *hidden, 1], "tanh")

    def normalised(self, obs: Tensor, time_left: Tensor) -> Tensor:
        return self.net(torch.cat([self.obs_normaliser(obs), time_left.unsqueeze(-1)], -1)).squeeze(-1)

    def forward(self, obs: Tensor, time_left: Tensor) -> Tensor:
        t = self.target_normaliser
        return self.normalised(obs, time_left) * t.var.sqrt().clamp_min(t.floor) + t.mean


class TerminalValue(GradientEstimator):
    """Short-horizon actor-critic (Xu et al. 2022): truncated-BPTT windows that end in a learned value.

    Each estimate rolls the whole horizon out in windows of ``window`` steps, the state detached between windows.
    A value network ``V(observe(x), time left / horizon)`` is first regressed (``critic_iterations`` Adam steps)
    onto the Monte-Carlo cost-to-go of every state of this batch of rollouts; then the policy's gradient is that
    of ``sum over windows of (the window's costs + V(state at its end))``, the last window ending in the
    terminal cost instead. ``dV/dx`` stands in for the costate the truncation cut. The value network, its
    optimiser and its normalisers are in :meth:`state_dict`, so a resumed run continues with them. Costs
    ``B * horizon`` simulator steps, like ``analytic``. Xu et al. use TD(lambda) targets over a continuing
    rollout; this finite-horizon version uses the exact cost-to-go of each rollout instead.
    """

    name = "terminal_value"
    title = "BPTT windows + learned terminal value"
    objective = "none (biased by the learned value)"
    uses = ("window", "critic_hidden", "critic_lr", "critic_iterations")
    stateful = True

    def __init__(self, settings: EstimatorSettings | None = None) -> None:
        self.settings = settings or EstimatorSettings(name="terminal_value", window=32)
        self.critic: ValueNetwork | None = None
        self.optimiser: torch.optim.Optimizer | None = None
        self._pending: dict | None = None  # state loaded before the critic was built

    def _build(self, obs_dim: int, dtype: torch.dtype) -> ValueNetwork:
        if self.critic is None:
            self.critic = ValueNetwork(obs_dim, tuple(self.settings.critic_hidden)).to(dtype)
            self.optimiser = torch.optim.Adam(self.critic.parameters(), lr=self.settings.critic_lr)
            if self._pending is not None:
                self.critic.load_state_dict(self._pending["critic"])
                self.optimiser.load_state_dict(self._pending["optimiser"])
                self._pending = None
        return self.critic

    def state_dict(self) -> dict:
        if self.critic is None:
            return copy.deepcopy(self._pending or {})
        return {"critic": self.critic.state_dict(), "optimiser": self.optimiser.state_dict()}

    def load_state_dict(self, state: dict) -> None:
        if not state:
            return
        self.critic, self.optimiser, self._pending = None, None, copy.deepcopy(state)

    def fit(self, obs: Tensor, time_left: Tensor, targets: Tensor, generator: torch.Generator) -> float:
        """Regress the value onto ``targets`` (cost-to-go) at ``obs``, ``time_left`` (flat); returns the final
        mean squared error in normalised units."""
        critic = self._build(obs.shape[-1], obs.dtype)
        critic.obs_normaliser.update(obs)
        critic.target_normaliser.update(targets.unsqueeze(-1))
        t = critic.target_normaliser
        goal = (targets - t.mean) / t.var.sqrt().clamp_min(t.floor)
        n = obs.shape[0]
        size = min(n, 4096)
        loss = torch.zeros(())
        for _ in range(self.settings.critic_iterations):
            idx = torch.randint(n, (size,), generator=generator)
            loss = (critic.normalised(obs[idx], time_left[idx]) - goal[idx]).pow(2).mean()
            self.optimiser.zero_grad(set_to_none=True)
            loss.backward()
            self.optimiser.step()
        return float(loss.detach())

    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        window = self.settings.window
        traj = rollout(system, policy, x0, horizon, window=window, **self.rollout_options.as_kwargs())
        ends = traj.window_ends
        # Fit the value to this batch's cost-to-go from every state (time left as a fraction of the horizon).
        with torch.no_grad():
            to_go = torch.cat([traj.costs.flip(0).cumsum(0).flip(0) + traj.terminal, traj.terminal[None]])  # (T+1, B)
            steps_left = torch.arange(horizon, -1, -1, dtype=x0.dtype)  # (T+1,)
            obs = system.observe(traj.states.detach())  # (T+1, B, obs)
            left = (steps_left / horizon)[:, None].expand(to_go.shape)
        self.fit(obs.reshape(-1, obs.shape[-1]), left.reshape(-1), to_go.reshape(-1), generator)
        critic = self.critic
        assert critic is not None
        bootstrap = torch.zeros((), dtype=x0.dtype)
        for k, x_end in enumerate(ends):
            left_k = torch.full(x_end.shape[:1], (horizon - (k + 1) * window) / horizon, dtype=x0.dtype)
            bootstrap = bootstrap + critic(system.observe(x_end), left_k).mean()
        surrogate = traj.total_cost.mean() + bootstrap
        grads = _bptt(surrogate, policy)
        return Estimate(traj.total_cost.mean().detach(), grads, x0.shape[0] * horizon, traj.detach())

    def reference_gradient(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                           generator: torch.Generator, samples: int) -> tuple[Tensor, ...] | None:
        return None
