"""The analytic-policy-gradient training loop.

Each iteration draws a fresh minibatch of initial states, asks the gradient estimator for ``dJ/dtheta``, clips
the global gradient norm and steps the optimiser. Every ``eval_every`` iterations the policy is evaluated on a
fixed held-out set of initial states (drawn from a separate seed). Logging reaches the loop only through
:class:`Monitor` callbacks; the loop itself prints nothing.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import time
import warnings
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import torch
import yaml
from torch import Tensor

from apg import distributed
from apg.checkpoint import (CHECKPOINT_NAME, CheckpointError, atomic_write_text, config_digest, load_checkpoint,
                            save_checkpoint)
from apg.distributed import Shard
from apg.diagnostics import GradientProfile, gradient_profile
from apg.ensemble import ParameterRanges
from apg.estimators import GradientEstimator
from apg.optim import OptimSettings, learning_rate, make_optimiser
from apg.policies import Policy, PolicySettings, make_policy
from apg.rollout import Evaluation, RolloutOptions, evaluate
from envs.base import System, check_record

log = logging.getLogger(__name__)

DTYPES = {"float32": torch.float32, "float64": torch.float64}
METRICS_NAME = "metrics.json"
CONFIG_NAME = "config.yaml"
# Config keys that may change between a run and its resumption without changing its result (beyond rounding).
RUNTIME_KEYS = ("resume", "progress", "threads", "train.recompute_every", "train.compile_step", "train.diagnose_every",
                "train.diagnose_batch")


@dataclass(frozen=True)
class TrainSettings:
    """The loop's settings; the ``train`` block of the config fills this record."""

    iterations: int = 300
    batch_size: int = 256  # initial states per iteration
    horizon: int = 100  # steps per rollout
    grad_clip: float = 1.0  # largest global gradient norm; 0 turns clipping off
    eval_every: int = 25  # iterations between held-out evaluations (and at the start and the end)
    eval_batch: int = 512  # held-out initial states
    eval_seed: int = 10_000  # seed of the held-out set: never shared with the training stream
    eval_horizon: int = 0  # 0: same as horizon
    checkpoint_every: int = 25  # iterations between checkpoints (and at the end)
    figure_every: int = 100  # iterations between trajectory figures in TensorBoard; 0 turns them off
    figure_trajectories: int = 8
    dtype: str = "float32"  # float32 | float64
    max_env_steps: int = 0  # stop once this many simulator steps are spent (0: no limit); for equal-budget races
    max_wall_seconds: float = 0.0  # stop after this much training time (0: no limit)
    recompute_every: int = 0  # steps per activation-checkpointing window (0: off): saves memory, same gradient; for
    # truncated BPTT, which changes the gradient, see estimator.window
    compile_step: bool = False  # torch.compile the closed-loop step of the training rollout (compiles on first use)
    horizon_start: int = 0  # horizon schedule: start at this many steps, grow linearly to horizon (0: fixed horizon)
    continuation_param: str = ""  # a positive system parameter to anneal, e.g. contact_smoothing (empty: none)
    continuation_start: float = 0.0  # its value at iteration 0, moving geometrically to the configured value
    ramp_fraction: float = 0.5  # share of the iterations over which horizon_start and continuation_start ramp
    diagnose_every: int = 100  # iterations between per-time-step gradient diagnostics (apg.diagnostics; 0: off)
    diagnose_batch: int = 16  # initial states the diagnostics roll out

    def __post_init__(self) -> None:
        if self.dtype not in DTYPES:
            raise ValueError(f"dtype must be one of {', '.join(DTYPES)}; got {self.dtype!r}")
        check_record(self, positive=("iterations", "batch_size", "horizon", "eval_every", "eval_batch",
                                     "checkpoint_every", "figure_trajectories"),
                     nonnegative=("grad_clip", "eval_horizon", "figure_every", "max_env_steps", "max_wall_seconds",
                                  "recompute_every", "horizon_start", "continuation_start", "diagnose_every"))
        check_record(self, positive=("diagnose_batch",))
        if self.horizon_start > self.horizon:
            raise ValueError(f"horizon_start ({self.horizon_start}) must not exceed horizon ({self.horizon})")
        if not 0.0 < self.ramp_fraction <= 1.0:
            raise ValueError(f"ramp_fraction must be in (0, 1], got {self.ramp_fraction}")
        if bool(self.continuation_param) != (self.continuation_start > 0):
            raise ValueError("continuation_param and continuation_start go together: name the system parameter "
                             "(e.g. continuation_param=contact_smoothing) and its value at the start (> 0), or "
                             f"neither; got {self.continuation_param!r} and {self.continuation_start}")

    @property
    def eval_steps(self) -> int:
        return self.eval_horizon or self.horizon

    def _progress(self, it: int) -> float:
        """How far the ramps have come at iteration ``it`` (0 to 1)."""
        return min(1.0, it / max(1.0, self.ramp_fraction * self.iterations))

    def horizon_at(self, it: int) -> int:
        """The training horizon at iteration ``it``: linear from ``horizon_start`` to ``horizon``."""
        if not self.horizon_start:
            return self.horizon
        return round(self.horizon_start + (self.horizon - self.horizon_start) * self._progress(it))

    @property
    def mean_horizon(self) -> float:
        """The average training horizon over the run (what a step budget buys per iteration)."""
        if not self.horizon_start:
            return float(self.horizon)
        r = self.ramp_fraction
        return (1 - r) * self.horizon + r * (self.horizon_start + self.horizon) / 2

    def continuation_at(self, it: int, final: float) -> float:
        """The annealed parameter at iteration ``it``: geometric from ``continuation_start`` to ``final``."""
        return self.continuation_start * (final / self.continuation_start) ** self._progress(it)


