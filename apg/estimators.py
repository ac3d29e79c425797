"""Gradient estimators of the rollout objective ``J(theta) = E_x0[ sum_t c(x_t, u_t) + c_T(x_T) ]``.

Every estimator answers the same question: given a policy, a minibatch of initial states and a seeded
generator, what is (an estimate of) ``dJ/dtheta``, and how many simulator steps did that cost? The trainer
takes any of them, so adding one is adding a class here and a YAML file in ``configs/estimator``.

Which objective each one estimates (its reference gradient, :meth:`GradientEstimator.reference_gradient`):

* ``analytic``: the exact minibatch objective, by backpropagation through time. With ``window > 0`` the
  rollout is cut into windows with the state detached between them (truncated BPTT): a biased, myopic gradient
  whose step-Jacobian products never span more than ``window`` steps.
* ``terminal_value``: truncated BPTT windows, each ending in a learned value function of the state and the time
  left, fitted to the rollouts' cost-to-go (the short-horizon actor-critic of Xu, Makoviychuk, Narang, Ramos,
  Matusik, Garg, Macklin 2022, "Accelerated policy learning with parallel differentiable simulation"); the value
  carries the gradient of the cost beyond each window, as far as it is learned.
* ``es``: the parameter-smoothed objective ``J_sigma(theta) = E_eps[J(theta + sigma eps)]``, eps ~ N(0, I),
  by Gaussian smoothing with antithetic pairs (Salimans, Ho, Chen, Sidor, Sutskever 2017, "Evolution strategies
  as a scalable alternative to reinforcement learning"; the smoothing identity is Nesterov & Spokoiny 2017).
  With ``rank_shaping`` the costs are replaced by centred ranks, as Salimans et al. do: the update is then
  invariant to any increasing transformation of the cost but no longer an unbiased gradient of anything.
* ``likelihood_ratio``: the action-smoothed objective, the expected cost when Gaussian noise is added to every
  action, by the score-function estimator (Williams 1992, REINFORCE) with cost-to-go and a leave-one-out
  baseline over the noisy rollouts of the same initial state (both keep it unbiased).
* ``alpha_order``: the same action-smoothed objective, as ``alpha * first-order + (1 - alpha) * zeroth-order``
  on one shared set of noisy rollouts (Suh, Simchowitz, Zhang, Tedrake 2022, "Do differentiable simulators give
  better policy gradients?"): the first-order term is the pathwise (reparameterised) gradient through the
  noisy rollouts, the zeroth-order term the likelihood-ratio estimate above. ``alpha`` is fixed here.

Noisy actions are clipped to the system's action limits before they reach the simulator; the clip counts as
part of the system, so the score uses the unclipped Gaussian draw (common practice in policy-gradient codes).
"""

from __future__ import annotations

import abc
import copy
import dataclasses
import math
import warnings
from dataclasses import dataclass
from typing import Callable, ClassVar

import torch
from torch import Tensor, nn
from torch.func import functional_call, vmap

from apg.policies import Normaliser, mlp
from apg.rollout import ActionNoise, RolloutOptions, Trajectory, rollout
from envs.base import System, check_record

BASELINES = ("leave_one_out", "none")


@dataclass(frozen=True)
class EstimatorSettings:
    """Which estimator to use and its settings; ``configs/estimator/*.yaml`` fill this record."""

    name: str = "analytic"  # analytic | terminal_value | es | likelihood_ratio | alpha_order
    pairs: int = 16  # es: antithetic perturbation pairs per estimate (2 x pairs rollouts of every initial state)
    sigma: float = 0.02  # es: standard deviation of the parameter perturbation (parameter units)
    rank_shaping: bool = False  # es: centred-rank fitness shaping (Salimans et al. 2017); biased, scale-free
    samples: int = 4  # likelihood_ratio, alpha_order: noisy rollouts per initial state
    action_noise: float = 0.1  # likelihood_ratio, alpha_order: noise std as a fraction of each action's half-range
    baseline: str = "leave_one_out"  # likelihood_ratio, alpha_order: leave_one_out | none
    alpha: float = 0.5  # alpha_order: weight of the first-order term (1: pathwise only, 0: likelihood ratio only)
    window: int = 0  # analytic, terminal_value: steps per truncated-BPTT window, state detached between (0: none)
    critic_hidden: tuple[int, ...] = (64, 64)  # terminal_value: widths of the value network (tanh)
    critic_lr: float = 1.0e-3  # terminal_value: Adam learning rate of the value network
    critic_iterations: int = 16  # terminal_value: value-regression steps per estimate

    def __post_init__(self) -> None:
        if self.name not in ESTIMATORS:
            raise ValueError(f"name must be one of {', '.join(sorted(ESTIMATORS))}; got {self.name!r}")
        if self.baseline not in BASELINES:
            raise ValueError(f"baseline must be one of {', '.join(BASELINES)}; got {self.baseline!r}")
        check_record(self, positive=("pairs", "sigma", "samples", "action_noise", "critic_lr", "critic_iterations"),
                     nonnegative=("window",))
        if any(int(h) < 1 for h in self.critic_hidden):
            raise ValueError(f"critic_hidden widths must be >= 1, got {list(self.critic_hidden)}")
        if self.name == "terminal_value" and self.window < 1:
            raise ValueError("estimator terminal_value needs window >= 1 (steps per short horizon), e.g. "
                             "estimator.window=32")
        if not 0.0 <= self.alpha <= 1.0:
            raise ValueError(f"alpha must be in [0, 1], got {self.alpha}")
        if self.baseline == "leave_one_out" and self.samples < 2 and "baseline" in ESTIMATORS[self.name].uses:
            raise ValueError(f"baseline=leave_one_out needs samples >= 2 (got {self.samples}); raise samples or "
                             f"set baseline=none")

    def ignored(self) -> list[str]:
        """Options set away from their defaults that the chosen estimator does not use."""
        used = ESTIMATORS[self.name].uses
        default = EstimatorSettings()
        return [f.name for f in dataclasses.fields(self)
                if f.name != "name" and f.name not in used and getattr(self, f.name) != getattr(default, f.name)]


