"""Analytic against sampled gradients on one system: a gradient-quality study and an equal-budget race.

* :func:`gradient_study`: at fixed policy parameters and a fixed minibatch of initial states, for a ladder of
  horizons and sample counts, each estimator's error against the reference gradient of the objective it is
  unbiased for (exact for BPTT; the parameter-smoothed objective for ES; the action-smoothed one for the
  likelihood-ratio and alpha-order estimators, see :mod:`apg.estimators`), its variance, its cosine with the
  exact gradient, and its cost in simulator steps and seconds. It also measures how much the reference gradient
  itself varies with the initial states, which is what explodes on chaotic systems at long horizons (Metz,
  Freeman, Schoenholz, Kachman 2021, "Gradients are not all you need").
* :func:`run_race`: every entrant trains the same system from the same initial policy (same seed, same policy
  settings) under the same budget of simulator steps, and separately of compute seconds, over several seeds;
  held-out cost is recorded against both. :func:`race_summary` turns the curves into steps and seconds to reach
  a target cost, and their ratios to a reference entrant.

Seconds are compute seconds: the sum of the trainer's per-iteration times (rollouts, gradient, optimiser step),
excluding held-out evaluations and checkpoints, which every entrant does equally often. Writing the CSV files,
figures and report is :mod:`apg.reports.compare_report`'s job; this module computes and prints nothing.
"""

from __future__ import annotations

import copy
import dataclasses
import logging
import math
import statistics
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Optional, Sequence

import torch
from torch import Tensor, nn

from apg.estimators import ESTIMATORS, Analytic, EstimatorSettings, make_estimator
from apg.optim import OptimSettings
from apg.policies import PolicySettings, make_policy
from apg.rollout import Evaluation, evaluate
from apg.runs import DTYPES, RunRecord, SystemSpec, TrainSettings
from apg.train import Monitor, RunInfo, train_record
from apg.updates import GradientUpdate, NonFiniteError, PPOSettings, PPOUpdate, Update
from envs.base import System, check_record

log = logging.getLogger(__name__)


# ---- records ---------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class StudySettings:
    """The gradient study: one fixed minibatch, a ladder of horizons and of sample counts."""

    enabled: bool = True
    batch: int = 64  # initial states in the fixed minibatch the gradients are taken on
    horizons: tuple[int, ...] = (25, 50, 100)  # rollout lengths in steps
    samples: tuple[int, ...] = (2, 8, 32)  # es: antithetic pairs; likelihood_ratio, alpha_order: rollouts per state
    repeats: int = 12  # independent estimates per cell, for the variance and the error
    reference_samples: int = 64  # pairs / noise draws per state behind each smoothed reference gradient
    groups: int = 8  # the minibatch split into this many groups for the initial-state variance
    dtype: str = "float64"  # float64 keeps the variances of small gradients above rounding
    only: tuple[str, ...] = ()  # estimator labels to study (empty: all configured)

    def __post_init__(self) -> None:
        if self.dtype not in DTYPES:
            raise ValueError(f"study.dtype must be one of {', '.join(DTYPES)}; got {self.dtype!r}")
        check_record(self, positive=("batch", "repeats", "reference_samples", "groups"))
        for key in ("horizons", "samples"):
            if not getattr(self, key) or any(int(v) < 1 for v in getattr(self, key)):
                raise ValueError(f"study.{key} must be a non-empty list of integers >= 1, got {list(getattr(self, key))}")
        if self.repeats < 2:
            raise ValueError(f"study.repeats must be >= 2 to measure a variance, got {self.repeats}")
        if self.batch % self.groups:
            raise ValueError(f"study.batch ({self.batch}) must be a multiple of study.groups ({self.groups})")


