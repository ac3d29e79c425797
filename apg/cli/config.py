"""The only reader of Hydra configs: schemas derived from the library's records, and builders that turn a
composed config into those records.

Every schema is generated from a frozen record (:func:`schema_of`, :func:`system_schema`), so a setting is
declared once: adding a field to a record adds its config key, type check and default. Hydra composes YAML into
these schemas, which makes an unknown key or a wrong type fail at the door with the key's full name; the
builders below then make the frozen records, whose own checks reject out-of-range values with the key's name.
Below ``apg/cli`` nothing sees a DictConfig.

Importing this module registers every schema in Hydra's ConfigStore. It must stay an importable module (not
``__main__``) so that launchers which pickle the task function (submitit, joblib) find the registrations.
"""

from __future__ import annotations

import dataclasses
import os
import textwrap
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig, OmegaConf
from omegaconf.errors import MissingMandatoryValue

import envs
from apg.compare import Entrant, RaceSettings, StudySettings
from apg.ensemble import ParameterRanges
from apg.estimators import EstimatorSettings
from apg.evaluation import SweepSettings
from apg.export import ExportSettings
from apg.optim import OptimSettings
from apg.policies import PolicySettings
from apg.report import EvalSettings
from apg.runs import INVOCATION_KEYS, RunRecord, SystemSpec, TrainSettings
from apg.updates import PPOSettings
from envs.base import System, make_record


# ---- schemas from records ----------------------------------------------------------------------------------------
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
    experiment: Optional[str] = None  # set by configs/experiment/*.yaml, recorded with the run


@dataclass
class ExportSchema:
    """The top of ``configs/export.yaml``."""

    source: str = MISSING  # a run directory or a checkpoint.pt
    output: Optional[str] = None  # the .onnx to write; default <run dir>/policy.onnx
    overwrite: bool = False  # replace an existing output file
    threads: int = 1
    export: Any = field(default_factory=schema_of(ExportSettings))


_SWEEP_FIELDS = [f for f in dataclasses.fields(schema_of(SweepSettings)) if f.name != "params"]
SweepSchema = dataclasses.make_dataclass("SweepSchema", [
    ("params", Dict[str, List[float]], field(default_factory=dict)),  # {name: [low, high]} in the parameter's unit
    *[(f.name, f.type, f) for f in _SWEEP_FIELDS]])

_EVAL_FIELDS = [f for f in dataclasses.fields(schema_of(EvalSettings))
                if f.name not in ("limits", "scale", "robustness")]
EvalSettingsSchema = dataclasses.make_dataclass("EvalSettingsSchema", [
    ("limits", Dict[str, List[float]], field(default_factory=dict)),  # {state: [low, high]}
    ("scale", Dict[str, float], field(default_factory=dict)),  # {state: reference scale in its unit}
    ("robustness", SweepSchema, field(default_factory=SweepSchema)),
    *[(f.name, f.type, f) for f in _EVAL_FIELDS]])


@dataclass
class EvalSchema:
    """The top of ``configs/eval.yaml``."""

    source: str = MISSING  # a run directory, a checkpoint.pt or an exported .onnx
    against: List[str] = field(default_factory=list)  # more sources swept on the same plant, drawn in the same curves
    labels: List[str] = field(default_factory=list)  # legend labels for source, then against (default: names)
    output: Optional[str] = None  # report folder; default <run dir>/eval or <stem>_eval beside an .onnx
    threads: int = 1
    progress: bool = True
    eval: Any = field(default_factory=EvalSettingsSchema)


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


def rank_suffix() -> str:
    """``""`` without ``torchrun`` or on rank 0, ``.rank<N>`` on the others: keeps per-rank log files apart."""
    rank = os.environ.get("RANK", "0")
    return "" if rank in ("", "0") else f".rank{rank}"


CONFIG_DIR = Path(__file__).resolve().parents[2] / "configs"


def choices(group: str, indent: int = 2) -> str:
    """The YAML files of a config group, comma-separated and wrapped under a help line indented ``indent``
    spaces: what ``--help`` offers (Hydra's stored ``schema*`` entries are not choices)."""
    names = sorted(p.stem for p in (CONFIG_DIR / group).glob("*.yaml"))
    return textwrap.fill(", ".join(names), width=116 - indent, subsequent_indent=" " * indent, break_on_hyphens=False)