@dataclass(frozen=True)
class Estimate:
    """One gradient estimate: ``grads`` align with ``[p for p in policy.parameters()]``."""

    loss: Tensor  # scalar, the minibatch objective (detached); for smoothed estimators, of the smoothed one
    grads: tuple[Tensor, ...]
    sim_steps: int  # simulator steps spent on this estimate (batch x horizon x evaluations)
    trajectory: Trajectory | None = None  # the rollouts it made, detached (all of them, batched along dim 1)


class GradientEstimator(abc.ABC):
    """Contract: ``estimate(system, policy, x0, horizon, generator) -> Estimate``.

    ``x0`` is ``(B, state_dim)``; the objective is the batch mean of ``Trajectory.total_cost``. The estimator
    must not change the policy's parameters, and must draw any randomness from ``generator`` only.
    ``reference_gradient`` returns the gradient of the objective the estimator is unbiased for, computed by a
    low-variance route (for studies); ``steps_per_estimate`` says what one estimate costs in simulator steps.
    """

    name: ClassVar[str]
    title: ClassVar[str] = ""  # a few words for tables and reports
    objective: ClassVar[str] = "exact minibatch objective"  # what reference_gradient differentiates
    uses: ClassVar[tuple[str, ...]] = ()  # the EstimatorSettings fields it reads (others warn when set)
    sample_field: ClassVar[str | None] = None  # the field that sets its number of samples per estimate
    stateful: ClassVar[bool] = False  # learns across iterations (state_dict is not empty)
    rollout_options: RolloutOptions = RolloutOptions()  # how differentiable rollouts run (memory, compilation)

    def state_dict(self) -> dict:
        """What the estimator learns across iterations (a critic, say), for checkpoints; empty for most."""
        return {}

    def load_state_dict(self, state: dict) -> None:
        """Restore :meth:`state_dict` (from a checkpoint)."""

    def with_rollout_options(self, options: RolloutOptions) -> "GradientEstimator":
        """A copy of this estimator whose differentiable rollouts run with ``options``."""
        new = copy.copy(self)
        new.rollout_options = options
        return new

    @abc.abstractmethod
    def estimate(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                 generator: torch.Generator) -> Estimate:
        ...

    def steps_per_estimate(self, batch: int, horizon: int) -> int:
        """Simulator steps one ``estimate`` spends on ``batch`` initial states."""
        return batch * horizon

    def reference_gradient(self, system: System, policy: nn.Module, x0: Tensor, horizon: int,
                           generator: torch.Generator, samples: int) -> tuple[Tensor, ...] | None:
        """The gradient of :attr:`objective` at the policy's parameters (``samples`` sets its precision where
        it is itself an average); ``None`` where the estimator is not unbiased for any objective."""
        return _bptt(rollout(system, policy, x0, horizon).total_cost.mean(), policy)


def _bptt(loss: Tensor, policy: nn.Module) -> tuple[Tensor, ...]:
    params = list(policy.parameters())
    grads = torch.autograd.grad(loss, params, allow_unused=True)
    return tuple(torch.zeros_like(p) if g is None else g for g, p in zip(grads, params))


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


# ---- batched rollouts of many parameter vectors or many noise draws --------------------------------------------
def _tile_system(system: System, k: int) -> System:
    """A copy whose per-batch tensor parameters are repeated ``k`` times, to match ``x0.repeat(k, 1)``."""
    def tiled(record: object) -> object:
        changes = {f.name: getattr(record, f.name).repeat(k) for f in dataclasses.fields(record)
                   if isinstance(getattr(record, f.name), Tensor) and getattr(record, f.name).dim() == 1}
        return dataclasses.replace(record, **changes) if changes else record

    if k == 1:
        return system
    params, task = tiled(system.params), tiled(system.task)
    return system if params is system.params and task is system.task else system.replace(params=params, task=task)


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


def _noisy_rollout(system: System, act: Callable[[Tensor], Tensor], x0: Tensor, horizon: int,
                   noise: Tensor | None = None) -> Trajectory:
    """:func:`apg.rollout.rollout` of ``act`` from ``x0`` ``(K, n)``; with ``noise`` ``(T, K, action_dim)``
    (already scaled) added to every action and the sum clipped to the limits."""
    return rollout(system, act, x0, horizon, departure=None if noise is None else ActionNoise(noise, system))


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


ESTIMATORS: dict[str, type[GradientEstimator]] = {
    cls.name: cls for cls in (Analytic, TerminalValue, EvolutionStrategies, LikelihoodRatio, AlphaOrder)}


def make_estimator(settings: EstimatorSettings) -> GradientEstimator:
    """The estimator named in ``settings``; an unknown name lists the valid ones. Warns about ignored options."""
    try:
        cls = ESTIMATORS[settings.name]
    except KeyError:
        raise ValueError(f"unknown estimator {settings.name!r}; choose one of {', '.join(sorted(ESTIMATORS))}") from None
    for key in settings.ignored():
        warnings.warn(f"estimator.{key} is ignored by estimator.name={settings.name}", stacklevel=2)
    return cls(settings)  # type: ignore[call-arg]
