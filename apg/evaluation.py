"""Closed-loop evaluation of a trained or exported policy, and its robustness to a plant that differs from the model.

:func:`disturbed_closed_loop` is :func:`apg.rollout.rollout` with the ways a real machine departs from its model
put in: physical parameters other than nominal, an actuator gain, observation noise, an actuation delay of whole
steps and an impulsive push. With no departure it takes exactly the same operations as ``rollout`` (tested).

Noise and pushes are sized per state entry by a *reference scale*: by default the half-width of the task's
initial-state box (so the scale belongs to the task, not to the policy under test, and two policies for the
same task are disturbed alike). A level of 0.1 means a noise standard deviation of a tenth of that half-width;
``EvalSettings.scale`` replaces it per state in the state's own unit.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import torch
from torch import Tensor, nn

from apg.rollout import Departure, Trajectory, rollout
from envs.base import System, check_record

DTYPES = {"float32": torch.float32, "float64": torch.float64}
SATURATION_BAND = 0.01  # an action within 1 % of its range from a limit counts as saturated


# ---- settings ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Disturbance:
    """How the plant departs from the nominal model in one evaluation (the default departs in nothing)."""

    params: tuple[tuple[str, float], ...] = ()  # physical parameters replaced, (name, value in its unit)
    actuator_gain: float = 1.0  # the plant receives gain * commanded action (thrust or torque constant error)
    obs_noise: float = 0.0  # observation noise std, in reference scales of each state entry
    delay: int = 0  # actuation delay in steps: the plant receives the action computed `delay` steps earlier
    push: float = 0.0  # impulsive velocity change, in reference scales of each velocity, random sign per entry
    push_time: float = 0.25  # when the push lands, as a fraction of the horizon

    def __post_init__(self) -> None:
        check_record(self, nonnegative=("actuator_gain", "obs_noise", "delay", "push", "push_time"))
        if self.push_time > 1:
            raise ValueError(f"push_time is a fraction of the horizon in [0, 1], got {self.push_time}")

    @property
    def nominal(self) -> bool:
        return self == Disturbance(push_time=self.push_time)


@dataclass(frozen=True)
class SweepSettings:
    """The robustness sweep: one curve per physical parameter, actuator gain, noise, delay and push."""

    # (name, low, high) in the parameter's unit; () sweeps the system's own robustness_params over default_span
    params: tuple[tuple[str, float, float], ...] = ()
    default_span: tuple[float, ...] = (0.5, 2.0)  # defaults sweep each listed parameter over these multiples
    points: int = 9  # grid points per physical parameter (the nominal value is always one of them)
    actuator_gain: tuple[float, ...] = (0.5, 0.7, 0.85, 1.0, 1.15, 1.3, 1.5)
    obs_noise: tuple[float, ...] = (0.0, 0.01, 0.02, 0.05, 0.1, 0.2)
    delays: tuple[int, ...] = (0, 1, 2)
    pushes: tuple[float, ...] = (0.0, 0.5, 1.0, 2.0, 4.0)
    push_time: float = 0.25
    hold: float = 0.9  # a parameter value "holds" when the success rate is at least this

    def __post_init__(self) -> None:
        check_record(self, positive=("points",), nonnegative=("push_time", "hold"))
        if len(self.default_span) != 2 or not 0 < self.default_span[0] <= 1 <= self.default_span[1]:
            raise ValueError(f"robustness.default_span must be [low, high] multiples with low <= 1 <= high, got "
                             f"{list(self.default_span)}")
        if any(int(d) != d or d < 0 for d in self.delays):
            raise ValueError(f"robustness.delays must be whole numbers of steps >= 0, got {list(self.delays)}")
        for name, values in (("actuator_gain", self.actuator_gain), ("obs_noise", self.obs_noise),
                             ("pushes", self.pushes)):
            if any(v < 0 for v in values):
                raise ValueError(f"robustness.{name} must be >= 0, got {list(values)}")


def reference_scale(system: System, overrides: Mapping[str, float] | None = None) -> Tensor:
    """Per-state reference scale ``(state_dim,)`` for noise and pushes: half the initial box, or an override."""
    lo = torch.tensor(system.task.init_low, dtype=torch.float64)
    hi = torch.tensor(system.task.init_high, dtype=torch.float64)
    scale = (hi - lo) / 2
    names = [s.name for s in system.state]
    for k, v in (overrides or {}).items():
        if k not in names:
            raise ValueError(f"scale.{k}: {system.name} has no state {k!r}; its states are {names}")
        scale[names.index(k)] = float(v)
    return scale


# ---- closed loop ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class ClosedLoop:
    """One batch of disturbed closed-loop episodes.

    ``trajectory`` holds the true states and the actions the plant received; ``commanded`` ``(T, B, m)`` the
    policy's outputs (they differ under delay and actuator gain); ``system`` is the plant that was simulated.
    """

    system: System
    trajectory: Trajectory
    commanded: Tensor
    success: Tensor  # (B,) bool


def perturbed_system(system: System, disturbance: Disturbance) -> System:
    if not disturbance.params:
        return system
    fields = [f.name for f in dataclasses.fields(system.params)]
    for name, _ in disturbance.params:
        if name not in fields:
            raise ValueError(f"robustness.params.{name}: {system.name} has no parameter {name!r}; its parameters "
                             f"are {fields}")
    try:
        return system.replace(params=dataclasses.replace(system.params, **dict(disturbance.params)))
    except ValueError as e:
        raise ValueError(f"robustness.params: {e}") from None


@torch.no_grad()
def disturbed_closed_loop(system: System, policy: Callable[[Tensor], Tensor], x0: Tensor, horizon: int,
                          disturbance: Disturbance = Disturbance(), *, seed: int = 0,
                          scale: Tensor | None = None) -> ClosedLoop:
    """Run ``policy`` in closed loop on ``system`` (perturbed by ``disturbance``) from ``x0`` ``(B, state_dim)``.

    Args:
        policy: maps ``(B, obs_dim)`` observations to ``(B, action_dim)`` actions in the system's units.
        seed: seeds the noise and push draws (so every sweep point is reproducible).
        scale: per-state reference scale for noise and pushes (default :func:`reference_scale`).

    Raises:
        ValueError: ``horizon < 1``, or a disturbed parameter that the system does not have or cannot take.
    """
    if horizon < 1:
        raise ValueError(f"horizon must be >= 1 step, got {horizon}")
    if isinstance(policy, nn.Module):
        policy.eval()
    plant = perturbed_system(system, disturbance)
    ref = (reference_scale(system) if scale is None else scale).to(x0.dtype)
    traj = rollout(plant, policy, x0, horizon, departure=_PlantDeparture(disturbance, plant, ref, horizon, seed))
    return ClosedLoop(plant, traj, traj.commanded, plant.success(traj.states, traj.actions))


class _PlantDeparture(Departure):
    """The :class:`Disturbance` record as the closed loop's departures: sensor noise, delay, gain, a push."""

    random = True

    def __init__(self, d: Disturbance, plant: System, ref: Tensor, horizon: int, seed: int) -> None:
        self.d, self.n_q, self.ref = d, plant.n_q, ref
        self.gen = torch.Generator().manual_seed(seed)
        self.push_step = min(horizon - 1, int(round(d.push_time * horizon)))
        self.queue: list[Tensor] = []

    def sense(self, x: Tensor, k: int) -> Tensor:
        if self.d.obs_noise > 0:
            return x + self.d.obs_noise * self.ref * torch.randn(x.shape, generator=self.gen, dtype=x.dtype)
        return x

    def actuate(self, u: Tensor, k: int) -> Tensor:
        if self.d.delay:
            self.queue = self.queue or [u] * self.d.delay  # the actuator starts as if the controller had been running
            self.queue.append(u)
            u = self.queue.pop(0)
        return self.d.actuator_gain * u if self.d.actuator_gain != 1.0 else u

    def perturb(self, x: Tensor, k: int) -> Tensor:
        if self.d.push > 0 and k == self.push_step:
            n_q = self.n_q
            sign = torch.randint(0, 2, (x.shape[0], n_q), generator=self.gen).to(x.dtype) * 2 - 1
            kick = self.d.push * self.ref[n_q:] * sign  # (B, n_q): a velocity change, per generalised velocity
            x = torch.cat([x[:, :n_q], x[:, n_q:] + kick], dim=-1)
        return x


