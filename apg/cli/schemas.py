"""Hydra schemas of ``apg-export`` and ``apg-eval``, and the functions that turn their configs into records.

As in :mod:`apg.config`, the schemas are derived from the library's frozen records where the shapes agree, so a
setting is declared once; importing this module registers them in Hydra's ConfigStore (it must stay importable,
not live in ``__main__``). Ranges and per-state settings are mappings in YAML (``{load_mass: [8000, 12000]}``)
and tuples in the records.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig, OmegaConf
from omegaconf.errors import MissingMandatoryValue

from apg.config import schema_of
from apg.evaluation import SweepSettings
from apg.export import ExportSettings
from apg.report import EvalSettings
from envs.base import make_record


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


def register() -> None:
    """Put both schemas in Hydra's ConfigStore (idempotent)."""
    cs = ConfigStore.instance()
    cs.store(name="export_schema", node=ExportSchema)
    cs.store(name="eval_schema", node=EvalSchema)


register()


def _plain(cfg: DictConfig | dict) -> dict[str, Any]:
    if isinstance(cfg, DictConfig):
        try:
            plain = OmegaConf.to_container(cfg, resolve=True, throw_on_missing=True)
        except MissingMandatoryValue as e:
            raise ValueError(f"{e.full_key} is required, e.g. {e.full_key}=runs/crane/<date> (a run directory, "
                             f"a checkpoint.pt or, for apg-eval, an exported .onnx)") from None
    else:
        plain = dict(cfg)
    assert isinstance(plain, dict)
    return plain


def _threads(plain: dict[str, Any]) -> int:
    threads = int(plain.get("threads", 1))
    if threads < 1:
        raise ValueError(f"threads must be >= 1, got {threads}")
    return threads


def _pairs(mapping: dict[str, Any] | None, key: str, width: int) -> tuple:
    out = []
    for name, value in (mapping or {}).items():
        vals = value if isinstance(value, (list, tuple)) else [value]
        if len(vals) != width:
            shape = "[low, high]" if width == 2 else "a number"
            raise ValueError(f"{key}.{name} must be {shape}, got {value!r}")
        out.append((str(name), *(float(v) for v in vals)))
    return tuple(out)


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
