"""The training loop: one loop for every method, around one run record.

Each iteration draws a fresh minibatch of initial states (and, for a model ensemble, a model per element) and
hands it to the run's :class:`~apg.updates.Update` (a gradient estimator driving an optimiser, or PPO), which
changes the policy. The loop owns what every method shares: the run directory and its record, the held-out
evaluation (a fixed set of initial states from a separate seed, every ``eval_every`` iterations and at both
ends), the simulator-step and wall-clock budgets, the learning-rate schedule, the horizon schedule and parameter
continuation, gradient diagnostics, checkpoints and ``metrics.json``. Logging reaches the loop only through
:class:`Monitor` callbacks; the loop itself prints nothing.
"""

from __future__ import annotations

import copy
import dataclasses
import json
import logging
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import torch

from apg import distributed
from apg.checkpoint import CHECKPOINT_NAME, CheckpointError, atomic_write_text, load_checkpoint, save_checkpoint
from apg.diagnostics import GradientProfile, gradient_profile
from apg.distributed import Shard
from apg.ensemble import ParameterRanges
from apg.estimators import EstimatorSettings, GradientEstimator
from apg.optim import OptimSettings, learning_rate
from apg.policies import Policy, PolicySettings, make_policy
from apg.rollout import Evaluation, evaluate
from apg.runs import (CONFIG_NAME, DTYPES, METRICS_NAME, RunExistsError, RunRecord, SystemSpec, TrainSettings,
                      record_yaml)
from apg.updates import NonFiniteError, PPOSettings, Update, make_update
from envs.base import System

log = logging.getLogger(__name__)


class Monitor:
    """Callbacks the loop calls; subclasses override what they need. All methods default to doing nothing."""

    def start(self, run: "RunInfo") -> None: ...

    def iteration(self, it: int, stats: dict[str, float]) -> None: ...

    def evaluation(self, it: int, result: Evaluation) -> None: ...

    def diagnostics(self, it: int, profile: GradientProfile) -> None: ...

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
    record: RunRecord


@dataclass
class TrainResult:
    policy: Policy
    metrics: dict[str, Any]
    run_dir: Path
    record: RunRecord


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
    if isinstance(final, torch.Tensor) or not isinstance(final, (int, float)) or final <= 0:
        raise ValueError(f"train.continuation_param={name!r} must be a positive number in {system.name}'s "
                         f"parameters (got {final!r})")
    if ensemble and name in {r[0] for r in ensemble.ranges}:
        raise ValueError(f"train.continuation_param={name!r} is also drawn by system.ensemble; anneal another "
                         f"parameter or remove it from the ensemble")
    return float(final)


LOCK_NAME = ".apg-run.lock"


