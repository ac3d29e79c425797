"""Per-time-step gradient diagnostics of a closed-loop rollout: where along the horizon the exact BPTT gradient
comes from, and how sensitive the rollout is to its own state.

Two quantities, both of the closed loop ``x_{t+1} = step(x_t, pi(observe(x_t)))`` (policy included):

* the **costate** (adjoint) ``lambda_t = dC/dx_t``, the total derivative of a trajectory's cost ``C`` (running
  costs plus terminal cost) with respect to its state at step ``t``. It obeys the discrete adjoint recursion
  ``lambda_t = dc_t/dx_t + (dx_{t+1}/dx_t)^T lambda_{t+1}``, ``lambda_T = dphi/dx_T`` (Bryson & Ho, *Applied
  Optimal Control*, 1975, ch. 2), which is exactly what backpropagation through time evaluates. It is read off
  one reverse pass that differentiates with respect to every intermediate state and action tensor. With it
  comes ``dC/du_t``, the gradient reaching the action at step ``t``, through which every policy-parameter
  gradient passes.
* the **state Jacobian** ``dx_t/dx_0``, the running product of the step Jacobians along the trajectory, in
  float64. Its largest singular value measures how much a perturbation of the initial state is amplified;
  on a chaotic or unstable closed loop it grows like ``exp(L t)`` (``L`` the largest Lyapunov exponent), and so
  do the BPTT gradient and its variance (Metz et al. 2021, "Gradients are not all you need"; Suh et al. 2022,
  "Do differentiable simulators give better policy gradients?").

A costate that grows by orders of magnitude along the horizon means the gradient is dominated by the sensitivity
of late costs to early states; :meth:`GradientProfile.warning` then names the config switches that shorten or
tame that chain.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import numbers
from dataclasses import dataclass

import torch
from torch import Tensor, nn
from torch.func import functional_call

from apg.rollout import rollout
from envs.base import System

# Sums the amplification divides by are floored at this share of their largest value (and at float64's smallest
# normal number), so a cost gradient that vanishes along part of the horizon never divides by zero.
_RATIO_FLOOR = 1e-12


@dataclass(frozen=True)
class GradientProfile:
    """Where along the horizon the exact gradient comes from, and how sensitive the rollout is.

    All tensors are float64 on the CPU. ``T`` is the horizon in steps; ``C`` is the total cost (running costs plus
    terminal cost) of one trajectory. For the batch-mean objective ``J`` of training, ``dJ/dx_t = dC/dx_t / B``
    row by row; the fields use ``dC`` so that they do not depend on the batch size ``B``.
    """

    dt: float  # system time step (s)
    state_names: tuple[str, ...]  # one per state entry, from system.state
    costate: Tensor  # (T+1, state_dim): batch mean of |dC/dx_t[i]|, the costate (adjoint) of the closed loop
    action: Tensor  # (T, action_dim): batch mean of |dC/du_t[j]|, the gradient reaching the action at step t
    # (T+1, state_dim): batch mean of |g_t[i]|, g_t the gradient of step t's own cost c_t(x_t, pi(x_t)) (for t = T
    # the terminal cost): the costate without its future, lambda_t = g_t + (dx_{t+1}/dx_t)^T lambda_{t+1}.
    cost_gradient: Tensor
    # (T+1,): largest singular value of dx_t/dx_0 of the closed loop, median over the trajectories it was computed
    # on (the lower median for an even count); entry 0 is 1. inf only where the value exceeds float64's range.
    jacobian_sigma: Tensor

    @property
    def horizon(self) -> int:
        return self.action.shape[0]

    @property
    def times(self) -> Tensor:
        """Time of each state, ``(T+1,)`` seconds."""
        return torch.arange(self.horizon + 1, dtype=torch.float64) * self.dt

    @property
    def costate_norm(self) -> Tensor:
        """``(T+1,)``: Euclidean norm over state entries of the batch-mean ``|dC/dx_t|`` vector (``costate``).

        The norm of the mean-abs vector, not the mean of per-trajectory norms: it is computable from the stored
        fields, and the two differ by at most a factor ``sqrt(state_dim)``.
        """
        return torch.linalg.vector_norm(self.costate, dim=-1)

    @property
    def amplification(self) -> Tensor:
        """``(T+1,)``: ``|lambda_t| / sum_{s >= t} |g_s|``, how much the dynamics amplify the cost gradients that
        the costate at step ``t`` collects from the rest of the horizon (norms of the batch-mean-abs vectors).

        Since ``lambda_t = sum_{s >= t} (dx_s/dx_t)^T g_s``, this is at most about ``max_s sigma_max(dx_s/dx_t)``
        (times ``sqrt(state_dim)`` for the batch averaging): near 1 or below when the closed loop does not
        amplify perturbations, ``exp(L (T - t) dt)`` when it does with exponent ``L``. Entry ``T`` is 1. Unlike
        the costate itself it does not shrink with the state: a stabilising policy whose state (and so costate)
        decays by orders of magnitude along the horizon keeps it near 1.
        """
        g = torch.linalg.vector_norm(self.cost_gradient, dim=-1)
        tail = g.flip(0).cumsum(0).flip(0)  # (T+1,): sum over s >= t
        floor = max(_RATIO_FLOOR * float(tail.max()), torch.finfo(torch.float64).tiny) if tail.numel() else 1.0
        return self.costate_norm / tail.clamp_min(floor)

    @property
    def growth(self) -> float:
        """How many-fold the gradient grows along the horizon: the largest :attr:`amplification` (``inf`` if
        anything is not finite, 1 for a zero costate)."""
        amp = self.amplification
        if not torch.isfinite(amp).all():
            return math.inf
        return 1.0 if float(self.costate_norm.max()) == 0.0 else float(amp.max())

    @property
    def sigma_max(self) -> float:
        """Largest singular value of ``dx_t/dx_0`` over the horizon (``inf`` if not finite)."""
        s = self.jacobian_sigma
        return float(s.max()) if torch.isfinite(s).all() else math.inf

    @property
    def severity(self) -> float:
        """``max(growth, sigma_max)``: the figure :meth:`warning` compares with its threshold."""
        return max(self.growth, self.sigma_max)

    def summary(self) -> dict[str, float]:
        """Scalars for logging: ``costate_growth_log10``, ``jacobian_sigma_max_log10``,
        ``jacobian_sigma_final_log10``, ``costate_norm_first``, ``costate_norm_last``, ``costate_norm_max``,
        ``action_grad_max`` (largest batch-mean ``|dC/du_t[j]|``)."""
        norm = self.costate_norm
        return {
            "costate_growth_log10": _log10(self.growth),
            "jacobian_sigma_max_log10": _log10(self.sigma_max),
            "jacobian_sigma_final_log10": _log10(float(self.jacobian_sigma[-1])),
            "costate_norm_first": float(norm[0]),
            "costate_norm_last": float(norm[-1]),
            "costate_norm_max": float(norm.max()),
            "action_grad_max": float(self.action.max()) if self.action.numel() else 0.0,
        }

    def warning(self, threshold: float = 1e3) -> str | None:
        """A message naming the numbers and the remedies when ``growth`` or ``sigma_max`` exceeds ``threshold``
        (a factor along the horizon); ``None`` otherwise."""
        growth, sigma = self.growth, self.sigma_max
        if not (growth > threshold or sigma > threshold):
            return None
        seconds = self.horizon * self.dt
        top = int(torch.argmax(torch.nan_to_num(self.amplification, nan=math.inf)))
        window = self._suggested_window()
        hint = f", e.g. estimator.window={window}: about a 10-fold growth of dx_t/dx_0" if window else ""
        return (
            f"exploding gradient along the horizon ({self.horizon} steps, {seconds:.3g} s): the dynamics amplify "
            f"the cost gradient {growth:.3g}-fold on its way back to t = {top * self.dt:.3g} s (costate growth) and "
            f"the closed-loop state Jacobian dx_t/dx_0 reaches sigma_max {sigma:.3g} (threshold {threshold:.3g}). "
            f"Full-horizon BPTT gradients (what this profile measures, whatever estimator trains) are then "
            f"dominated by late costs' sensitivity to early states and have high variance. Remedies: "
            f"estimator.window=<steps> (truncated BPTT windows, state detached between windows{hint}); "
            f"estimator=terminal_value (a learned terminal value at the end of short windows, short-horizon "
            f"actor-critic, Xu et al. 2022); train.horizon_start=<steps> (horizon schedule, short to long); "
            f"train.grad_clip=<norm> (gradient-norm clipping); for contact systems "
            f"train.continuation_param=contact_smoothing train.continuation_start=<soft value> (contact smoothing "
            f"continuation, soft to stiff)."
        )

    def _suggested_window(self) -> int | None:
        """Steps over which ``dx_t/dx_0`` grows about 10-fold at its average rate up to its peak, if it grows."""
        log_s = torch.log(self.jacobian_sigma[1:])
        if log_s.numel() == 0 or not torch.isfinite(log_s).all():
            return None
        peak = int(torch.argmax(log_s))
        rate = float(log_s[peak]) / (peak + 1)  # nats per step
        if rate <= 0:
            return None
        return max(1, min(self.horizon, math.ceil(math.log(10.0) / rate)))


def _log10(v: float) -> float:
    if math.isnan(v):
        return math.nan
    return math.log10(v) if 0 < v < math.inf else (math.inf if v == math.inf else -math.inf)


def _check(system: System, x0: Tensor, horizon: int, jacobian_trajectories: int) -> None:
    if not isinstance(x0, Tensor) or not x0.is_floating_point():
        raise TypeError(f"x0 must be a floating-point tensor (B, state_dim), got {type(x0).__name__}"
                        + (f" of {x0.dtype}" if isinstance(x0, Tensor) else ""))
    if x0.ndim != 2 or x0.shape[1] != system.state_dim or x0.shape[0] < 1:
        raise ValueError(f"x0 must be (B, {system.state_dim}) for {system.name} with B >= 1, got {tuple(x0.shape)}")
    if not isinstance(horizon, numbers.Integral) or horizon < 1:
        raise ValueError(f"horizon must be a whole number of steps >= 1, got {horizon!r}")
    if not isinstance(jacobian_trajectories, numbers.Integral) or jacobian_trajectories < 1:
        raise ValueError(f"jacobian_trajectories must be a whole number >= 1, got {jacobian_trajectories!r}")
    for f in dataclasses.fields(system.params):
        v = getattr(system.params, f.name)
        if isinstance(v, Tensor) and v.ndim >= 1 and v.shape[0] != x0.shape[0]:
            raise ValueError(f"system.params.{f.name} holds {v.shape[0]} per-element values but x0 has "
                             f"{x0.shape[0]} rows; pass the system whose parameters were drawn for this batch "
                             f"(or the nominal system)")


def _rows(system: System, index: Tensor) -> System:
    """``system`` with its per-element parameters (``(B,)`` tensors, model ensembles) taken at ``index``."""
    changes = {f.name: getattr(system.params, f.name)[index] for f in dataclasses.fields(system.params)
               if isinstance(getattr(system.params, f.name), Tensor) and getattr(system.params, f.name).ndim >= 1}
    return system.replace(params=dataclasses.replace(system.params, **changes)) if changes else system


def _costates(system: System, policy: nn.Module, x0: Tensor, horizon: int) -> tuple[Tensor, Tensor, Tensor]:
    """``dC/dx_t`` ``(T+1, B, state_dim)`` and ``dC/du_t`` ``(T, B, action_dim)`` from one reverse pass, and the
    states ``(T+1, B, state_dim)``.

    From :func:`apg.rollout.rollout` with its own state tensors kept: ``u = pi(observe(x))``, running cost ``c(x, u)``, ``x' = step(x, u)``,
    terminal cost at ``x_T``. The gradient with respect to the intermediate tensor ``x_t`` itself is the total
    derivative through everything downstream of it (policy, cost, step): the same number as the derivative with
    respect to a zero probe added to ``x_t``, without the probe's extra operations.
    """
    with torch.enable_grad():
        traj = rollout(system, policy, x0.detach().requires_grad_(), horizon, keep_steps=True)
        states, actions = (list(v) for v in traj.visited)
        total = traj.total_cost
        # The sum over trajectories: trajectory b's cost depends only on its own rows, so row b of each gradient
        # is that trajectory's dC/dx_t. autograd.grad leaves the policy parameters' .grad alone.
        grads = torch.autograd.grad(total.sum(), states + actions, allow_unused=True)
    grads = [torch.zeros_like(v) if g is None else g for g, v in zip(grads, states + actions)]
    return torch.stack(grads[: horizon + 1]), torch.stack(grads[horizon + 1:]), torch.stack(states).detach()


def _cost_gradients(system: System, policy: nn.Module, states: Tensor) -> Tensor:
    """``g_t = d c_t(x, pi(observe(x))) / dx`` at ``states[t]`` (the terminal cost's gradient at ``t = T``),
    ``(T+1, B, state_dim)``: every step's own cost gradient in one batched evaluation of ``T * B`` rows."""
    steps, b, n = states.shape
    with torch.enable_grad():
        xs = states[:-1].reshape(-1, n).detach().requires_grad_()  # (T*B, n): row t*B + j is trajectory j
        xt = states[-1].detach().requires_grad_()
        sys_rep = _rows(system, torch.arange(b, device=states.device).repeat(steps - 1))
        running = sys_rep.running_cost(xs, policy(sys_rep.observe(xs))).sum()
        (g_run,) = torch.autograd.grad(running, xs, allow_unused=True)
        (g_end,) = torch.autograd.grad(system.terminal_cost(xt).sum(), xt, allow_unused=True)
    g_run = torch.zeros_like(xs) if g_run is None else g_run
    g_end = torch.zeros_like(xt) if g_end is None else g_end
    return torch.cat([g_run.reshape(steps - 1, b, n), g_end[None]])


def _jacobian_log_sigma(system: System, policy: nn.Module, x0: Tensor, horizon: int) -> Tensor:
    """``log sigma_max(dx_t/dx_0)`` per trajectory, ``(T+1, k)``, for ``x0`` ``(k, n)``, in float64.

    The trajectory is rolled out first; its step Jacobians ``J_t = dx_{t+1}/dx_t`` do not depend on each other
    once the states are known, so all ``T * k`` of them come from one batched closed-loop evaluation of
    ``T * k * n`` rows and one reverse pass (row ``i`` of ``J_t`` is the gradient of output ``i``). The running
    product ``M_{t+1} = J_t M_t`` is renormalised to unit Frobenius norm every step and the log of the scale
    accumulated (``M_t = exp(s_t) N_t``), so it never overflows: ``sigma_max(M_t) = exp(s_t) sigma_max(N_t)``.
    """
    k, n = x0.shape
    params = {name: t.detach().double() if t.is_floating_point() else t
              for name, t in (*policy.named_parameters(), *policy.named_buffers())}

    def closed_loop(sys: System, x: Tensor) -> Tensor:
        return sys.step(x, functional_call(policy, params, (sys.observe(x),)))

    with torch.no_grad():
        act = functools.partial(functional_call, policy, params)
        states = list(rollout(system, lambda obs: act((obs,)), x0.detach().double(), horizon).states[:-1])
    rows = torch.arange(k, device=x0.device).repeat(horizon).repeat_interleave(n)  # trajectory of each row
    eye = torch.eye(n, dtype=torch.float64, device=x0.device)
    with torch.enable_grad():
        # (T, k, n) states -> (T*k*n, n): row (t, b, i) is state t of trajectory b, replica i for output i.
        xs = torch.stack(states).repeat_interleave(n, dim=1).reshape(-1, n).requires_grad_()
        out = closed_loop(_rows(system, rows), xs)
        (rows_of_j,) = torch.autograd.grad(out, xs, grad_outputs=eye.repeat(horizon * k, 1))
    jac = rows_of_j.reshape(horizon, k, n, n)  # [t, b, i, :] = row i of dx_{t+1}/dx_t
    m, log_scale = eye.expand(k, n, n), x0.new_zeros(k, dtype=torch.float64)
    normalised, scales = [m], [log_scale]
    for t in range(horizon):
        m = jac[t] @ m
        scale = torch.linalg.matrix_norm(m).clamp_min(torch.finfo(torch.float64).tiny)  # (k,)
        m = m / scale[:, None, None]
        log_scale = log_scale + torch.log(scale)
        normalised.append(m)
        scales.append(log_scale)
    sigma = torch.linalg.matrix_norm(torch.stack(normalised), ord=2)  # (T+1, k) spectral norms
    return torch.stack(scales) + torch.log(sigma)


def gradient_profile(system: System, policy: nn.Module, x0: Tensor, horizon: int, *,
                     jacobian_trajectories: int = 4) -> GradientProfile:
    """Profile the exact BPTT gradient of ``policy`` on ``system`` from ``x0`` along ``horizon`` steps.

    The costates are computed in ``x0``'s dtype (the training precision); the Jacobian of the first
    ``jacobian_trajectories`` trajectories in float64 with a float64 copy of the policy's parameters. The policy
    runs in eval mode (as in :func:`apg.rollout.evaluate`) and its mode is restored; no parameter's ``.grad`` is
    touched and no random numbers are drawn.

    Args:
        system: the system to roll out; per-element parameter tensors must have one entry per row of ``x0``.
        policy: maps ``(B, obs_dim)`` observations to ``(B, action_dim)`` actions.
        x0: initial states ``(B, state_dim)``.
        horizon: steps ``T``.
        jacobian_trajectories: how many of the first trajectories the Jacobian is computed on (at most ``B``).

    Returns:
        A :class:`GradientProfile` (float64 CPU tensors).

    Raises:
        TypeError: ``x0`` is not a floating-point tensor.
        ValueError: wrong shapes, ``horizon < 1``, ``jacobian_trajectories < 1``, or per-element parameters that
            do not match the batch.
    """
    _check(system, x0, horizon, jacobian_trajectories)
    horizon = int(horizon)
    was_training = policy.training
    policy.eval()
    try:
        dx, du, states = _costates(system, policy, x0, horizon)
        g = _cost_gradients(system, policy, states)
        k = min(jacobian_trajectories, x0.shape[0])
        log_sigma = _jacobian_log_sigma(_rows(system, torch.arange(k, device=x0.device)), policy, x0[:k], horizon)
    finally:
        policy.train(was_training)
    # The lower median commutes with the monotone exp, so the median is taken in log space where it is finite.
    sigma = torch.exp(log_sigma.median(dim=1).values)
    return GradientProfile(
        dt=float(system.dt),
        state_names=tuple(s.name for s in system.state),
        costate=dx.detach().abs().double().mean(dim=1).cpu(),
        action=du.detach().abs().double().mean(dim=1).cpu(),
        cost_gradient=g.detach().abs().double().mean(dim=1).cpu(),
        jacobian_sigma=sigma.cpu(),
    )


__all__ = ["GradientProfile", "gradient_profile"]