@dataclass(frozen=True)
class RaceSettings:
    """The training race: budgets, seeds, and how the target cost is chosen."""

    enabled: bool = True
    seeds: tuple[int, ...] = (0, 1, 2)
    budget_steps: int = 2_000_000  # simulator steps per run in the steps race
    budget_seconds: float = 0.0  # > 0: also a separate race with this many seconds per run (0: no seconds race)
    evaluations: int = 30  # held-out evaluations per run, geometrically spaced in iterations (early ones dense)
    target_cost: Optional[float] = None  # held-out cost to reach; None: from target_fraction and the reference
    target_fraction: float = 0.95  # None target: this fraction of the way from the initial cost to the reference's
    # worst final cost over seeds, on a log scale: initial^(1 - f) * final^f
    reference: str = "analytic"  # the entrant the ratios are taken against
    only: tuple[str, ...] = ()  # entrant labels to race (empty: all configured)

    def __post_init__(self) -> None:
        check_record(self, positive=("evaluations",), nonnegative=("budget_steps", "budget_seconds"))
        if not self.seeds:
            raise ValueError("race.seeds must list at least one seed")
        if not 0.0 < self.target_fraction <= 1.0:
            raise ValueError(f"race.target_fraction must be in (0, 1], got {self.target_fraction}")
        if self.budget_steps <= 0:
            raise ValueError("race.budget_steps must be > 0: the steps race always runs, and the seconds race sizes "
                             "each entrant's learning-rate schedule from the speed measured in it")

    @property
    def budgets(self) -> tuple[str, ...]:
        return ("steps", "seconds") if self.budget_seconds > 0 else ("steps",)


@dataclass(frozen=True)
class Entrant:
    """One method in the race: an update (a gradient estimator's settings, or PPO's) with its own optimiser and
    loop settings; every entrant trains in the same loop (:func:`apg.train.train_record`)."""

    label: str
    update: EstimatorSettings | PPOSettings
    optim: OptimSettings
    train: TrainSettings  # iterations, eval_every and the budget fields are set by the race

    @property
    def method(self) -> str:
        return "ppo" if isinstance(self.update, PPOSettings) else "gradient"

    @property
    def estimator(self) -> EstimatorSettings | None:
        return self.update if isinstance(self.update, EstimatorSettings) else None

    @property
    def ppo(self) -> PPOSettings | None:
        return self.update if isinstance(self.update, PPOSettings) else None

    def _update(self) -> Update:
        """The update, built without warnings (they come once, when the entrant trains)."""
        if isinstance(self.update, PPOSettings):
            return PPOUpdate(self.update)
        return GradientUpdate(ESTIMATORS[self.update.name](self.update))  # type: ignore[call-arg]

    @property
    def steps_per_iteration(self) -> int:
        """Simulator steps per iteration, averaged over a horizon schedule (``train.horizon_start``) if any."""
        full = self._update().steps_per_iteration(self.train.batch_size, self.train.horizon)
        return max(1, round(full * self.train.mean_horizon / self.train.horizon))

    @property
    def description(self) -> str:
        title = self._update().title
        extras = []
        if self.train.horizon_start:
            extras.append(f"horizon {self.train.horizon_start} to {self.train.horizon} steps")
        if self.train.continuation_param:
            extras.append(f"{self.train.continuation_param} from {self.train.continuation_start:g}")
        return f"{title} ({'; '.join(extras)})" if extras else title


# ---- gradient study ----------------------------------------------------------------------------------------------
def _flat(grads: Iterable[Tensor]) -> Tensor:
    return torch.cat([g.reshape(-1) for g in grads])


def _cos(a: Tensor, b: Tensor) -> float:
    den = float(a.norm() * b.norm())
    return float(a @ b) / den if den > 0 else float("nan")


def _with_samples(settings: EstimatorSettings, n: int) -> EstimatorSettings | None:
    """The estimator's settings with ``n`` samples, or ``None`` where it takes no sample count or ``n`` is not a
    valid one for it (the leave-one-out baseline needs two)."""
    field = ESTIMATORS[settings.name].sample_field
    if field is None:
        return None
    try:
        return dataclasses.replace(settings, **{field: n})
    except ValueError:
        return None


def _reference(estimator, system: System, policy: nn.Module, x0: Tensor, horizon: int, seed: int,
               settings: StudySettings) -> dict[str, Any] | None:
    """The reference gradient, computed twice independently (once group by group, for the initial-state
    variance); returns their mean, its relative standard error and the initial-state variance."""
    groups = x0.chunk(settings.groups)
    parts = []
    for g, xg in enumerate(groups):
        r = estimator.reference_gradient(system, policy, xg, horizon, torch.Generator().manual_seed(seed + g),
                                         settings.reference_samples)
        if r is None:
            return None
        parts.append(_flat(r).detach())
    stack = torch.stack(parts)  # (G, P): gradients of equal-sized groups, their mean is the minibatch gradient
    first = stack.mean(0)
    second = _flat(estimator.reference_gradient(system, policy, x0, horizon,
                                                torch.Generator().manual_seed(seed + settings.groups),
                                                settings.reference_samples)).detach()
    ref = (first + second) / 2
    return {"grad": ref, "rel_se": float((first - second).norm() / (2 * ref.norm()).clamp_min(1e-300)),
            # Var of the minibatch gradient over draws of its initial states: Cov(group gradient) / G.
            "x0_variance": float(stack.var(0, unbiased=True).sum() / settings.groups)}