# ---- metrics ----------------------------------------------------------------------------------------------
def _wilson(successes: int, n: int, z: float = 1.96) -> tuple[float, float]:
    """Wilson's 95 % score interval for a binomial proportion (Wilson, JASA 1927)."""
    if n == 0:
        return (0.0, 1.0)
    p = successes / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return (max(0.0, centre - half), min(1.0, centre + half))


def time_to_success(run: ClosedLoop) -> Tensor:
    """Per episode, the earliest time (s) at which the trajectory up to then already meets the success
    criterion (for hold criteria: the end of the first completed hold window); NaN where it never does."""
    states, actions = run.trajectory.states, run.trajectory.actions
    horizon = actions.shape[0]
    first = torch.full((states.shape[1],), math.nan, dtype=torch.float64)
    for k in range(1, horizon + 1):
        ok = run.system.success(states[: k + 1], actions[:k]) & torch.isnan(first)
        first[ok] = k * run.system.dt
    return first


def saturation(run: ClosedLoop) -> Tensor:
    """Fraction of steps at which each commanded action lies within 1 % of its range from a limit, ``(m,)``."""
    lo = torch.tensor(run.system.action_low, dtype=run.commanded.dtype)
    hi = torch.tensor(run.system.action_high, dtype=run.commanded.dtype)
    band = SATURATION_BAND * (hi - lo)
    sat = (run.commanded <= lo + band) | (run.commanded >= hi - band)  # (T, B, m)
    return sat.double().mean(dim=(0, 1))


