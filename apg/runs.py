"""A run as one record: every setting it used, saved with its checkpoint, and the only source its loaders read.

:class:`RunRecord` holds the system (name, physical parameters, task, time step, integrator, ensemble ranges),
the policy, optimiser, update (a gradient estimator or PPO) and loop settings, the seed, the preset name and the
code version. The training loop writes it into every checkpoint and into ``config.yaml``; resuming, exporting,
evaluating, comparing and aggregating rebuild everything from it, so a run made through the library and one made
through ``apg-train`` reload the plant they were trained on, and nothing else.

Fields that change how fast a run goes but not what it computes (``runtime`` in :class:`TrainSettings`' field
metadata) may differ when a run is resumed; every other difference is refused, naming the fields.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import subprocess
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import torch
import yaml

import envs
from apg.checkpoint import CHECKPOINT_NAME, CheckpointError, load_checkpoint
from apg.ensemble import ParameterRanges
from apg.estimators import EstimatorSettings
from apg.optim import OptimSettings
from apg.policies import Policy, PolicySettings
from apg.updates.ppo import PPOSettings
from envs.base import System, check_record, make_record

DTYPES = {"float32": torch.float32, "float64": torch.float64}
CONFIG_NAME = "config.yaml"
METRICS_NAME = "metrics.json"
# Command-line switches that are not settings of the run: they are never recorded, never compared.
INVOCATION_KEYS = ("resume", "progress", "threads")


def _runtime(default: Any) -> Any:
    """A loop setting that changes speed or memory, never the result: it may change when a run is resumed."""
    return field(default=default, metadata={"runtime": True})


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
    # Recomputation: keep only every k-th state for the backward pass and recompute the steps between (0: off).
    # It trades time for memory and gives the same gradient; truncation, which changes it, is estimator.window.
    recompute_every: int = _runtime(0)
    compile_step: bool = _runtime(False)  # torch.compile the closed-loop step (compiles on first use)
    horizon_start: int = 0  # horizon schedule: start at this many steps, grow linearly to horizon (0: fixed horizon)
    continuation_param: str = ""  # a positive system parameter to anneal, e.g. contact_smoothing (empty: none)
    continuation_start: float = 0.0  # its value at iteration 0, moving geometrically to the configured value
    ramp_fraction: float = 0.5  # share of the iterations over which horizon_start and continuation_start ramp
    diagnose_every: int = _runtime(100)  # iterations between per-time-step gradient diagnostics (0: off)
    diagnose_batch: int = _runtime(16)  # initial states the diagnostics roll out

    def __post_init__(self) -> None:
        if self.dtype not in DTYPES:
            raise ValueError(f"dtype must be one of {', '.join(DTYPES)}; got {self.dtype!r}")
        check_record(self, positive=("iterations", "batch_size", "horizon", "eval_every", "eval_batch",
                                     "checkpoint_every", "figure_trajectories", "diagnose_batch"),
                     nonnegative=("grad_clip", "eval_horizon", "figure_every", "max_env_steps", "max_wall_seconds",
                                  "recompute_every", "horizon_start", "continuation_start", "diagnose_every"))
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


RUNTIME_FIELDS = tuple(f"train.{f.name}" for f in dataclasses.fields(TrainSettings) if f.metadata.get("runtime"))
# Keys that may differ between the seeds of one setting of a sweep without making it another setting.
PER_SEED_KEYS = ("seed", "code_version", *RUNTIME_FIELDS)


class RunExistsError(RuntimeError):
    """The run directory already holds a run and resuming was not asked for (or does not match)."""


# ---- the record -----------------------------------------------------------------------------------------------
def _plain(v: Any) -> Any:
    """A YAML-safe copy: tuples as lists, numbers as Python numbers."""
    if isinstance(v, (tuple, list)):
        return [_plain(e) for e in v]
    if isinstance(v, dict):
        return {str(k): _plain(e) for k, e in v.items()}
    if isinstance(v, torch.Tensor):
        return v.tolist()
    return v


def _record_dict(record: object) -> dict[str, Any]:
    return {f.name: _plain(getattr(record, f.name)) for f in dataclasses.fields(record)}  # type: ignore[arg-type]


@dataclass(frozen=True)
class SystemSpec:
    """Which plant a run trained on: enough to rebuild it exactly (:meth:`build`)."""

    name: str
    params: Mapping[str, Any]  # every field of the system's Params record, in its unit
    task: Mapping[str, Any]  # every field of its Task record
    dt: float  # s
    integrator: str
    ensemble: Mapping[str, tuple[float, float]] = field(default_factory=dict)  # {parameter: (low, high)}

    @classmethod
    def of(cls, system: System, ensemble: ParameterRanges | None = None) -> "SystemSpec":
        """The spec of a live system (its own parameter values, not its class defaults).

        Raises:
            ValueError: a parameter is a per-batch tensor: a run records one nominal plant.
        """
        for record in (system.params, system.task):
            for f in dataclasses.fields(record):
                if isinstance(getattr(record, f.name), torch.Tensor):
                    raise ValueError(f"{system.name}: {f.name} is a tensor of per-batch values; a run records one "
                                     f"nominal plant. Pass a number, and train over a range with "
                                     f"ensemble=ParameterRanges.from_mapping({{{f.name!r}: [low, high]}})")
        ranges = {name: (low, high) for name, low, high in (ensemble.ranges if ensemble else ())}
        return cls(system.name, _record_dict(system.params), _record_dict(system.task), float(system.dt),
                   system.integrator, ranges)

    def build(self) -> System:
        """The nominal system; raises ``ValueError`` naming a parameter the current code does not accept."""
        return envs.build(self.name, params=dict(self.params), task=dict(self.task), dt=self.dt,
                          integrator=self.integrator)

    @property
    def ranges(self) -> ParameterRanges:
        return ParameterRanges.from_mapping({k: list(v) for k, v in self.ensemble.items()})

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "dt": self.dt, "integrator": self.integrator, "params": _plain(dict(self.params)),
                "task": _plain(dict(self.task)), "ensemble": _plain(dict(self.ensemble))}


@functools.cache
def code_version() -> str:
    """The installed apg version, with the git commit of the source tree where there is one (``+dirty`` if it
    has uncommitted changes)."""
    from importlib import metadata

    try:
        version = metadata.version("apg")
    except metadata.PackageNotFoundError:
        version = "unknown"
    root = Path(__file__).resolve().parents[1]
    try:
        commit = subprocess.run(["git", "-C", str(root), "rev-parse", "--short=12", "HEAD"], capture_output=True,
                                text=True, timeout=5, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(root), "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True, timeout=5, check=True).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return version
    return f"{version}+g{commit}{'.dirty' if dirty else ''}" if commit else version


UpdateSettings = EstimatorSettings | PPOSettings


@dataclass(frozen=True)
class RunRecord:
    """Every setting of one run (module docstring). ``update`` is an :class:`EstimatorSettings` (a gradient
    method) or a :class:`PPOSettings`; in the dict form it is the ``estimator`` or the ``ppo`` block."""

    system: SystemSpec
    policy: PolicySettings
    optim: OptimSettings
    update: UpdateSettings
    train: TrainSettings
    seed: int
    experiment: str | None = None  # the preset (configs/experiment) the run was composed from, if any
    code_version: str = field(default_factory=code_version)

    @property
    def method(self) -> str:
        return "ppo" if isinstance(self.update, PPOSettings) else "gradient"

    def to_dict(self) -> dict[str, Any]:
        """The plain form written to ``config.yaml`` and into checkpoints; :meth:`from_dict` reads it back."""
        update_key = "ppo" if self.method == "ppo" else "estimator"
        return {"system": self.system.to_dict(), "policy": _record_dict(self.policy),
                "optim": _record_dict(self.optim), update_key: _record_dict(self.update),
                "train": _record_dict(self.train), "seed": self.seed, "experiment": self.experiment,
                "code_version": self.code_version}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], where: str = "run record") -> "RunRecord":
        """Rebuild and validate a record; raises ``ValueError`` naming the bad key and ``where`` it came from."""
        if not isinstance(d, Mapping):
            raise ValueError(f"{where}: expected a mapping, got {type(d).__name__}")
        try:
            sysd = d["system"]
            if ("estimator" in d) == ("ppo" in d):
                raise ValueError("it must hold exactly one of the blocks 'estimator' (a gradient method) and 'ppo'")
            update = (make_record(PPOSettings, d["ppo"], "ppo") if "ppo" in d
                      else make_record(EstimatorSettings, d["estimator"], "estimator"))
            spec = SystemSpec(str(sysd["name"]), dict(sysd.get("params") or {}), dict(sysd.get("task") or {}),
                              float(sysd["dt"]), str(sysd.get("integrator", "rk4")),
                              {k: tuple(float(b) for b in v) for k, v in (sysd.get("ensemble") or {}).items()})
            return cls(system=spec, policy=make_record(PolicySettings, d["policy"], "policy"),
                       optim=make_record(OptimSettings, d["optim"], "optim"), update=update,
                       train=make_record(TrainSettings, d["train"], "train"), seed=int(d["seed"]),
                       experiment=d.get("experiment"), code_version=str(d.get("code_version", "unknown")))
        except KeyError as e:
            raise ValueError(f"{where} lacks the key {e.args[0]!r}") from None
        except (TypeError, ValueError) as e:
            raise ValueError(f"{where}: {e}") from None

    def digest(self) -> str:
        """A short, stable digest of the settings (code version excluded)."""
        d = self.to_dict()
        d.pop("code_version")
        return hashlib.sha256(json.dumps(d, sort_keys=True, default=str).encode()).hexdigest()[:16]

    def differences(self, other: "RunRecord") -> list[tuple[str, Any, Any]]:
        """``(key, this value, other value)`` for every setting that differs, runtime fields and the code version
        excepted, in key order."""
        a, b = flatten(self.to_dict()), flatten(other.to_dict())
        skip = {"code_version", *RUNTIME_FIELDS}
        return [(k, a.get(k), b.get(k)) for k in sorted(set(a) | set(b)) if k not in skip and a.get(k) != b.get(k)]


def flatten(d: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """``{"train.horizon": 60, ...}`` from a nested mapping (empty mappings kept as values)."""
    out: dict[str, Any] = {}
    for k, v in d.items():
        if isinstance(v, Mapping) and v:
            out.update(flatten(v, f"{prefix}{k}."))
        else:
            out[f"{prefix}{k}"] = v
    return out


def record_yaml(record: RunRecord) -> str:
    return yaml.safe_dump(record.to_dict(), sort_keys=False)


# ---- loading a finished or interrupted run ------------------------------------------------------------------------
@dataclass(frozen=True)
class LoadedRun:
    """A run rebuilt from its checkpoint's record: the nominal system, the trained policy and the raw state."""

    path: Path  # the checkpoint file
    record: RunRecord
    system: System
    policy: Policy
    state: dict[str, Any]

    @property
    def run_dir(self) -> Path:
        return self.path.parent

    @property
    def iteration(self) -> int:
        return int(self.state["iteration"])