def gradient_study(system: System, policy: nn.Module, estimators: Mapping[str, EstimatorSettings],
                   settings: StudySettings, *, seed: int,
                   progress: Callable[[str], None] | None = None) -> list[dict[str, Any]]:
    """Measure every estimator in ``estimators`` (label -> settings) at the policy's current parameters.

    Returns one row per (horizon, estimator, sample count) with: ``sim_steps`` and ``seconds`` per estimate,
    ``rel_error`` (mean over repeats of ``|g - g_ref| / |g_ref|``), ``rel_bias`` (``|mean g - g_ref| / |g_ref|``),
    ``variance`` (trace of the covariance over repeats), ``cosine_exact`` (mean cosine with the exact BPTT
    gradient), ``objective`` (what ``g_ref`` differentiates), ``reference_rel_se`` (the reference's own relative
    standard error) and ``x0_variance`` (trace of the covariance of the reference gradient over draws of the
    minibatch's initial states). Rank-shaped ES has no reference: its error columns are NaN.
    """
    dtype = DTYPES[settings.dtype]
    policy = _copy_policy(policy, dtype)
    rows: list[dict[str, Any]] = []
    labels = [k for k in estimators if not settings.only or k in settings.only]
    for horizon in settings.horizons:
        x0 = system.sample_initial(settings.batch, torch.Generator().manual_seed(seed), dtype)
        exact = _flat(Analytic().estimate(system, policy, x0, horizon, torch.Generator()).grads).detach()
        for label in labels:
            est_settings = estimators[label]
            estimator = make_estimator(est_settings)
            ref = _reference(estimator, system, policy, x0, horizon, seed + 1000, settings)
            common = {"system": system.name, "horizon": horizon, "estimator": label, "method": est_settings.name,
                      "objective": estimator.objective, "exact_norm": float(exact.norm()),
                      "reference_norm": float(ref["grad"].norm()) if ref else float("nan"),
                      "reference_rel_se": ref["rel_se"] if ref else float("nan"),
                      "x0_variance": ref["x0_variance"] if ref else float("nan")}
            ladder = list(settings.samples) if ESTIMATORS[est_settings.name].sample_field else [0]
            for n in ladder:
                cell = est_settings if n == 0 else _with_samples(est_settings, n)
                if cell is None:
                    continue
                cell_estimator = make_estimator(cell)
                repeats = settings.repeats if n else 2  # without a sample count (BPTT): 2 show it is deterministic
                draws, seconds, steps = [], 0.0, 0
                for r in range(repeats):
                    t0 = time.perf_counter()
                    out = cell_estimator.estimate(system, policy, x0, horizon,
                                                  torch.Generator().manual_seed(seed + 7919 * (r + 1)))
                    seconds += time.perf_counter() - t0
                    steps = out.sim_steps
                    draws.append(_flat(out.grads).detach())
                g = torch.stack(draws)  # (R, P)
                mean = g.mean(0)
                row = dict(common, samples=n, repeats=repeats, sim_steps=steps, seconds=seconds / repeats,
                           variance=float(g.var(0, unbiased=True).sum()),
                           grad_norm=float(g.norm(dim=1).mean()),
                           cosine_exact=statistics.fmean(_cos(d, exact) for d in draws))
                if ref is not None:
                    scale = float(ref["grad"].norm())
                    row.update(rel_error=statistics.fmean(float((d - ref["grad"]).norm()) / scale for d in draws),
                               rel_bias=float((mean - ref["grad"]).norm()) / scale,
                               cosine_reference=statistics.fmean(_cos(d, ref["grad"]) for d in draws))
                else:
                    row.update(rel_error=float("nan"), rel_bias=float("nan"), cosine_reference=float("nan"))
                rows.append(row)
            if progress:
                progress(f"study H={horizon} {label}: done")
    return rows