class _Claim:
    """An exclusive claim on a run directory for as long as a run writes to it (an advisory ``flock`` on a lock
    file: the kernel drops it when the process ends, however it ends, so a crash leaves no stale claim)."""

    def __init__(self, run_dir: Path) -> None:
        import fcntl

        run_dir.mkdir(parents=True, exist_ok=True)
        self.file = open(run_dir / LOCK_NAME, "a")  # noqa: SIM115 - held open until release()
        try:
            fcntl.flock(self.file.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self.file.close()
            raise RunExistsError(f"another apg run is writing to {run_dir} right now; wait for it to finish, or "
                                 f"choose another directory (hydra.run.dir=...). Nothing was changed.") from None

    def release(self) -> None:
        self.file.close()


def _run_files(run_dir: Path) -> list[str]:
    """The files in ``run_dir`` that mean a run is there (any of them, not only a checkpoint)."""
    names = [n for n in (CHECKPOINT_NAME, METRICS_NAME, CONFIG_NAME) if (run_dir / n).exists()]
    return names + sorted(p.name for p in run_dir.glob("events.out.tfevents.*"))[:1]


def _open_run(run_dir: Path, record: RunRecord, resume: bool) -> dict[str, Any] | None:
    """Create or reopen ``run_dir``; returns the checkpoint to resume from, if any, after checking its record."""
    ckpt_path = run_dir / CHECKPOINT_NAME
    run_dir.mkdir(parents=True, exist_ok=True)
    saved = None
    found = _run_files(run_dir)
    if found and not ckpt_path.exists():
        raise RunExistsError(f"{run_dir} already holds a run ({', '.join(found)}) without a checkpoint to resume "
                             f"from; choose another directory (hydra.run.dir=...). Nothing was changed.")
    if ckpt_path.exists():
        if not resume:
            raise RunExistsError(f"{run_dir} already holds a run (checkpoint.pt); pass resume=true to continue "
                                 f"it, or choose another directory (hydra.run.dir=...). Nothing was changed.")
        saved = load_checkpoint(ckpt_path)
        try:
            old = RunRecord.from_dict(saved["record"], f"{ckpt_path}: run record")
        except ValueError as e:
            raise CheckpointError(str(e)) from None
        changed = old.differences(record)
        if [k for k, _, _ in changed] == ["train.iterations"]:
            warnings.warn("train.iterations differs from the saved run; the learning-rate schedule changes from here on")
        elif changed:
            shown = ", ".join(f"{k} ({a!r} -> {b!r})" for k, a, b in changed[:8])
            more = f" and {len(changed) - 8} more" if len(changed) > 8 else ""
            raise RunExistsError(f"cannot resume {run_dir}: the settings differ from the saved run's in {shown}{more}. "
                                 f"Resume with the original settings, or start a new run in another directory")
    elif resume:
        log.info("resume=true but %s holds no checkpoint; starting a new run", run_dir)
    atomic_write_text(run_dir / CONFIG_NAME, record_yaml(record))
    return saved


def train(system: System, policy_settings: PolicySettings, optim_settings: OptimSettings,
          method: Update | GradientEstimator | EstimatorSettings | PPOSettings, settings: TrainSettings, *,
          seed: int, run_dir: Path | str, resume: bool = False, monitors: Sequence[Monitor] = (),
          ensemble: ParameterRanges | None = None, shard: Shard | None = None,
          experiment: str | None = None) -> TrainResult:
    """Train a policy for ``system`` and write checkpoints, ``config.yaml`` and ``metrics.json`` into ``run_dir``.

    The run's record (:class:`~apg.runs.RunRecord`) is taken from these arguments as they are, the system's own
    parameter values included, so every later loader rebuilds exactly this plant.

    Args:
        method: a gradient estimator (or its settings), PPO settings, or any :class:`~apg.updates.Update`.
        resume: continue from ``run_dir/checkpoint.pt``; without it an existing checkpoint is an error.
        ensemble: train over models drawn per minibatch element from these parameter ranges; held-out
            evaluation stays on the nominal ``system``.
        shard: this process's place in data-parallel training (:mod:`apg.distributed`); every rank calls
            ``train`` with the same arguments. Only rank 0 reads and writes ``run_dir`` and calls ``monitors``;
            every rank returns rank 0's metrics.
        experiment: the preset the settings came from, recorded with the run.

    Raises:
        RunExistsError: ``run_dir`` holds a run and ``resume`` is false, or the saved run's settings differ.
        NonFiniteError: NaN/Inf in the cost or gradient; the last good checkpoint is left in place.
        ValueError: a setting the method or the system cannot take.
    """
    update = make_update(method)
    if update.settings is None:
        raise ValueError(f"{type(method).__name__} has no settings record to describe the run; give the estimator "
                         f"an EstimatorSettings (its .settings)")
    record = RunRecord(system=SystemSpec.of(system, ensemble), policy=policy_settings, optim=optim_settings,
                       update=update.settings, train=settings, seed=int(seed), experiment=experiment)
    return _loop(record, system, ensemble or ParameterRanges(), update, Path(run_dir), resume, monitors, shard)


def train_record(record: RunRecord, run_dir: Path | str, *, resume: bool = False, monitors: Sequence[Monitor] = (),
                 shard: Shard | None = None) -> TrainResult:
    """:func:`train` for a run described by its record alone (what ``apg-train`` and the race call)."""
    try:
        system = record.system.build()
        ensemble = record.system.ranges
    except ValueError as e:
        raise ValueError(f"system: {e}") from None
    return _loop(record, system, ensemble, make_update(record.update), Path(run_dir), resume, monitors, shard)


def _loop(record: RunRecord, system: System, ensemble: ParameterRanges, update: Update, run_dir: Path,
          resume: bool, monitors: Sequence[Monitor], shard: Shard | None) -> TrainResult:
    """Claim ``run_dir`` (rank 0) for the whole run, then train."""
    claim = _Claim(run_dir) if (shard or distributed.SINGLE).main else None
    try:
        return _claimed_loop(record, system, ensemble, update, run_dir, resume, monitors, shard)
    finally:
        if claim is not None:
            claim.release()


def _claimed_loop(record: RunRecord, system: System, ensemble: ParameterRanges, update: Update, run_dir: Path,
                  resume: bool, monitors: Sequence[Monitor], shard: Shard | None) -> TrainResult:
    settings, seed = record.train, record.seed
    if ensemble:
        ensemble.check(system)
    shard = shard or distributed.SINGLE
    monitors = tuple(monitors) if shard.main else ()
    ckpt_path = run_dir / CHECKPOINT_NAME
    dtype = DTYPES[settings.dtype]
    update.check(settings, shard)
    annealed = _check_continuation(system, settings, ensemble)

    if shard.parallel:  # rank 0 opens the run; the others get its checkpoint, or its refusal
        try:
            opened: tuple[str, Any] = ("ok", _open_run(run_dir, record, resume)) if shard.main else ("ok", None)
        except Exception as e:  # noqa: BLE001 - every rank must raise it, not wait for rank 0 forever
            opened = ("error", e if isinstance(e, (RunExistsError, CheckpointError, ValueError, OSError))
                      else RuntimeError(f"rank 0 could not open {run_dir}: {type(e).__name__}: {e}"))
        opened = distributed.share(opened, shard)
        if opened[0] == "error":
            raise opened[1]
        saved = opened[1]
    else:
        saved = _open_run(run_dir, record, resume)
    torch.manual_seed(seed)
    policy = make_policy(record.policy, system, torch.Generator().manual_seed(seed + 1), dtype=dtype)
    update.prepare(system, policy, record.optim, settings, seed, shard)
    train_gen = torch.Generator().manual_seed(seed)
    x_eval = system.sample_initial(settings.eval_batch, torch.Generator().manual_seed(settings.eval_seed), dtype)

    start, env_steps, wall_before, last_eval = 0, 0, 0.0, None
    if saved is not None:
        policy.load_state_dict(saved["policy"])
        update.load_state_dict(saved["update"])
        train_gen.set_state(saved["generator"])
        torch.set_rng_state(saved["torch_rng"])
        start, env_steps, wall_before = saved["iteration"], saved["env_steps"], saved["wall_time_s"]
        last_eval = saved.get("last_eval")
        log.info("resuming %s at iteration %d", run_dir, start)
    distributed.sync_module(policy, shard)

    run = RunInfo(system, policy, settings, run_dir, start, record)
    for m in monitors:
        m.start(run)
    t_start = time.perf_counter()

    def elapsed() -> float:
        return wall_before + time.perf_counter() - t_start

    record_dict = record.to_dict()  # constant for the run; never mutated

    def snapshot(iteration: int) -> dict[str, Any]:
        """Everything a resume needs, copied: the state after ``iteration`` completed iterations."""
        state = copy.deepcopy({
            "iteration": iteration, "policy": policy.state_dict(), "update": update.state_dict(),
            "generator": train_gen.get_state(), "torch_rng": torch.get_rng_state(), "env_steps": env_steps,
            "wall_time_s": elapsed(), "last_eval": last_eval})
        return {"record": record_dict, **state}

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

    it = start
    consistent: dict[str, Any] | None = None  # the state after the last completed iteration, for an interrupt
    try:
        if start == 0:
            run_eval(0)
        if shard.main:
            consistent = snapshot(it)
            if start == 0:  # from the first moment a run directory holds a run, it can be resumed
                save_checkpoint(ckpt_path, consistent)
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
            if settings.diagnose_every and it % settings.diagnose_every == 0 and monitors and update.differentiable:
                profile = gradient_profile(train_system, policy, x0[: settings.diagnose_batch], horizon)
                for m in monitors:
                    m.diagnostics(it, profile)
            t0 = time.perf_counter()
            lr = learning_rate(record.optim, it, settings.iterations)
            update.set_learning_rate(lr)
            models = ensemble.sample(train_system, settings.batch_size, train_gen, dtype) if ensemble else train_system
            x0, models = shard.take(x0), shard.take_models(models, settings.batch_size)
            try:
                step = update.step(models, policy, x0, horizon, train_gen)
            except NonFiniteError as e:
                raise NonFiniteError(
                    f"iteration {it}: {e} The last good checkpoint is kept: "
                    f"{ckpt_path if ckpt_path.exists() else 'none yet'}.") from None
            env_steps += step.sim_steps
            it += 1
            if shard.main:
                consistent = snapshot(it)
            dt_iter = time.perf_counter() - t0
            stats = {"cost": step.loss, "grad_norm": step.grad_norm, "learning_rate": lr,
                     "iteration_seconds": dt_iter, "sim_steps_per_second": step.sim_steps / max(dt_iter, 1e-9),
                     "env_steps": float(env_steps), "wall_time_s": elapsed(), "horizon": float(horizon),
                     **step.stats}
            if annealed is not None:
                stats["continuation"] = value
            for m in monitors:
                m.iteration(it, stats)
            stop = budget_spent()
            last = it == settings.iterations or stop
            if it % settings.eval_every == 0 or last:
                run_eval(it)
            if (it % settings.checkpoint_every == 0 or last) and shard.main:
                save_checkpoint(ckpt_path, snapshot(it))
    except KeyboardInterrupt:
        # Save the state at the last completed iteration (never a half-done one), so a resume continues exactly.
        if shard.main and consistent is not None:
            save_checkpoint(ckpt_path, consistent)
            log.warning("interrupted; the state after iteration %d (the last one completed) is saved to %s "
                        "(continue with resume=true)", consistent["iteration"], ckpt_path)
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
        assert last_eval is not None  # run_eval just set it
        metrics = {
            "system": system.name, "method": record.method, "eval_cost": last_eval["eval_cost"],
            "success_rate": last_eval["success_rate"], "env_steps": env_steps, "wall_time_s": round(elapsed(), 3),
            "iterations": it, "seed": seed, "success_criterion": system.success_criterion,
            "eval_batch": settings.eval_batch, "eval_seed": settings.eval_seed, "record_digest": record.digest(),
            "experiment": record.experiment, "code_version": record.code_version,
        }
        if shard.parallel:
            metrics["processes"] = shard.world_size
        atomic_write_text(run_dir / METRICS_NAME, json.dumps(metrics, indent=2) + "\n")
    metrics = distributed.share(metrics, shard)
    for m in monitors:
        m.end(metrics)
        m.close()
    return TrainResult(policy, metrics, run_dir, record)


__all__ = ["TrainSettings", "train", "train_record", "Monitor", "RunInfo", "TrainResult", "RunExistsError",
           "NonFiniteError"]