def register() -> None:
    """Put every schema in Hydra's ConfigStore and apg's resolvers in OmegaConf (idempotent).

    ``${apg_invocation_keys:}`` lists :data:`apg.runs.INVOCATION_KEYS`, so the sweep folder names leave out the
    same switches the run record leaves out; ``${apg_train_choices:GROUP}`` lists a group's choices for
    ``apg-train --help``."""
    OmegaConf.register_new_resolver("apg_rank_suffix", rank_suffix, replace=True)
    OmegaConf.register_new_resolver("apg_invocation_keys", lambda: list(INVOCATION_KEYS), replace=True)
    OmegaConf.register_new_resolver("apg_train_choices", choices, replace=True)
    cs = ConfigStore.instance()
    cs.store(name="app_schema", node=AppSchema)
    for cls in envs.SYSTEMS.values():
        cs.store(group="system", name=f"schema_{cls.name}", node=system_schema(cls))
    cs.store(group="policy", name="schema", node=schema_of(PolicySettings))
    cs.store(group="optim", name="schema", node=schema_of(OptimSettings))
    cs.store(group="estimator", name="schema", node=schema_of(EstimatorSettings))
    cs.store(name="export_schema", node=ExportSchema)
    cs.store(name="eval_schema", node=EvalSchema)
    cs.store(name="compare_schema", node=CompareSchema)


register()


# ---- shared pieces of the builders --------------------------------------------------------------------------------
def _plain(cfg: DictConfig | dict) -> dict[str, Any]:
    """The composed config as plain Python, with a missing mandatory value named and explained."""
    if isinstance(cfg, DictConfig):
        try:
            plain = OmegaConf.to_container(cfg, resolve=True, throw_on_missing=True)
        except MissingMandatoryValue as e:
            raise ValueError(f"{e.full_key} is required, e.g. {e.full_key}=runs/crane/<date> (a run directory, "
                             f"a checkpoint.pt or, for apg-eval, an exported .onnx)") from None
    else:
        plain = dict(cfg)
    if not isinstance(plain, dict):
        raise ValueError(f"the config must be a mapping, got {type(plain).__name__}")
    return plain


def _threads(plain: dict[str, Any]) -> int:
    threads = int(plain.get("threads", 1))
    if threads < 1:
        raise ValueError(f"threads must be >= 1, got {threads}")
    return threads


def _system(sysc: dict[str, Any]) -> tuple[System, ParameterRanges]:
    """The nominal system and the ensemble ranges of a ``system`` node."""
    try:
        system = envs.build(sysc["name"], params=sysc.get("params"), task=sysc.get("task"), dt=sysc.get("dt"),
                            integrator=sysc.get("integrator", "rk4"))
    except ValueError as e:
        raise ValueError(f"system: {e}") from None
    ensemble = ParameterRanges.from_mapping(sysc.get("ensemble"))
    ensemble.check(system)
    return system, ensemble


def _pairs(mapping: dict[str, Any] | None, key: str, width: int) -> tuple:
    out = []
    for name, value in (mapping or {}).items():
        vals = value if isinstance(value, (list, tuple)) else [value]
        if len(vals) != width:
            shape = "[low, high]" if width == 2 else "a number"
            raise ValueError(f"{key}.{name} must be {shape}, got {value!r}")
        out.append((str(name), *(float(v) for v in vals)))
    return tuple(out)


# ---- apg-train ---------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class TrainSpec:
    """What ``apg-train`` runs: the run's record, the system it builds, and the invocation switches."""

    record: RunRecord
    system: System
    threads: int
    resume: bool
    progress: bool


def build_train(cfg: DictConfig | dict) -> TrainSpec:
    """The run record of an ``apg-train`` config; raises ``ValueError`` naming the offending key."""
    plain = _plain(cfg)
    system, ensemble = _system(plain["system"])
    record = RunRecord(
        system=SystemSpec.of(system, ensemble), policy=make_record(PolicySettings, plain["policy"], "policy"),
        optim=make_record(OptimSettings, plain["optim"], "optim"),
        update=make_record(EstimatorSettings, plain["estimator"], "estimator"),
        train=make_record(TrainSettings, plain["train"], "train"), seed=int(plain["seed"]),
        experiment=plain.get("experiment"))
    return TrainSpec(record, system, _threads(plain), bool(plain.get("resume", False)),
                     bool(plain.get("progress", True)))