def _copy_policy(policy: nn.Module, dtype: torch.dtype) -> nn.Module:
    return copy.deepcopy(policy).to(dtype)


# ---- training race -------------------------------------------------------------------------------------------------
def evaluation_schedule(iterations: int, count: int) -> set[int]:
    """About ``count`` iterations from 1 to ``iterations``, geometrically spaced, so that fast early progress is
    resolved as well as slow late progress (steps to target are read off these points)."""
    if iterations <= count:
        return set(range(1, iterations + 1))
    ratio = iterations ** (1.0 / (count - 1)) if count > 1 else float(iterations)
    return {min(iterations, math.ceil(ratio ** k)) for k in range(count)} | {iterations}


class _Recorder(Monitor):
    """Held-out cost against simulator steps and compute seconds.

    It evaluates the policy itself after the iterations in ``schedule`` (the trainer evaluates only at the start
    and the end of a race run), on the trainer's own held-out set (same ``eval_seed``, batch and horizon), so the
    numbers are the trainer's. Its evaluations happen outside the per-iteration timing, like the trainer's.
    """

    def __init__(self, schedule: set[int]) -> None:
        self.schedule = schedule
        self.points: list[dict[str, float]] = []
        self.env_steps, self.compute, self.wall, self.iterations = 0.0, 0.0, 0.0, 0

    def start(self, run: RunInfo) -> None:
        s = run.settings
        self.run = run
        self.x_eval = run.system.sample_initial(s.eval_batch, torch.Generator().manual_seed(s.eval_seed),
                                                DTYPES[s.dtype])

    def iteration(self, it: int, stats: dict[str, float]) -> None:
        self.env_steps, self.wall, self.iterations = stats["env_steps"], stats["wall_time_s"], it
        self.compute += stats["iteration_seconds"]
        if it in self.schedule:
            self._record(it, evaluate(self.run.system, self.run.policy, self.x_eval, self.run.settings.eval_steps))

    def evaluation(self, it: int, result: Evaluation) -> None:
        self._record(it, result)

    def _record(self, it: int, result: Evaluation) -> None:
        if self.points and self.points[-1]["iteration"] == it:
            return  # the trainer's own evaluation of an iteration already recorded
        self.points.append({"iteration": it, "env_steps": self.env_steps, "compute_seconds": self.compute,
                            "wall_seconds": self.wall, "heldout_cost": result.mean_cost,
                            "success_rate": result.success_rate})


MonitorFactory = Callable[[], Sequence[Monitor]]  # fresh monitors for each run (a writer per run directory)


@dataclass
class RaceResult:
    """Every evaluation of every run (``curves``), one row per run (``runs``), and the target cost used."""

    curves: list[dict[str, Any]]
    runs: list[dict[str, Any]]
    target: float | None
    target_note: str
    settings: RaceSettings
    entrants: tuple[Entrant, ...]


def _race_settings(entrant: Entrant, budget: str, settings: RaceSettings, iterations: int) -> TrainSettings:
    return dataclasses.replace(entrant.train, iterations=iterations, eval_every=iterations, checkpoint_every=iterations,
                               figure_every=0, diagnose_every=0,
                               max_env_steps=settings.budget_steps if budget == "steps" else 0,
                               max_wall_seconds=settings.budget_seconds if budget == "seconds" else 0.0)


def _record(system: System, policy_settings: PolicySettings, entrant: Entrant, train_settings: TrainSettings,
            seed: int) -> RunRecord:
    """The run record of one race run: the race's system and policy, the entrant's update, optimiser and loop."""
    update = entrant.ppo if entrant.method == "ppo" else entrant.estimator
    return RunRecord(SystemSpec.of(system), policy_settings, entrant.optim, update, train_settings, seed,
                     experiment=f"race entrant {entrant.label}")


def _one_run(record: RunRecord, run_dir: Path, monitors: Sequence[Monitor]) -> str:
    """Train one entrant once, in the one training loop; returns ``"ok"`` or ``"diverged: ..."``."""
    try:
        train_record(record, run_dir, monitors=monitors)
    except NonFiniteError as e:
        return f"diverged: {str(e).split('.')[0]}"
    return "ok"