def violations(run: ClosedLoop, limits: Mapping[str, tuple[float, float]]) -> dict[str, float]:
    """Fraction of episodes whose state leaves each limit at any time; ``"any"`` for any of them."""
    names = [s.name for s in run.system.state]
    states = run.trajectory.states
    anyv = torch.zeros(states.shape[1], dtype=torch.bool)
    out: dict[str, float] = {}
    for name, (low, high) in limits.items():
        i = names.index(name)
        v = states[..., i]
        if run.system.state[i].angle:
            v = torch.atan2(torch.sin(v), torch.cos(v))
        bad = ((v < low) | (v > high)).any(dim=0)
        out[name] = float(bad.double().mean())
        anyv |= bad
    out["any"] = float(anyv.double().mean())
    return out


def evaluation_metrics(run: ClosedLoop, limits: Mapping[str, tuple[float, float]]) -> dict[str, Any]:
    """The closed-loop figures of one batch: success (with a 95 % interval), cost distribution,
    time-to-success, action saturation and state-limit violations."""
    n = int(run.success.numel())
    wins = int(run.success.sum())
    costs = run.trajectory.total_cost.double()
    tts = time_to_success(run)
    tts_ok = tts[~torch.isnan(tts)]
    q = torch.tensor([0.05, 0.25, 0.5, 0.75, 0.95], dtype=torch.float64)
    cq = torch.quantile(costs, q) if torch.isfinite(costs).all() else torch.full((5,), math.nan, dtype=torch.float64)
    sat = saturation(run)
    return {
        "episodes": n,
        "success_rate": wins / n,
        "success_ci95": list(_wilson(wins, n)),
        "cost": {"mean": float(costs.mean()), "std": float(costs.std()) if n > 1 else 0.0,
                 **{f"p{int(100 * p)}": float(v) for p, v in zip(q, cq)}},
        "time_to_success_s": {"reached": int(tts_ok.numel()),
                              "median": float(tts_ok.median()) if tts_ok.numel() else None,
                              "p95": float(torch.quantile(tts_ok, 0.95)) if tts_ok.numel() else None},
        "saturation_fraction": {a.name: float(v) for a, v in zip(run.system.action, sat)},
        "state_limit_violations": violations(run, limits),
    }


# ---- robustness sweep -------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Curve:
    """Success and cost along one robustness axis."""

    axis: str  # "param:<name>", "actuator_gain", "obs_noise", "delay" or "push"
    label: str  # for figures: the quantity and its unit
    values: tuple[float, ...]
    success: tuple[float, ...]
    mean_cost: tuple[float, ...]
    nominal_index: int  # the point at which the plant is the nominal one
    held: tuple[float, float] | None  # widest run of values around nominal with success >= hold

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def param_grid(nominal: float, low: float, high: float, points: int) -> tuple[float, ...]:
    """``points`` values from ``low`` to ``high``, split at the nominal value, which is always one of them."""
    if not low <= high:
        raise ValueError(f"a sweep range must have low <= high, got [{low}, {high}]")
    low, high = min(low, nominal), max(high, nominal)
    span = high - low
    n_left = max(1, round((points - 1) * (nominal - low) / span)) if low < nominal else 0
    n_right = max(1, points - 1 - n_left) if high > nominal else 0
    left = np.linspace(low, nominal, n_left + 1).tolist()[:-1]
    right = np.linspace(nominal, high, n_right + 1).tolist()[1:]
    return tuple([*left, float(nominal), *right])