class RunExistsError(RuntimeError):
    """The run directory already holds a run and resuming was not asked for (or does not match)."""


class NonFiniteError(RuntimeError):
    """A rollout or its gradient produced NaN or Inf."""


class Monitor:
    """Callbacks the loop calls; subclasses override what they need. All methods default to doing nothing."""

    def start(self, run: "RunInfo") -> None: ...

    def iteration(self, it: int, stats: dict[str, float]) -> None: ...

    def evaluation(self, it: int, result: Evaluation) -> None: ...

    def diagnostics(self, it: int, profile: "GradientProfile") -> None: ...

    def end(self, metrics: dict[str, Any]) -> None: ...

    def close(self) -> None: ...


@dataclass
class RunInfo:
    """What monitors may need to know about the run."""

    system: System
    policy: Policy
    settings: TrainSettings
    run_dir: Path
    start_iteration: int
    config: dict[str, Any]


@dataclass
class TrainResult:
    policy: Policy
    metrics: dict[str, Any]
    run_dir: Path


def _first_nonfinite_step(states: Tensor) -> int | None:
    bad = ~torch.isfinite(states).reshape(states.shape[0], -1).all(dim=1)  # (T+1,)
    idx = torch.nonzero(bad)
    return int(idx[0]) if len(idx) else None


def _check_resumable(saved: dict[str, Any], config: dict[str, Any], path: Path) -> None:
    def flat(d: dict[str, Any], prefix: str = "") -> dict[str, Any]:
        out: dict[str, Any] = {}
        for k, v in d.items():
            key = f"{prefix}{k}"
            if isinstance(v, dict):
                out.update(flat(v, key + "."))
            elif key not in RUNTIME_KEYS:
                out[key] = v
        return out

    a, b = flat(saved), flat(config)
    changed = sorted(k for k in set(a) | set(b) if a.get(k) != b.get(k))
    if changed == ["train.iterations"]:
        warnings.warn("train.iterations differs from the saved run; the learning-rate schedule changes from here on")
    elif changed:
        shown = ", ".join(f"{k} ({a.get(k)!r} -> {b.get(k)!r})" for k in changed[:8])
        raise RunExistsError(f"cannot resume {path}: the config differs from the saved run in {shown}. Resume with "
                             f"the original settings, or start a new run in another directory")


def _check_continuation(system: System, settings: TrainSettings, ensemble: ParameterRanges | None) -> float | None:
    """The configured (final) value of the annealed parameter, after checking it can be annealed."""
    name = settings.continuation_param
    if not name:
        return None
    fields = {f.name for f in dataclasses.fields(system.params)}
    if name not in fields:
        raise ValueError(f"train.continuation_param={name!r} is not a parameter of {system.name}; its parameters "
                         f"are {', '.join(sorted(fields))}")
    final = getattr(system.params, name)
    if isinstance(final, Tensor) or not isinstance(final, (int, float)) or final <= 0:
        raise ValueError(f"train.continuation_param={name!r} must be a positive number in {system.name}'s "
                         f"parameters (got {final!r})")
    if ensemble and name in {r[0] for r in ensemble.ranges}:
        raise ValueError(f"train.continuation_param={name!r} is also drawn by system.ensemble; anneal another "
                         f"parameter or remove it from the ensemble")
    return float(final)


