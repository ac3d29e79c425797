"""Hydra schemas, derived from the library's frozen records so that each setting is declared once.

Hydra composes YAML into these (mutable) schemas, which makes an unknown key or a wrong type fail at the door
with the key's full name. :func:`build` then turns the composed config into the library's frozen records, whose
own checks reject out-of-range values. Importing this module registers the schemas in Hydra's ConfigStore
(it must stay importable, not live in ``__main__``, so that other launchers find the registrations).
"""

from __future__ import annotations

import dataclasses
import os
import typing
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig, OmegaConf

import envs
from apg.ensemble import ParameterRanges
from apg.estimators import EstimatorSettings
from apg.optim import OptimSettings
from apg.policies import PolicySettings
from apg.trainer import TrainSettings
from envs.base import System, make_record


def _schema_type(tp: Any) -> Any:
    origin = typing.get_origin(tp)
    if origin is tuple:
        args = [a for a in typing.get_args(tp) if a is not Ellipsis]
        return List[args[0] if args else Any]  # type: ignore[valid-type]
    return tp


def _field(tp: Any, default: Any) -> Any:
    if isinstance(default, tuple):
        return field(default_factory=lambda d=default: list(d))
    if dataclasses.is_dataclass(default):
        return field(default_factory=lambda d=default: d)
    return field(default=default)


def schema_of(record: type, name: str | None = None) -> type:
    """A mutable dataclass with the same fields, types (tuples as lists) and defaults as ``record``."""
    hints = typing.get_type_hints(record)
    fields = [(f.name, _schema_type(hints[f.name]), _field(hints[f.name], getattr(record(), f.name)))
              for f in dataclasses.fields(record)]
    return dataclasses.make_dataclass(name or f"{record.__name__}Schema", fields)


def system_schema(cls: type[System]) -> type:
    """The config node of one system: its name, time step, integrator, physical parameters and task."""
    params, task = schema_of(cls.Params), schema_of(cls.Task)
    return dataclasses.make_dataclass(f"{cls.__name__}Schema", [
        ("name", str, field(default=cls.name)),
        ("dt", float, field(default=cls.default_dt)),
        ("integrator", str, field(default="rk4")),
        ("params", params, field(default_factory=params)),
        ("task", task, field(default_factory=task)),
        # Train over a model ensemble: {parameter: [low, high]}, drawn per minibatch element.
        ("ensemble", Dict[str, List[float]], field(default_factory=dict)),
    ])


@dataclass
class AppSchema:
    """The top of ``apg-train``'s config; the groups below it are filled from ``configs/<group>/*.yaml``."""

    system: Any = MISSING
    policy: Any = MISSING
    optim: Any = MISSING
    estimator: Any = MISSING
    train: Any = field(default_factory=schema_of(TrainSettings))
    seed: int = 0
    threads: int = 1  # torch intra-op threads; one is fastest when other processes share the cores
    resume: bool = False  # continue the run in the run directory instead of refusing to touch it
    progress: bool = True  # show a progress bar in the terminal
    experiment: Optional[str] = None  # set by configs/experiment/*.yaml, recorded in the metrics


def rank_suffix() -> str:
    """``""`` without ``torchrun`` or on rank 0, ``.rank<N>`` on the others: keeps per-rank log files apart."""
    rank = os.environ.get("RANK", "0")
    return "" if rank in ("", "0") else f".rank{rank}"


def register() -> None:
    """Put every schema in Hydra's ConfigStore and the ``apg_rank_suffix`` resolver in OmegaConf (idempotent)."""
    OmegaConf.register_new_resolver("apg_rank_suffix", rank_suffix, replace=True)
    cs = ConfigStore.instance()
    cs.store(name="app_schema", node=AppSchema)
    for cls in envs.SYSTEMS.values():
        cs.store(group="system", name=f"schema_{cls.name}", node=system_schema(cls))
    cs.store(group="policy", name="schema", node=schema_of(PolicySettings))
    cs.store(group="optim", name="schema", node=schema_of(OptimSettings))
    cs.store(group="estimator", name="schema", node=schema_of(EstimatorSettings))


register()


@dataclass(frozen=True)
class RunSpec:
    """Everything ``apg-train`` needs, as library records (no DictConfig beyond this point)."""

    system: System
    ensemble: ParameterRanges
    policy: PolicySettings
    optim: OptimSettings
    estimator: EstimatorSettings
    train: TrainSettings
    seed: int
    threads: int
    resume: bool
    progress: bool
    config: dict  # the plain resolved config, saved with the run


def build(cfg: DictConfig | dict) -> RunSpec:
    """Turn a composed config into records; raises ``ValueError`` naming the offending key."""
    plain = OmegaConf.to_container(cfg, resolve=True) if isinstance(cfg, DictConfig) else dict(cfg)
    assert isinstance(plain, dict)
    sysc = plain["system"]
    try:
        system = envs.build(sysc["name"], params=sysc.get("params"), task=sysc.get("task"), dt=sysc.get("dt"),
                           integrator=sysc.get("integrator", "rk4"))
    except ValueError as e:
        raise ValueError(f"system: {e}") from None
    ensemble = ParameterRanges.from_mapping(sysc.get("ensemble"))
    ensemble.check(system)
    threads = int(plain.get("threads", 1))
    if threads < 1:
        raise ValueError(f"threads must be >= 1, got {threads}")
    return RunSpec(
        system=system, ensemble=ensemble,
        policy=make_record(PolicySettings, plain["policy"], "policy"),
        optim=make_record(OptimSettings, plain["optim"], "optim"),
        estimator=make_record(EstimatorSettings, plain["estimator"], "estimator"),
        train=make_record(TrainSettings, plain["train"], "train"),
        seed=int(plain["seed"]), threads=threads, resume=bool(plain.get("resume", False)),
        progress=bool(plain.get("progress", True)), config=plain,
    )