def _held(values: Sequence[float], success: Sequence[float], nominal_index: int,
          hold: float) -> tuple[float, float] | None:
    if success[nominal_index] < hold:
        return None
    lo = hi = nominal_index
    while lo > 0 and success[lo - 1] >= hold:
        lo -= 1
    while hi < len(values) - 1 and success[hi + 1] >= hold:
        hi += 1
    return (float(values[lo]), float(values[hi]))


def sweep_plan(system: System, settings: SweepSettings) -> list[tuple[str, str, list[tuple[float, Disturbance]], int]]:
    """The sweep as ``(axis, label, [(value, disturbance)], nominal_index)`` per axis, before anything runs."""
    units = {f.name: f.metadata.get("unit", "") for f in dataclasses.fields(system.params)}
    ranges = list(settings.params)
    if not ranges:
        lo, hi = settings.default_span
        for name in system.robustness_params:
            v = float(getattr(system.params, name))
            ranges.append((name, lo * v, hi * v))
    plan = []
    pt = settings.push_time
    for name, low, high in ranges:
        if name not in units:
            raise ValueError(f"robustness.params.{name}: {system.name} has no parameter {name!r}; its parameters "
                             f"are {list(units)}")
        nominal = float(getattr(system.params, name))
        grid = param_grid(nominal, float(low), float(high), settings.points)
        points = [(v, Disturbance(params=((name, v),) if v != nominal else (), push_time=pt)) for v in grid]
        plan.append((f"param:{name}", f"{name} [{units[name]}]", points, grid.index(nominal)))
    gains = sorted(set(settings.actuator_gain) | {1.0})
    plan.append(("actuator_gain", "actuator gain (applied / commanded)",
                 [(g, Disturbance(actuator_gain=g, push_time=pt)) for g in gains], gains.index(1.0)))
    noise = sorted(set(settings.obs_noise) | {0.0})
    plan.append(("obs_noise", "observation noise std [reference scales]",
                 [(s, Disturbance(obs_noise=s, push_time=pt)) for s in noise], 0))
    delays = sorted(set(int(d) for d in settings.delays) | {0})
    plan.append(("delay", "actuation delay [steps]",
                 [(float(d), Disturbance(delay=d, push_time=pt)) for d in delays], 0))
    pushes = sorted(set(settings.pushes) | {0.0})
    plan.append(("push", f"push at {pt:.0%} of the horizon [reference scales]",
                 [(p, Disturbance(push=p, push_time=pt)) for p in pushes], 0))
    return plan


def sweep(system: System, policy: Callable[[Tensor], Tensor], x0: Tensor, horizon: int, settings: SweepSettings, *,
          seed: int = 0, scale: Tensor | None = None,
          progress: Callable[[int, int, str], None] | None = None) -> list[Curve]:
    """Success and mean cost along every axis of :func:`sweep_plan`, from the same initial states ``x0``.

    At each axis's nominal point the plant is exactly the nominal one, so that point reproduces
    :func:`disturbed_closed_loop` without a disturbance (tested). ``progress(done, total, what)`` is called per point.
    """
    plan = sweep_plan(system, settings)
    total = sum(len(p) for _, _, p, _ in plan)
    done = 0
    curves = []
    for axis, label, points, nominal_index in plan:
        succ, cost = [], []
        for j, (value, dist) in enumerate(points):
            run = disturbed_closed_loop(system, policy, x0, horizon, dist, seed=seed + done, scale=scale)
            succ.append(float(run.success.double().mean()))
            cost.append(float(run.trajectory.total_cost.double().mean()))
            done += 1
            if progress:
                progress(done, total, f"{axis}={value:g}")
        values = tuple(v for v, _ in points)
        curves.append(Curve(axis, label, values, tuple(succ), tuple(cost), nominal_index,
                            _held(values, succ, nominal_index, settings.hold)))
    return curves


__all__ = ["Disturbance", "SweepSettings", "ClosedLoop", "Curve", "disturbed_closed_loop", "evaluation_metrics",
           "sweep", "sweep_plan", "param_grid", "reference_scale", "time_to_success", "saturation", "violations"]