def train(system: System, policy_settings: PolicySettings, optim_settings: OptimSettings,
          estimator: GradientEstimator, settings: TrainSettings, *, seed: int, run_dir: Path,
          resume: bool = False, config: dict[str, Any] | None = None,
          monitors: Sequence[Monitor] = (), ensemble: ParameterRanges | None = None,
          shard: Shard | None = None) -> TrainResult:
    """Train a policy for ``system`` and write checkpoints and ``metrics.json`` into ``run_dir``.

    Args:
        config: the plain run config, saved in every checkpoint and compared on resume.
        resume: continue from ``run_dir/checkpoint.pt``; without it an existing checkpoint is an error.
        ensemble: train over models drawn per minibatch element from these parameter ranges; held-out
            evaluation stays on the nominal ``system``.
        shard: this process's place in data-parallel training (:mod:`apg.distributed`); every rank calls
            ``train`` with the same arguments. Only rank 0 reads and writes ``run_dir`` and calls ``monitors``;
            every rank returns rank 0's metrics.

    Raises:
        RunExistsError: ``run_dir`` holds a run and ``resume`` is false, or the saved run's config differs.
        NonFiniteError: NaN/Inf in the cost or gradient; the last good checkpoint is left in place.
    """
    if ensemble:
        ensemble.check(system)
    shard = shard or distributed.SINGLE
    monitors = tuple(monitors) if shard.main else ()
    run_dir = Path(run_dir)
    ckpt_path = run_dir / CHECKPOINT_NAME
    config = dict(config or {})
    dtype = DTYPES[settings.dtype]
    options = RolloutOptions(settings.recompute_every, settings.compile_step)
    if options != RolloutOptions():
        estimator = estimator.with_rollout_options(options)
    if shard.parallel and estimator.stateful:
        raise ValueError(f"estimator {estimator.name} learns across iterations (its critic would differ between "
                         f"processes); it does not support data-parallel training. Run it in one process")
    annealed = _check_continuation(system, settings, ensemble)

    def open_run() -> dict[str, Any] | None:
        run_dir.mkdir(parents=True, exist_ok=True)
        saved = None
        if ckpt_path.exists():
            if not resume:
                raise RunExistsError(f"{run_dir} already holds a run (checkpoint.pt); pass resume=true to continue "
                                     f"it, or choose another directory (hydra.run.dir=...). Nothing was changed.")
            saved = load_checkpoint(ckpt_path)
            if saved["system"] != system.name:
                raise RunExistsError(f"cannot resume {run_dir}: it trained {saved['system']!r}, not {system.name!r}")
            _check_resumable(saved.get("config", {}), config, run_dir)
        elif resume:
            log.info("resume=true but %s holds no checkpoint; starting a new run", run_dir)
        atomic_write_text(run_dir / CONFIG_NAME, yaml.safe_dump(config, sort_keys=False))
        return saved

    if shard.parallel:  # rank 0 opens the run; the others get its checkpoint, or its refusal
        try:
            opened: tuple[str, Any] = ("ok", open_run()) if shard.main else ("ok", None)
        except Exception as e:  # noqa: BLE001 - every rank must raise it, not wait for rank 0 forever
            opened = ("error", e if isinstance(e, (RunExistsError, CheckpointError, ValueError, OSError))
                      else RuntimeError(f"rank 0 could not open {run_dir}: {type(e).__name__}: {e}"))
        opened = distributed.share(opened, shard)
        if opened[0] == "error":
            raise opened[1]
        saved = opened[1]
    else:
        saved = open_run()
    torch.manual_seed(seed)
    policy = make_policy(policy_settings, system, torch.Generator().manual_seed(seed + 1), dtype=dtype)
    optimiser = make_optimiser(optim_settings, policy.parameters())
    train_gen = torch.Generator().manual_seed(seed)
    estimator_gen = torch.Generator().manual_seed(seed + 2)
    x_eval = system.sample_initial(settings.eval_batch, torch.Generator().manual_seed(settings.eval_seed), dtype)

    start, env_steps, wall_before, last_eval = 0, 0, 0.0, None
    if saved is not None:
        policy.load_state_dict(saved["policy"])
        optimiser.load_state_dict(saved["optimiser"])
        train_gen.set_state(saved["generator"])
        estimator_gen.set_state(saved["estimator_generator"])
        torch.set_rng_state(saved["torch_rng"])
        start, env_steps, wall_before = saved["iteration"], saved["env_steps"], saved["wall_time_s"]
        last_eval = saved.get("last_eval")
        estimator.load_state_dict(saved.get("estimator_state") or {})
        log.info("resuming %s at iteration %d", run_dir, start)
    distributed.sync_module(policy, shard)

    run = RunInfo(system, policy, settings, run_dir, start, config)
    for m in monitors:
        m.start(run)

    t_start = time.perf_counter()

    def elapsed() -> float:
        return wall_before + time.perf_counter() - t_start

    def checkpoint(iteration: int) -> None:
        if not shard.main:
            return
        save_checkpoint(ckpt_path, {
            "iteration": iteration, "policy": policy.state_dict(), "policy_settings": asdict(policy_settings),
            "optimiser": optimiser.state_dict(), "generator": train_gen.get_state(),
            "estimator_generator": estimator_gen.get_state(), "torch_rng": torch.get_rng_state(),
            "env_steps": env_steps, "wall_time_s": elapsed(), "system": system.name, "config": config,
            "config_digest": config_digest(config), "last_eval": last_eval, "estimator_state": estimator.state_dict(),
        })

    def run_eval(iteration: int) -> None:
        nonlocal last_eval
        if not shard.main:
            return
        result = evaluate(system, policy, x_eval, settings.eval_steps)
        last_eval = {"iteration": iteration, "eval_cost": result.mean_cost, "success_rate": result.success_rate,
                     "env_steps": env_steps, "wall_time_s": elapsed()}
        for m in monitors:
            m.evaluation(iteration, result)

    def budget_spent() -> bool:
        spent = bool((settings.max_env_steps and env_steps >= settings.max_env_steps)
                     or (settings.max_wall_seconds and elapsed() >= settings.max_wall_seconds))
        # Clocks differ between ranks: they must agree to stop together (env_steps is the same everywhere).
        return distributed.any_rank(spent, shard) if settings.max_wall_seconds else spent

    params = list(policy.parameters())
    it = start
    try:
        if start == 0:
            run_eval(0)
        stop = budget_spent()
        while it < settings.iterations and not stop:
            horizon = settings.horizon_at(it)
            train_system = system
            if annealed is not None:
                value = settings.continuation_at(it, annealed)
                train_system = system.replace(params=dataclasses.replace(
                    system.params, **{settings.continuation_param: value}))
            # Every rank draws the whole minibatch and keeps its share (apg.distributed).
            x0 = system.sample_initial(settings.batch_size, train_gen, dtype)
            if settings.diagnose_every and it % settings.diagnose_every == 0 and monitors:
                profile = gradient_profile(train_system, policy, x0[: settings.diagnose_batch], horizon)
                for m in monitors:
                    m.diagnostics(it, profile)
            t0 = time.perf_counter()
            lr = learning_rate(optim_settings, it, settings.iterations)
            for group in optimiser.param_groups:
                group["lr"] = lr
            models = ensemble.sample(train_system, settings.batch_size, train_gen, dtype) if ensemble else train_system
            x0, models = shard.take(x0), shard.take_models(models, settings.batch_size)
            est = estimator.estimate(models, policy, x0, horizon, estimator_gen)
            if shard.parallel:
                grads, loss, sim_steps = distributed.reduce_gradient(est.grads, est.loss, est.sim_steps, x0.shape[0],
                                                                     settings.batch_size, shard)
                est = dataclasses.replace(est, grads=grads, loss=loss, sim_steps=sim_steps)
            grad_norm = torch.linalg.vector_norm(torch.stack([torch.linalg.vector_norm(g) for g in est.grads]))
            if not (torch.isfinite(est.loss) and torch.isfinite(grad_norm)):
                where = ""
                if est.trajectory is not None:
                    step = _first_nonfinite_step(est.trajectory.states)
                    if step is not None:
                        where = f" The state first became non-finite at step {step} of {horizon}."
                raise NonFiniteError(
                    f"non-finite {'cost' if not torch.isfinite(est.loss) else 'gradient'} at iteration {it}.{where} "
                    f"Likely causes: a learning rate too high for this system (optim.lr={optim_settings.lr}), a time "
                    f"step too large for the dynamics (system.dt={system.dt}, integrator={system.integrator}), or "
                    f"gradients exploding over a long horizon ({horizon} steps this iteration; try train.grad_clip, a "
                    f"shorter horizon, truncated windows estimator.window=<steps>, or a horizon schedule "
                    f"train.horizon_start=<steps>). The last good checkpoint is kept: {ckpt_path if ckpt_path.exists() else 'none yet'}.")
            for p, g in zip(params, est.grads):
                p.grad = g
            if settings.grad_clip > 0:
                torch.nn.utils.clip_grad_norm_(params, settings.grad_clip)
            optimiser.step()
            if policy.settings.normalise == "running" and est.trajectory is not None:
                policy.normaliser.update(system.observe(distributed.gather_batch(est.trajectory.states, 1, shard)))
            env_steps += est.sim_steps
            it += 1
            dt_iter = time.perf_counter() - t0
            stats = {"cost": float(est.loss), "grad_norm": float(grad_norm), "learning_rate": lr,
                     "iteration_seconds": dt_iter, "sim_steps_per_second": est.sim_steps / max(dt_iter, 1e-9),
                     "env_steps": float(env_steps), "wall_time_s": elapsed(), "horizon": float(horizon)}
            if annealed is not None:
                stats["continuation"] = value
            for m in monitors:
                m.iteration(it, stats)
            stop = budget_spent()
            last = it == settings.iterations or stop
            if it % settings.eval_every == 0 or last:
                run_eval(it)
            if it % settings.checkpoint_every == 0 or last:
                checkpoint(it)
    except KeyboardInterrupt:
        # The policy is consistent after every completed iteration: save it so nothing is lost.
        checkpoint(it)
        if shard.main:
            log.warning("interrupted at iteration %d; checkpoint saved to %s (continue with resume=true)", it,
                        ckpt_path)
        for m in monitors:
            m.close()
        raise
    except BaseException:
        for m in monitors:
            m.close()
        raise

    metrics: dict[str, Any] | None = None
    if shard.main:
        if last_eval is None or last_eval["iteration"] != it:
            run_eval(it)
        assert last_eval is not None
        metrics = {
            "system": system.name, "eval_cost": last_eval["eval_cost"], "success_rate": last_eval["success_rate"],
            "env_steps": env_steps, "wall_time_s": round(elapsed(), 3), "iterations": it, "seed": seed,
            "success_criterion": system.success_criterion, "eval_batch": settings.eval_batch,
            "eval_seed": settings.eval_seed, "config_digest": config_digest(config), "experiment": config.get("experiment"),
        }
        if shard.parallel:
            metrics["processes"] = shard.world_size
        atomic_write_text(run_dir / METRICS_NAME, json.dumps(metrics, indent=2) + "\n")
    metrics = distributed.share(metrics, shard)
    for m in monitors:
        m.end(metrics)
        m.close()
    return TrainResult(policy, metrics, run_dir)


def load_policy(path: Path, system: System | None = None) -> tuple[Policy, dict[str, Any]]:
    """Rebuild the trained policy from a run directory or checkpoint; returns it with the checkpoint."""
    state = load_checkpoint(Path(path))
    from envs import build

    if system is None:
        cfg = state.get("config", {}).get("system", {})
        system = build(state["system"], params=cfg.get("params"), task=cfg.get("task"), dt=cfg.get("dt"),
                      integrator=cfg.get("integrator", "rk4"))
    settings = PolicySettings(**{k: tuple(v) if isinstance(v, list) else v for k, v in state["policy_settings"].items()})
    policy = Policy(settings, system.obs_dim, system.action_low, system.action_high)
    dtype = next(iter(state["policy"].values())).dtype
    policy = policy.to(dtype)
    try:
        policy.load_state_dict(state["policy"])
    except RuntimeError as e:
        raise ValueError(f"checkpoint {path} does not match system {system.name!r}: {e}") from None
    return policy, state


__all__: Iterable[str] = ["TrainSettings", "train", "Monitor", "RunInfo", "TrainResult", "RunExistsError",
                          "NonFiniteError", "load_policy"]
