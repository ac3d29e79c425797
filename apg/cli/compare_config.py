"""Hydra schema of ``apg-compare`` and the function that turns its config into library records.

As in :mod:`apg.config`, the schema is derived from the library's frozen records (``StudySettings``,
``RaceSettings``, ``PPOSettings``, ``TrainSettings``), so a setting is declared once. Importing this module
registers the schema in Hydra's ConfigStore (it must stay importable, not live in ``__main__``).

Estimators are composed from ``configs/estimator`` into ``study.estimators.<label>`` and
``race.entrants.<label>.estimator`` by the defaults list of ``configs/compare.yaml``; each entrant's ``optim`` and
``train`` blocks are overrides merged over the top-level ``optim`` and ``train`` blocks.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Dict, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig, OmegaConf

import envs
from apg.compare import Entrant, RaceSettings, StudySettings
from apg.config import schema_of
from apg.estimators import EstimatorSettings
from apg.optim import OptimSettings
from apg.policies import PolicySettings
from apg.ppo import PPOSettings
from apg.trainer import TrainSettings
from envs.base import System, make_record


@dataclass
class EntrantSchema:
    """One race entrant: ``method: gradient`` with an ``estimator`` node, or ``method: ppo`` with ``ppo``."""

    method: str = "gradient"  # gradient | ppo
    estimator: Any = None  # an estimator node (configs/estimator/*.yaml), for method=gradient
    ppo: Any = field(default_factory=schema_of(PPOSettings))  # for method=ppo
    optim: Dict[str, Any] = field(default_factory=dict)  # overrides of the top-level optim block
    train: Dict[str, Any] = field(default_factory=dict)  # overrides of the top-level train block


StudySchema = dataclasses.make_dataclass(
    "StudySchema", [("estimators", Dict[str, Any], field(default_factory=dict))], bases=(schema_of(StudySettings),))
RaceSchema = dataclasses.make_dataclass(
    "RaceSchema", [("entrants", Dict[str, EntrantSchema], field(default_factory=dict))],
    bases=(schema_of(RaceSettings),))


@dataclass
class CompareSchema:
    """The top of ``configs/compare.yaml``."""

    system: Any = MISSING
    policy: Any = MISSING
    optim: Any = MISSING
    train: Any = field(default_factory=schema_of(TrainSettings))
    study: Any = field(default_factory=StudySchema)
    race: Any = field(default_factory=RaceSchema)
    checkpoint: Optional[str] = None  # study the gradients at a trained policy (run directory or checkpoint.pt)
    seed: int = 0  # seed of the study's minibatch and estimates (the race has its own list, race.seeds)
    threads: int = 1  # torch intra-op threads; the seconds columns are measured with this many
    progress: bool = True  # progress bars in the terminal
    experiment: Optional[str] = None  # set by configs/experiment/*.yaml when one is composed in


def register() -> None:
    """Put the schema in Hydra's ConfigStore (idempotent)."""
    ConfigStore.instance().store(name="compare_schema", node=CompareSchema)


register()


@dataclass(frozen=True)
class CompareSpec:
    """Everything ``apg-compare`` needs, as library records."""

    system: System
    policy: PolicySettings
    study: StudySettings
    study_estimators: dict[str, EstimatorSettings]
    race: RaceSettings
    entrants: tuple[Entrant, ...]
    checkpoint: Optional[str]
    seed: int
    threads: int
    progress: bool
    config: dict


def _merged(base: dict, over: dict | None) -> dict:
    return {**base, **(over or {})}


def build(cfg: DictConfig | dict) -> CompareSpec:
    """Turn a composed config into records; raises ``ValueError`` naming the offending key."""
    plain = OmegaConf.to_container(cfg, resolve=True) if isinstance(cfg, DictConfig) else dict(cfg)
    assert isinstance(plain, dict)
    sysc = plain["system"]
    if sysc.get("ensemble"):
        raise ValueError("system.ensemble is not supported by apg-compare: the race compares estimators on the "
                         "nominal model; remove system.ensemble")
    try:
        system = envs.build(sysc["name"], params=sysc.get("params"), task=sysc.get("task"), dt=sysc.get("dt"),
                           integrator=sysc.get("integrator", "rk4"))
    except ValueError as e:
        raise ValueError(f"system: {e}") from None
    study_cfg = dict(plain["study"])
    estimators = {label: make_record(EstimatorSettings, node, f"study.estimators.{label}")
                  for label, node in (study_cfg.pop("estimators") or {}).items()}
    race_cfg = dict(plain["race"])
    entrants = []
    for label, node in (race_cfg.pop("entrants") or {}).items():
        where = f"race.entrants.{label}"
        method = node.get("method", "gradient")
        estimator = ppo = None
        if method == "gradient":
            if not node.get("estimator"):
                raise ValueError(f"{where}: method=gradient needs an estimator; add "
                                 f"'- estimator@{where}.estimator: <name>' to the defaults, or set "
                                 f"{where}.estimator.name")
            estimator = make_record(EstimatorSettings, node["estimator"], f"{where}.estimator")
        elif method == "ppo":
            ppo = make_record(PPOSettings, node.get("ppo"), f"{where}.ppo")
        try:
            entrants.append(Entrant(
                label=label, method=method, estimator=estimator, ppo=ppo,
                optim=make_record(OptimSettings, _merged(plain["optim"], node.get("optim")), f"{where}.optim"),
                train=make_record(TrainSettings, _merged(plain["train"], node.get("train")), f"{where}.train")))
        except ValueError as e:
            raise ValueError(f"{where}: {e}") from None
    race = make_record(RaceSettings, race_cfg, "race")
    labels = [e.label for e in entrants]
    missing = [k for k in race.only if k not in labels] + ([race.reference] if race.enabled and race.reference
                                                          not in labels else [])
    if race.enabled and missing:
        raise ValueError(f"race.only / race.reference name {missing}, which are not entrants; the entrants are "
                         f"{labels}")
    study = make_record(StudySettings, study_cfg, "study")
    if study.enabled and not estimators:
        raise ValueError("study.enabled=true but study.estimators is empty")
    threads = int(plain.get("threads", 1))
    if threads < 1:
        raise ValueError(f"threads must be >= 1, got {threads}")
    return CompareSpec(system=system, policy=make_record(PolicySettings, plain["policy"], "policy"), study=study,
                       study_estimators=estimators, race=race, entrants=tuple(entrants),
                       checkpoint=plain.get("checkpoint"), seed=int(plain["seed"]), threads=threads,
                       progress=bool(plain.get("progress", True)), config=plain)