def run_race(system: System, policy_settings: PolicySettings, entrants: Sequence[Entrant], settings: RaceSettings,
             out_dir: Path, *, monitors: MonitorFactory | None = None,
             progress: Callable[[str], None] | None = None) -> RaceResult:
    """Train every entrant on every seed under each budget; run directories go under ``out_dir/race``.

    The steps race gives every run ``budget_steps`` simulator steps, with the learning-rate schedule spread over
    the iterations that fit. The seconds race (if ``budget_seconds > 0``) gives every run that many seconds of
    the trainer's clock, with the schedule spread over the iterations the steps race's measured speed says fit.
    Held-out evaluations (``settings.evaluations`` per run, geometrically spaced) are not in the compute seconds
    but are on the trainer's clock, equally for every entrant. A run whose cost or gradient becomes non-finite is
    kept, marked diverged, with its curve up to that point.
    """
    entrants = tuple(e for e in entrants if not settings.only or e.label in settings.only)
    if not entrants:
        raise ValueError(f"race.only={list(settings.only)} selects no entrant")
    curves: list[dict[str, Any]] = []
    runs: list[dict[str, Any]] = []
    speed: dict[str, list[float]] = {}  # iterations per compute second, from the steps race
    for budget in settings.budgets:
        for entrant in entrants:
            per_iter = entrant.steps_per_iteration
            if budget == "steps":
                iterations = max(1, math.ceil(settings.budget_steps / per_iter))
            else:
                rate = statistics.median(speed[entrant.label])
                iterations = max(1, math.ceil(1.05 * settings.budget_seconds * rate))
            train_settings = _race_settings(entrant, budget, settings, iterations)
            for seed in settings.seeds:
                run_dir = Path(out_dir) / "race" / budget / entrant.label / f"seed{seed}"
                recorder = _Recorder(evaluation_schedule(iterations, settings.evaluations))
                extra = list(monitors()) if monitors else []
                record = _record(system, policy_settings, entrant, train_settings, seed)
                status = _one_run(record, run_dir, [recorder, *extra])
                if budget == "steps" and recorder.compute > 0:
                    speed.setdefault(entrant.label, []).append(recorder.iterations / recorder.compute)
                speed.setdefault(entrant.label, [])
                for p in recorder.points:
                    curves.append({"system": system.name, "budget": budget, "entrant": entrant.label, "seed": seed,
                                   **p})
                last = recorder.points[-1] if recorder.points else {}
                runs.append({"system": system.name, "budget": budget, "entrant": entrant.label, "seed": seed,
                             "method": entrant.method, "status": status, "iterations": recorder.iterations,
                             "steps_per_iteration": per_iter, "env_steps": recorder.env_steps,
                             "compute_seconds": recorder.compute, "wall_seconds": recorder.wall,
                             "final_cost": last.get("heldout_cost", float("nan")) if status == "ok" else float("nan"),
                             "final_success": last.get("success_rate", float("nan")) if status == "ok" else float("nan"),
                             "initial_cost": recorder.points[0]["heldout_cost"] if recorder.points else float("nan")})
                if progress:
                    progress(f"race {budget} {entrant.label} seed {seed}: {status}, held-out cost "
                             f"{runs[-1]['final_cost']:.4g} after {recorder.env_steps:.3g} steps, "
                             f"{recorder.compute:.1f} s")
            if budget == "steps" and not speed[entrant.label] and "seconds" in settings.budgets:
                speed[entrant.label] = [1.0]  # every run diverged at once; the seconds race still gets a schedule
    target, note = choose_target(runs, settings)
    return RaceResult(curves, runs, target, note, settings, entrants)