def load_run(path: Path | str) -> LoadedRun:
    """Rebuild a run from a run directory or a ``checkpoint.pt``, from its record alone.

    Raises:
        CheckpointError: a missing, unreadable or foreign checkpoint, or one whose record is invalid.
        ValueError: the saved policy does not fit the recorded system.
    """
    path = Path(path)
    file = path / CHECKPOINT_NAME if path.is_dir() else path
    state = load_checkpoint(file)
    try:
        record = RunRecord.from_dict(state["record"], f"{file}: run record")
        system = record.system.build()
    except ValueError as e:
        raise CheckpointError(f"{e}. The checkpoint may come from another version of apg "
                              f"({state.get('record', {}).get('code_version', 'unknown')})") from None
    dtype = next(iter(state["policy"].values())).dtype
    policy = Policy(record.policy, system.obs_dim, system.action_low, system.action_high).to(dtype)
    try:
        policy.load_state_dict(state["policy"])
    except RuntimeError as e:
        raise ValueError(f"checkpoint {file}: its policy does not fit the recorded system {system.name!r}: {e}") from None
    return LoadedRun(file, record, system, policy, state)


__all__ = ["TrainSettings", "SystemSpec", "RunRecord", "LoadedRun", "load_run", "RunExistsError", "code_version",
           "RUNTIME_FIELDS", "PER_SEED_KEYS", "INVOCATION_KEYS", "CONFIG_NAME", "METRICS_NAME", "DTYPES"]