# ---- apg-export and apg-eval ---------------------------------------------------------------------------------------
def build_export(cfg: DictConfig | dict) -> dict[str, Any]:
    """``{"source", "output", "overwrite", "threads", "settings"}`` from an ``apg-export`` config."""
    plain = _plain(cfg)
    return {"source": plain["source"], "output": plain.get("output"), "overwrite": bool(plain.get("overwrite")),
            "threads": _threads(plain), "settings": make_record(ExportSettings, plain.get("export"), "export")}


def build_eval(cfg: DictConfig | dict) -> dict[str, Any]:
    """``{"sources", "labels", "output", "threads", "progress", "settings"}`` from an ``apg-eval`` config."""
    plain = _plain(cfg)
    ev = dict(plain.get("eval") or {})
    rob = dict(ev.pop("robustness", None) or {})
    rob["params"] = _pairs(rob.get("params"), "eval.robustness.params", 2)
    sweep = make_record(SweepSettings, rob, "eval.robustness")
    ev["limits"] = _pairs(ev.get("limits"), "eval.limits", 2)
    ev["scale"] = tuple((n, v) for n, v in _pairs(ev.get("scale"), "eval.scale", 1))
    settings = make_record(EvalSettings, {**ev, "robustness": sweep}, "eval")
    return {"sources": [plain["source"], *plain.get("against", [])], "labels": list(plain.get("labels", [])),
            "output": plain.get("output"), "threads": _threads(plain), "progress": bool(plain.get("progress", True)),
            "settings": settings}


# ---- apg-compare --------------------------------------------------------------------------------------------------
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
    config: dict  # the plain composed config, written beside the comparison's report


def _merged(base: dict, over: dict | None) -> dict:
    return {**base, **(over or {})}


def build_compare(cfg: DictConfig | dict) -> CompareSpec:
    """The records of an ``apg-compare`` config; raises ``ValueError`` naming the offending key.

    Estimators are composed from ``configs/estimator`` into ``study.estimators.<label>`` and
    ``race.entrants.<label>.estimator`` by the defaults list of ``configs/compare.yaml``; each entrant's ``optim``
    and ``train`` blocks are overrides merged over the top-level ``optim`` and ``train`` blocks.
    """
    plain = _plain(cfg)
    if plain["system"].get("ensemble"):
        raise ValueError("system.ensemble is not supported by apg-compare: the race compares estimators on the "
                         "nominal model; remove system.ensemble")
    system, _ = _system(plain["system"])
    study_cfg = dict(plain["study"])
    estimators = {label: make_record(EstimatorSettings, node, f"study.estimators.{label}")
                  for label, node in (study_cfg.pop("estimators") or {}).items()}
    race_cfg = dict(plain["race"])
    entrants = []
    for label, node in (race_cfg.pop("entrants") or {}).items():
        where = f"race.entrants.{label}"
        method = node.get("method", "gradient")
        if method == "gradient":
            if not node.get("estimator"):
                raise ValueError(f"{where}: method=gradient needs an estimator; add "
                                 f"'- estimator@{where}.estimator: <name>' to the defaults, or set "
                                 f"{where}.estimator.name")
            update = make_record(EstimatorSettings, node["estimator"], f"{where}.estimator")
        elif method == "ppo":
            update = make_record(PPOSettings, node.get("ppo"), f"{where}.ppo")
        else:
            raise ValueError(f"{where}.method must be gradient or ppo; got {method!r}")
        try:
            entrants.append(Entrant(
                label=label, update=update,
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
    return CompareSpec(system=system, policy=make_record(PolicySettings, plain["policy"], "policy"), study=study,
                       study_estimators=estimators, race=race, entrants=tuple(entrants),
                       checkpoint=plain.get("checkpoint"), seed=int(plain["seed"]), threads=_threads(plain),
                       progress=bool(plain.get("progress", True)), config=plain)


__all__ = ["schema_of", "system_schema", "register", "TrainSpec", "build_train", "build_export", "build_eval",
           "CompareSpec", "build_compare"]