def choose_target(runs: Sequence[Mapping[str, Any]], settings: RaceSettings) -> tuple[float | None, str]:
    """The target held-out cost and a sentence saying how it was chosen."""
    if settings.target_cost is not None:
        return float(settings.target_cost), f"given: race.target_cost = {settings.target_cost:.4g}"
    steps = [r for r in runs if r["budget"] == "steps"]
    initial = statistics.median(r["initial_cost"] for r in steps)
    finals: dict[str, list[float]] = {}
    for r in steps:
        if math.isfinite(r["final_cost"]):
            finals.setdefault(r["entrant"], []).append(r["final_cost"])
    if not finals:
        return None, "no target: every run diverged"
    who, why = settings.reference, ""
    if who not in finals or not max(finals[who]) < initial:
        # The reference is missing, diverged everywhere or did not improve: take the target from the best
        # entrant (lowest median final cost) whose every seed improved, and say so.
        why = (f"{who} diverged in every run" if who not in finals else
               f"{who}'s worst final cost ({max(finals[who]):.4g}) is not below the initial {initial:.4g}")
        improved = [k for k in finals if max(finals[k]) < initial]
        if not improved:
            return None, f"no target: {why}, nor is any other entrant's"
        who = min(improved, key=lambda k: statistics.median(finals[k]))
        why = f" ({why}, so the best entrant's is used)"
    final = max(finals[who])  # the worst seed: every seed of that entrant reaches the target by its end
    f = settings.target_fraction
    if final > 0:  # costs spanning decades: interpolate on a log scale
        target, how = initial ** (1 - f) * final ** f, "on a log scale"
    else:
        target, how = initial - f * (initial - final), "linearly (a cost <= 0 has no logarithm)"
    return target, (f"{f:.0%} of the way from the initial held-out cost {initial:.4g} (median over seeds) to "
                    f"{who}'s worst final cost over seeds in the steps race, {final:.4g}, {how}: {target:.4g}{why}")


def _median_with_misses(values: Sequence[float]) -> float:
    """Median where a miss is +inf (so more than half the seeds missing makes the median a miss)."""
    return statistics.median(sorted(values)) if values else float("inf")


def race_summary(result: RaceResult) -> list[dict[str, Any]]:
    """One row per (budget, entrant): final cost and success (median and range over seeds), steps and seconds to
    the target (median over seeds, a seed that never reached it counting as infinite), and their ratios to the
    reference entrant's."""
    rows: list[dict[str, Any]] = []
    target = result.target
    for budget in result.settings.budgets:
        for entrant in result.entrants:
            runs = [r for r in result.runs if r["budget"] == budget and r["entrant"] == entrant.label]
            steps_to, secs_to = [], []
            for r in runs:
                pts = [c for c in result.curves if c["budget"] == budget and c["entrant"] == entrant.label
                       and c["seed"] == r["seed"]]
                hit = next((c for c in pts if target is not None and c["heldout_cost"] <= target), None)
                steps_to.append(hit["env_steps"] if hit else float("inf"))
                secs_to.append(hit["compute_seconds"] if hit else float("inf"))
            finals = [r["final_cost"] for r in runs if math.isfinite(r["final_cost"])]
            success = [r["final_success"] for r in runs if math.isfinite(r["final_success"])]
            rows.append({
                "system": runs[0]["system"] if runs else "", "budget": budget, "entrant": entrant.label,
                "description": entrant.description, "seeds": len(runs),
                "diverged": sum(r["status"] != "ok" for r in runs),
                "steps_per_iteration": entrant.steps_per_iteration,
                "env_steps": statistics.median(r["env_steps"] for r in runs) if runs else float("nan"),
                "compute_seconds": statistics.median(r["compute_seconds"] for r in runs) if runs else float("nan"),
                "final_cost_median": statistics.median(finals) if finals else float("nan"),
                "final_cost_min": min(finals) if finals else float("nan"),
                "final_cost_max": max(finals) if finals else float("nan"),
                "success_median": statistics.median(success) if success else float("nan"),
                "reached": sum(math.isfinite(s) for s in steps_to),
                "steps_to_target": _median_with_misses(steps_to),
                "seconds_to_target": _median_with_misses(secs_to),
            })
    for budget in result.settings.budgets:
        ref = next((r for r in rows if r["budget"] == budget and r["entrant"] == result.settings.reference), None)
        for r in rows:
            if r["budget"] != budget:
                continue
            for key in ("steps", "seconds"):
                mine, theirs = r[f"{key}_to_target"], ref[f"{key}_to_target"] if ref else float("inf")
                r[f"{key}_ratio"] = mine / theirs if math.isfinite(mine) and math.isfinite(theirs) else float("nan")
    return rows


__all__ = ["StudySettings", "RaceSettings", "Entrant", "RaceResult", "gradient_study", "run_race", "race_summary",
           "choose_target"]
